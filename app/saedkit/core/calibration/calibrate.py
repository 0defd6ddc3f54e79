"""Camera-constant calibration against a known standard.

The camera constant ``K`` (pixel·Å) ties a spacing to a distance from the
pattern centre, ``R = K/d`` (the camera equation ``R·d = λL`` with ``R`` in
pixels). It is found from a pattern of a standard whose spacings are known:

* :func:`calibrate_from_rings` — the rings of a polycrystalline film (an
  evaporated Au or Al film, say). The rings are found and measured by
  :func:`saedkit.core.detection.rings.find_rings`; each ring is then assigned to one of
  the standard's allowed ring families **without being told K**
  (:func:`find_ring_indexing`: every hypothesis ``K = R·d`` is scored by how
  well *all* the standard's rings fit it — radius misfit, intensity against
  the family's ``m·|F|²``, strong rings predicted but not seen — so in a
  two-phase film the standard's series wins, not the strongest series), and
  ``K`` is fitted together with the centre
  and the elliptical distortion to points sampled around every assigned ring,
  each ring's ideal radius tied to ``K/d``.
* :func:`calibrate_from_spots` — the spot pattern of a single crystal (Si at
  [011], say), indexed from two reflections chosen by the user (or by the
  zone-axis matcher): ``K`` and the ellipse come from a least-squares 2×2
  linear map between the reciprocal-lattice plane and the detector.

The result is a :class:`Calibration` with the uncertainty of ``K``, the
ellipse, the residual of every ring, the camera length when the pixel size is
known, a quality verdict and warnings in words with the usual remedy. The
helpers :func:`calculate_d_from_offset_array` and
:func:`calculate_d_sigma_array` turn offsets from the centre into spacings
with the calibration's ellipse correction and propagate the uncertainties.

Quality checks (each gives a warning; those marked * make the quality "poor"):

* fewer than three rings assigned *;
* clear rings that match no family of the standard: another phase (the
  specimen on an internal standard; a warning, and they are listed in
  ``unassigned_radii_px``), or — when most of them fall on reflections that
  the standard's space group or sites extinguish — the wrong standard *;
* ring radii that deviate from ``K/d`` beyond their uncertainties (reduced
  χ² > 9 and an RMS residual above 0.05 %) *, or a significant trend of the
  residual with radius (t > 3 and more than 0.1 % across the rings) *;
* ring intensities incompatible with the standard: the outer rings much
  stronger than the standard's kinematic intensities allow (an apparent
  Debye–Waller factor below −1 Å², 3σ) *. Two standards of the same structure
  (Au and Al are both fcc) have *identical* radius ratios — only the scale
  differs — so only this intensity check can tell that an Au film was
  calibrated as Al; it cannot catch the reverse (a light film named as a
  heavy standard), since faster fall-off is also what disorder, texture and
  the Lorentz factor produce;
* ellipticity above 3 % (warning only: the correction handles it).

References
----------
.. [1] D. B. Williams and C. B. Carter, *Transmission Electron Microscopy*,
   2nd ed., Springer (2009), ch. 9 and 18 (camera constant, ring patterns).
.. [2] ISO 25498:2018, Microbeam analysis — Analytical electron microscopy —
   Selected-area electron diffraction analysis using a transmission electron
   microscope (calibration of the camera constant).
"""

from __future__ import annotations

import math
from collections.abc import Callable
from dataclasses import dataclass, field, replace
from functools import lru_cache

import numpy as np
from scipy import optimize

from saedkit.core._validate import check_points_xy, check_positive, check_xy, finite_or_none
from saedkit.core.calibration.camera import DEFAULT_REPRODUCIBILITY_PCT, _CameraMixin, check_reproducibility_pct
from saedkit.core.detection.centre import CentreResult
from saedkit.core.crystallography.crystal import Phase, format_indices
from saedkit.core.distortion import NO_DISTORTION, Ellipse
from saedkit.core.errors import FitError, InputError
from saedkit.core.optics import calculate_camera_length_mm, calculate_lambda_L_mm_A, calculate_wavelength_A

__all__ = [
    "RingAssignment",
    "RingIndexing",
    "Calibration",
    "calibrate_from_rings",
    "calibrate_from_spots",
    "find_ring_indexing",
    "fit_camera_constant",
    "calculate_corrected_radius_array",
    "calculate_d_from_offset_array",
    "calculate_d_sigma_array",
    "calculate_d_from_radius_array",
    "calculate_d_sigma_from_radius_array",
    "QUALITY_GOOD",
    "QUALITY_POOR",
]

QUALITY_GOOD = "good"
QUALITY_POOR = "poor"

#: Fewest rings (or spots) behind a calibration that is called good (common practice).
MIN_RINGS = 3
#: Ellipticity above which the user is told to check the stigmators (common practice:
#: 0.5–2 % uncorrected is usual; see REFERENCES.md, "Practice").
ELLIPTICITY_WARN = 0.03
#: A ring this strong (profile SNR) that matches nothing is a finding, not noise.
SIGNIFICANT_SNR = 8.0
#: Reduced χ² of the ring radii about K/d above which the residuals are systematic.
CHI2_LIMIT = 9.0
#: ... provided the RMS residual is also above this (percent): below it the misfit
#: is far under the 0.1 % of a careful calibration and not worth a warning.
PRACTICAL_RESIDUAL_PCT = 0.05
#: Trend of residual with radius: significant at t > 3 and above this many percent across the rings.
TREND_LIMIT_PCT = 0.1
#: Spread (natural log) of a ring's intensity about its series' kinematic m·|F|² that is still
#: consistent with it (a factor of about 3: texture, few grains, dynamical scattering; common practice).
_INTENSITY_SPREAD = math.log(3.0)  # a ring counts against its series beyond a factor of ~3.6
#: Apparent Debye–Waller factor (Å²) of observed over expected ring intensities below which
#: the outer rings are too strong for the standard.
APPARENT_B_LIMIT_A2 = -1.0


# --------------------------------------------------------------------------- results


@dataclass(frozen=True)
class RingAssignment:
    """One ring (or spot) assigned to a reflection family of the standard.

    Parameters
    ----------
    hkl : (h, k, l)
        The family (ring) or the reflection (spot).
    d_A : float
        Its spacing in the standard, Å.
    radius_px : float
        Measured ideal radius (mean of the ellipse's semi-axes), pixels.
    radius_sigma_px : float
        Its standard uncertainty, pixels.
    residual_px : float
        ``radius_px − K/d`` (or the exact-form radius), pixels.
    residual_pct : float
        The residual in percent of the predicted radius.
    multiplicity : int
        Reflections in the family (1 for a spot).
    snr : float
        Signal-to-noise ratio of the ring in the radial profile (NaN for a spot).
    blend : tuple of (h, k, l)
        Other families of the standard within the ring's width (unresolved);
        ``d_A`` is then the intensity-weighted mean spacing of the blend and
        ``multiplicity`` the sum over its families.
    """

    hkl: tuple[int, int, int]
    d_A: float
    radius_px: float
    radius_sigma_px: float
    residual_px: float
    residual_pct: float
    multiplicity: int = 1
    snr: float = math.nan
    blend: tuple[tuple[int, int, int], ...] = ()

    def to_dict(self) -> dict:
        """JSON-ready record."""
        return {
            "hkl": [int(v) for v in self.hkl],
            "d_A": float(self.d_A),
            "radius_px": float(self.radius_px),
            "radius_sigma_px": finite_or_none(self.radius_sigma_px),
            "residual_px": float(self.residual_px),
            "residual_pct": float(self.residual_pct),
            "multiplicity": int(self.multiplicity),
            "snr": finite_or_none(self.snr),
            "blend_hkl": [[int(v) for v in h] for h in self.blend],
        }


@dataclass(frozen=True)
class Calibration(_CameraMixin):
    """A camera constant fitted on a pattern of a standard, with its uncertainty and checks.

    A :class:`~saedkit.core.calibration.camera.CameraModel`: K with its
    statistical σ (the fit's) and, separately, the reproducibility term.

    Parameters
    ----------
    camera_constant_px_A, camera_constant_sigma_px_A : float
        K (pixel·Å, ``R = K/d``) and its standard uncertainty.
    ellipse : Ellipse
        Elliptical distortion of the pattern (correct offsets with it before
        converting to spacings).
    ellipticity_sigma, major_axis_sigma_deg : float
        Standard uncertainties of ``e`` and ``φ``.
    centre : CentreResult or None
        Pattern centre from the fit.
    voltage_kv, wavelength_A : float
        Accelerating voltage and relativistic wavelength.
    pixel_size_um : float or None
        Detector pixel size (after binning), µm.
    camera_length_mm, lambda_L_mm_A : float or None
        ``L = K·p/λ`` and ``λL = K·p`` when the pixel size is known.
    standard : str
        Name of the standard phase.
    method : str
        ``"rings"`` or ``"spots"``.
    rings : tuple of RingAssignment
        The assigned rings (for ``"spots"``: the indexed reflections).
    unassigned_radii_px : tuple of float
        Rings (or spot distances) that match no reflection of the standard.
    warnings : tuple of str
        Problems in words, each with the usual remedy.
    quality : str
        ``"good"`` or ``"poor"`` (see the module notes for the criteria).
    image_sha256 : str or None
        Hash of the calibration image.
    profile : RadialProfile or None
        Radial profile about the fitted centre, ellipse-corrected (for plots;
        not in :meth:`to_dict` unless asked).
    reduced_chi2 : float
        Reduced χ² of the ring radii (or spot positions) about the fitted model.
    n_points : int
        Points (ring samples or spots) in the final fit.
    exact_camera_equation : bool
        True when ``R = L·tan 2θ`` was used instead of ``R = K/d``.
    fit : str
        ``"joint"`` (centre, ellipse and K over ring points), ``"radii"`` (K
        from ring radii alone, the fallback), ``"affine"`` or ``"similarity"``
        (spots).
    reproducibility_pct : float
        Systematic relative uncertainty of K when it is used on another pattern
        (specimen height, lens hysteresis), % (see :mod:`saedkit.core.calibration.camera`).
    internal_standard : bool
        True when the standard is on the measured pattern itself (its K applies
        to that pattern only, with a small reproducibility term).
    """

    camera_constant_px_A: float
    camera_constant_sigma_px_A: float
    ellipse: Ellipse = NO_DISTORTION
    ellipticity_sigma: float = 0.0
    major_axis_sigma_deg: float = 0.0
    centre: CentreResult | None = None
    voltage_kv: float = 200.0
    wavelength_A: float = math.nan
    pixel_size_um: float | None = None
    camera_length_mm: float | None = None
    lambda_L_mm_A: float | None = None
    standard: str = ""
    method: str = "rings"
    rings: tuple[RingAssignment, ...] = ()
    unassigned_radii_px: tuple[float, ...] = ()
    warnings: tuple[str, ...] = ()
    quality: str = QUALITY_GOOD
    image_sha256: str | None = None
    profile: object | None = field(default=None, repr=False)
    reduced_chi2: float = math.nan
    n_points: int = 0
    exact_camera_equation: bool = False
    fit: str = "joint"
    reproducibility_pct: float = DEFAULT_REPRODUCIBILITY_PCT
    internal_standard: bool = False

    def __post_init__(self) -> None:
        object.__setattr__(self, "reproducibility_pct", check_reproducibility_pct(self.reproducibility_pct))

    @property
    def source(self) -> str:
        """Provenance for the camera model: ``"rings"`` or ``"spots"``."""
        return self.method

    def with_reproducibility(self, reproducibility_pct: float) -> Calibration:
        """The same calibration with another reproducibility term (%)."""
        return replace(self, reproducibility_pct=reproducibility_pct)

    @property
    def camera_length_sigma_mm(self) -> float | None:
        """Total standard uncertainty of the camera length (statistical and reproducibility; pixel size exact)."""
        if self.camera_length_mm is None:
            return None
        return float(self.camera_length_mm * self.camera_constant_total_rel_sigma)

    @property
    def camera_length_stat_sigma_mm(self) -> float | None:
        """Statistical part of the camera length's uncertainty (from the fit's σ_K)."""
        if self.camera_length_mm is None:
            return None
        return float(self.camera_length_mm * self.camera_constant_rel_sigma)

    @property
    def camera_length_sys_sigma_mm(self) -> float | None:
        """Systematic part of the camera length's uncertainty (the reproducibility)."""
        if self.camera_length_mm is None:
            return None
        return float(self.camera_length_mm * self.reproducibility_pct / 100.0)

    @property
    def lambda_L_sigma_mm_A(self) -> float | None:
        """Total standard uncertainty of λL."""
        if self.lambda_L_mm_A is None:
            return None
        return float(self.lambda_L_mm_A * self.camera_constant_total_rel_sigma)

    @property
    def is_good(self) -> bool:
        """True when no check failed."""
        return self.quality == QUALITY_GOOD

    def to_dict(self, *, include_profile: bool = False) -> dict:
        """JSON-ready record with the keys of the ``calibrate`` command."""
        c = self.centre
        out = {
            "camera_constant_px_A": float(self.camera_constant_px_A),
            "camera_constant_sigma_px_A": float(self.camera_constant_sigma_px_A),
            "camera_constant_rel_sigma": float(self.camera_constant_rel_sigma),
            "reproducibility_pct": float(self.reproducibility_pct),
            "camera_constant_sys_sigma_px_A": self.camera_constant_sys_sigma_px_A,
            "camera_constant_total_sigma_px_A": self.camera_constant_total_sigma_px_A,
            "internal_standard": bool(self.internal_standard),
            "ellipse": {
                "ellipticity": float(self.ellipse.ellipticity),
                "major_axis_deg": float(self.ellipse.major_axis_deg),
                "ellipticity_sigma": finite_or_none(self.ellipticity_sigma),
                "major_axis_sigma_deg": finite_or_none(self.major_axis_sigma_deg),
            },
            "centre_px": None if c is None else [float(c.x), float(c.y)],
            "centre_sigma_px": None if c is None else [finite_or_none(c.sigma_x), finite_or_none(c.sigma_y)],
            "voltage_kv": float(self.voltage_kv),
            "wavelength_A": float(self.wavelength_A),
            "pixel_size_um": finite_or_none(self.pixel_size_um),
            "camera_length_mm": finite_or_none(self.camera_length_mm),
            "camera_length_sigma_mm": finite_or_none(self.camera_length_sigma_mm),
            "camera_length_stat_sigma_mm": finite_or_none(self.camera_length_stat_sigma_mm),
            "camera_length_sys_sigma_mm": finite_or_none(self.camera_length_sys_sigma_mm),
            "lambda_L_mm_A": finite_or_none(self.lambda_L_mm_A),
            "lambda_L_sigma_mm_A": finite_or_none(self.lambda_L_sigma_mm_A),
            "standard": self.standard,
            "method": self.method,
            "fit": self.fit,
            "exact_camera_equation": bool(self.exact_camera_equation),
            "rings": [r.to_dict() for r in self.rings],
            "unassigned_radii_px": [float(r) for r in self.unassigned_radii_px],
            "reduced_chi2": finite_or_none(self.reduced_chi2),
            "n_points": int(self.n_points),
            "quality": self.quality,
            "warnings": list(self.warnings),
            "image_sha256": self.image_sha256,
        }
        if include_profile and self.profile is not None and hasattr(self.profile, "to_dict"):
            out["profile"] = self.profile.to_dict()
        return out


# --------------------------------------------------------------------------- camera-equation helpers


def _inverse_spacing(d_A, *, exact: bool, wavelength_A: float) -> np.ndarray:
    """``q`` with ``R = K·q``: ``1/d`` (small angle) or ``tan(2θ)/λ`` (exact)."""
    d = np.asarray(d_A, dtype=float)
    if not exact:
        return 1.0 / d
    lam = wavelength_A
    return np.tan(2.0 * np.arcsin(lam / (2.0 * d))) / lam


def _spacing_from_inverse(q, *, exact: bool, wavelength_A: float) -> np.ndarray:
    q = np.asarray(q, dtype=float)
    if not exact:
        with np.errstate(divide="ignore"):
            return 1.0 / q
    lam = wavelength_A
    two_theta = np.arctan(q * lam)
    with np.errstate(divide="ignore"):
        return lam / (2.0 * np.sin(two_theta / 2.0))


def fit_camera_constant(radius_px, d_A, *, radius_sigma_px=None, exact: bool = False,
                        voltage_kv: float | None = None) -> tuple[float, float, float]:
    """Weighted least-squares K from ring radii and their spacings (one parameter).

    Parameters
    ----------
    radius_px : (N,) array
        Measured ideal radii, pixels.
    d_A : (N,) array
        Spacings of the assigned families, Å.
    radius_sigma_px : (N,) array, optional
        Standard uncertainties of the radii (weights ``1/σ²``); equal weights if None.
    exact : bool
        Use ``R = L·tan 2θ`` (needs ``voltage_kv``) instead of ``R = K/d``.
    voltage_kv : float, optional
        Accelerating voltage (exact form only).

    Returns
    -------
    K, sigma_K, reduced_chi2 : float
        ``sigma_K`` is scaled by ``sqrt(reduced χ²)`` when that exceeds 1;
        ``reduced_chi2`` is NaN for a single ring.

    Raises
    ------
    InputError
        On mismatched or non-positive input.

    Notes
    -----
    With ``q_i = 1/d_i`` the model is ``R_i = K·q_i``, so
    ``K = Σ w R q / Σ w q²`` and ``σ_K² = 1 / Σ w q²`` with ``w = 1/σ_R²``.

    Examples
    --------
    >>> K, s, chi2 = fit_camera_constant([100.0, 115.47], [2.0, 1.7320508])
    >>> round(K, 2)
    200.0
    """
    R = np.asarray(radius_px, dtype=float).ravel()
    d = np.asarray(d_A, dtype=float).ravel()
    if R.shape != d.shape or len(R) == 0:
        raise InputError(f"radius_px and d_A must be equal-length non-empty arrays, got {R.shape} and {d.shape}")
    if np.any(~np.isfinite(R)) or np.any(R <= 0) or np.any(~np.isfinite(d)) or np.any(d <= 0):
        raise InputError("radius_px and d_A must be finite and > 0")
    if radius_sigma_px is None:
        sig = np.ones_like(R)
        absolute = False
    else:
        sig = np.asarray(radius_sigma_px, dtype=float).ravel()
        if sig.shape != R.shape or np.any(~np.isfinite(sig)) or np.any(sig <= 0):
            raise InputError("radius_sigma_px must be finite, > 0 and one per radius")
        absolute = True
    lam = calculate_wavelength_A(voltage_kv) if exact else 1.0
    if exact and voltage_kv is None:
        raise InputError("voltage_kv is needed for the exact camera equation")
    q = _inverse_spacing(d, exact=exact, wavelength_A=lam)
    w = 1.0 / sig**2
    sww = float(np.sum(w * q * q))
    K = float(np.sum(w * R * q) / sww)
    res = (R - K * q) / sig
    n = len(R)
    chi2 = float(np.sum(res**2) / (n - 1)) if n > 1 else math.nan
    if absolute:
        sK = math.sqrt(1.0 / sww) * (math.sqrt(chi2) if n > 1 and chi2 > 1 else 1.0)
    else:
        sK = math.sqrt(chi2 / sww) if n > 1 else math.nan
    return K, float(sK), chi2


# --------------------------------------------------------------------------- ring indexing


@dataclass(frozen=True)
class RingIndexing:
    """The best assignment of measured ring radii to a standard's ring families.

    Parameters
    ----------
    camera_constant_px_A : float
        K of the assignment (least squares over the matched rings).
    family_index : (N,) int array
        For each measured ring, the index of its family, or −1 when it matches none.
    score : float
        Weighted count of matched rings minus the missed strong families.
    n_matched : int
        Rings matched.
    missed_family_index : tuple of int
        Families that should have been seen inside the measured range but were not.
    """

    camera_constant_px_A: float
    family_index: np.ndarray = field(repr=False)
    score: float = 0.0
    n_matched: int = 0
    missed_family_index: tuple[int, ...] = ()


def _match(R: np.ndarray, P: np.ndarray, tol: float) -> np.ndarray:
    """Nearest family for each ring if within ``tol`` (relative), unique per family; else −1."""
    if len(P) == 0:
        return np.full(len(R), -1)
    j = np.searchsorted(P, R)
    j0 = np.clip(j - 1, 0, len(P) - 1)
    j1 = np.clip(j, 0, len(P) - 1)
    pick = np.where(np.abs(R - P[j0]) <= np.abs(R - P[j1]), j0, j1)
    rel = np.abs(R - P[pick]) / P[pick]
    idx = np.where(rel <= tol, pick, -1)
    # one ring per family: keep the closest
    for fam in np.unique(idx[idx >= 0]):
        rings = np.flatnonzero(idx == fam)
        if len(rings) > 1:
            best = rings[np.argmin(rel[rings])]
            idx[rings[rings != best]] = -1
    return idx


def find_ring_indexing(
    radius_px,
    d_A,
    *,
    d_tolerance_pct: float = 1.5,
    snr=None,
    height=None,
    family_intensity=None,
    noise_at: Callable[[np.ndarray], np.ndarray] | None = None,
    radius_range_px: tuple[float, float] | None = None,
    min_snr: float = 4.0,
    exact: bool = False,
    wavelength_A: float | None = None,
    n_anchor_rings: int = 8,
    n_anchor_families: int = 10,
    camera_constant_range_px_A: tuple[float, float] | None = None,
) -> RingIndexing | None:
    """Assign measured ring radii to ring families without knowing K.

    Parameters
    ----------
    radius_px : (N,) array
        Measured ring radii, pixels.
    d_A : (M,) array
        Spacings of the standard's allowed ring families, Å, largest first.
    d_tolerance_pct : float
        A ring matches a family when its radius is within this many percent
        of ``K/d``.
    snr : (N,) array, optional
        Ring SNRs: rings count ``0.5 + 0.5·min(SNR/20, 1)`` in the score, and
        the strongest rings anchor the hypotheses.
    height, family_intensity : arrays, optional
        Measured ring heights (N,) and the families' kinematic intensities
        (M,), ``m·|F|²``. With them, a family that falls inside
        ``radius_range_px`` but was not seen although it should have been
        (expected SNR ≥ ``3·min_snr``, scaled from the matched rings)
        lowers the score by 1; without them every family predicted inside
        the range and not seen lowers it by 0.25. This rejects the
        sub-multiples of the true K (at K/2 every fcc ring lines up with
        another fcc ring).
    noise_at : callable(R) -> noise, optional
        Noise of the radial profile at radius R, for the expected SNR (it is
        assumed flat otherwise).
    radius_range_px : (lo, hi), optional
        Radii over which a ring could have been seen; by default
        ``[0.5·min(R), 1.01·max(R)]``.
    min_snr : float
        Detection threshold that was used to find the rings.
    exact, wavelength_A
        Use the exact camera equation ``R = L·tan 2θ``.
    n_anchor_rings, n_anchor_families : int
        Hypotheses ``K = R_i·d_j`` are made for the strongest rings ``i`` and
        the first families ``j``.
    camera_constant_range_px_A : (lo, hi), optional
        Only hypotheses with K in this range (e.g. ±10 % about the K that the
        microscope's nominal camera length gives). The only way to tell the
        standard from a specimen of the same structure whose rings are not much
        weaker or stronger (Au on Cu: identical radius ratios).

    Returns
    -------
    RingIndexing or None
        None when no hypothesis matches any ring.

    Notes
    -----
    Every pairing of an anchor ring with an anchor family is a hypothesis
    ``K = R·d``, refined by least squares over the rings within the
    tolerance of a family and re-matched twice. Each matched ring then counts
    with its SNR weight times the likelihood of its radius misfit (Gaussian,
    σ = a third of the tolerance) times ``2·exp(−½(δ/ln 3)²) − 1``, where δ is
    the log ratio of its strength (``height·R``) to the family's ``m·|F|²``
    after one common scale: factors of 2–3 (texture, few grains) count nearly
    in full, a ring many times off its series counts against it. Each strong
    family predicted inside the measured range where no ring was found costs
    1. Rings left unexplained cost nothing (a second phase). The best score
    wins; ties go to more matched rings, then to the smaller RMS residual.

    Examples
    --------
    >>> d = 4.0782 / np.sqrt([3, 4, 8, 11, 12, 16])  # fcc Au (Maeland & Flanagan 1964)
    >>> res = find_ring_indexing(300.0 / d[:4] * 1.001, d)
    >>> round(res.camera_constant_px_A / 300.0, 4), res.family_index.tolist()
    (1.001, [0, 1, 2, 3])
    """
    R = np.asarray(radius_px, dtype=float).ravel()
    d = np.asarray(d_A, dtype=float).ravel()
    if len(R) == 0 or len(d) == 0:
        return None
    if np.any(~np.isfinite(R)) or np.any(R <= 0) or np.any(~np.isfinite(d)) or np.any(d <= 0):
        raise InputError("radius_px and d_A must be finite and > 0")
    tol = check_positive("d_tolerance_pct", d_tolerance_pct) / 100.0
    lam = wavelength_A if wavelength_A is not None else 1.0
    order = np.argsort(-d)
    q = _inverse_spacing(d[order], exact=exact, wavelength_A=lam)  # ascending radius per unit K
    s = np.ones_like(R) if snr is None else np.asarray(snr, dtype=float).ravel()
    w = 0.5 + 0.5 * np.clip(s / 20.0, 0.0, 1.0)
    lo, hi = radius_range_px if radius_range_px is not None else (0.5 * R.min(), 1.01 * R.max())
    inten = None if family_intensity is None else np.asarray(family_intensity, dtype=float).ravel()[order]
    h = None if height is None else np.asarray(height, dtype=float).ravel()

    anchors = np.argsort(-s)[: max(1, int(n_anchor_rings))]
    hyp = (R[anchors, None] / q[None, : max(1, int(n_anchor_families))]).ravel()
    hyp = np.unique(np.round(np.log(hyp) / (tol / 4.0)))  # one hypothesis per tol/4 in K
    hyp = np.exp(hyp * (tol / 4.0))
    if camera_constant_range_px_A is not None:
        k_lo, k_hi = (float(v) for v in camera_constant_range_px_A)
        if not (0 < k_lo < k_hi):
            raise InputError(f"camera_constant_range_px_A must be (lo, hi) with 0 < lo < hi, got {camera_constant_range_px_A!r}")
        hyp = hyp[(hyp >= k_lo) & (hyp <= k_hi)]
        if len(hyp) == 0:
            return None
    # first pass: matched weight of every hypothesis
    first = []
    for K in hyp:
        idx = _match(R, K * q, tol)
        first.append(float(np.sum(w[idx >= 0])))
    first = np.asarray(first)
    if not np.any(first > 0):
        return None
    top = np.argsort(-first)[: 40]

    best = None
    seen: set[tuple] = set()
    for t in top:
        if first[t] <= 0:
            continue
        K = hyp[t]
        idx = _match(R, K * q, tol)
        for _ in range(3):  # refine K on the matched rings and re-match
            m = idx >= 0
            if not np.any(m):
                break
            K = float(np.sum(w[m] * R[m] * q[idx[m]]) / np.sum(w[m] * q[idx[m]] ** 2))
            new = _match(R, K * q, tol)
            if np.array_equal(new, idx):
                break
            idx = new
        m = idx >= 0
        if not np.any(m):
            continue
        key = tuple(idx.tolist())
        if key in seen:
            continue
        seen.add(key)
        P = K * q
        rel = (R[m] - P[idx[m]]) / P[idx[m]]
        # each matched ring counts with the likelihood of its radius misfit (σ = a third of the
        # tolerance): a chance coincidence of another phase's ring near a family counts little
        like = np.exp(-0.5 * (rel / (tol / 3.0)) ** 2)
        # ... and by its intensity: the ring's strength against the family's kinematic m·|F|²
        # (height ∝ m|F|²/R), after one common scale. Factors of 2-3 are normal (texture, few
        # grains, dynamical scattering) and count nearly in full; a ring many times weaker or
        # stronger than its series allows counts against the hypothesis, as a missed ring does:
        # it is another phase's ring at a coincident radius (a rock-salt series taken for an
        # fcc metal has its all-odd rings far too weak)
        if inten is not None and h is not None and np.count_nonzero(m) >= 3:
            with np.errstate(divide="ignore", invalid="ignore"):
                lr = np.log(np.maximum(h[m], 1e-30) * R[m] / np.maximum(inten[idx[m]], 1e-30))
            ok = np.isfinite(lr)
            if np.count_nonzero(ok) >= 3:
                dev = np.where(ok, lr - np.median(lr[ok]), 0.0)
                like = like * (2.0 * np.exp(-0.5 * (dev / _INTENSITY_SPREAD) ** 2) - 1.0)
        score = float(np.sum(w[m] * like))
        # families predicted inside the measured range with no ring near them
        near = np.min(np.abs(P[:, None] - R[None, :]), axis=1) <= tol * P
        missing = [j for j in range(len(P)) if lo <= P[j] <= hi and not near[j]]
        missed: list[int] = []
        if missing:
            if inten is not None and h is not None:
                exp_snr = _expected_snr(P[missing], inten[missing], R[m], h[m], s[m], inten[idx[m]], noise_at)
                missed = [j for j, e in zip(missing, exp_snr) if np.isfinite(e) and e >= 3.0 * min_snr]
            else:
                missed = list(missing)
        # a ring that is there but unexplained is soft evidence (a second phase, the specimen on a
        # standard, is common); a strong family predicted but not seen is hard evidence against the
        # hypothesis — soft without intensities (it may be weak), so it weighs less then
        score -= float(len(missed)) * (1.0 if inten is not None and h is not None else 0.25)
        rms = float(np.sqrt(np.mean(rel**2)))
        cand = (round(score, 6), int(np.count_nonzero(m)), -rms)
        if best is None or cand > best[0]:
            best = (cand, K, idx.copy(), tuple(missed))
    if best is None:
        return None
    (score, n_m, _), K, idx, missed = best
    fam = np.where(idx >= 0, order[np.clip(idx, 0, None)], -1)
    return RingIndexing(
        camera_constant_px_A=float(K),
        family_index=fam,
        score=float(score),
        n_matched=int(n_m),
        missed_family_index=tuple(int(order[j]) for j in missed),
    )


def _expected_snr(P, inten, R_m, h_m, snr_m, inten_m, noise_at) -> np.ndarray:
    """Expected profile SNR of families at radii ``P`` scaled from the matched rings.

    A ring's power ``m·|F|²`` is spread over its circumference, so its height
    goes as ``intensity / R``; the noise is the profile's at ``P`` scaled like
    the matched rings' (or flat without ``noise_at``).
    """
    scale = np.median(h_m * R_m / np.maximum(inten_m, 1e-30))
    noise_m = h_m / np.maximum(snr_m, 1e-9)
    if noise_at is not None:
        with np.errstate(invalid="ignore", divide="ignore"):
            ratio = noise_m / np.asarray(noise_at(R_m), dtype=float)
        ratio = ratio[np.isfinite(ratio)]
        if len(ratio):
            noise = float(np.median(ratio)) * np.asarray(noise_at(P), dtype=float)
        else:
            noise = np.full(len(P), np.median(noise_m))
    else:
        noise = np.full(len(P), np.median(noise_m))
    with np.errstate(invalid="ignore", divide="ignore"):
        return scale * inten / P / noise


# --------------------------------------------------------------------------- joint fit over ring points




def _ellipse_sigmas(p1, p2, c22) -> tuple[float, float]:
    """σ_e and σ_φ (degrees) from the covariance of (e·cos 2φ, e·sin 2φ)."""
    e = math.hypot(p1, p2)
    if e > 0:
        ge = np.array([p1, p2]) / e
        gphi = 0.5 * np.array([-p2, p1]) / e**2
        sig_e = float(np.sqrt(max(ge @ c22 @ ge, 0.0)))
        sig_phi = float(np.degrees(np.sqrt(max(gphi @ c22 @ gphi, 0.0))))
        return sig_e, min(sig_phi, 90.0)
    return float(np.sqrt(max(np.trace(c22) / 2.0, 0.0))), 90.0


def _joint_residuals(x, pts, ring, q, w_sqrt, fit_ellipse):
    """Residuals ``|D⁻¹(p − c)| − K·q_ring`` (weighted) and their Jacobian.

    Parameters ``x = (cx, cy, [p1, p2,] K)``, ``D = I + ½[[p1, p2], [p2, −p1]]``.
    """
    cx, cy = x[0], x[1]
    if fit_ellipse:
        p1, p2, K = x[2], x[3], x[4]
    else:
        p1 = p2 = 0.0
        K = x[2]
    det = 1.0 - 0.25 * (p1 * p1 + p2 * p2)
    m00, m01, m11 = (1.0 - 0.5 * p1) / det, -0.5 * p2 / det, (1.0 + 0.5 * p1) / det
    vx = pts[:, 0] - cx
    vy = pts[:, 1] - cy
    qx = m00 * vx + m01 * vy
    qy = m01 * vx + m11 * vy
    rho = np.hypot(qx, qy)
    qr = q[ring]
    res = (rho - K * qr) * w_sqrt
    rs = np.where(rho > 0, rho, 1.0)
    jac = np.zeros((len(pts), len(x)))
    jac[:, 0] = -(m00 * qx + m01 * qy) / rs
    jac[:, 1] = -(m01 * qx + m11 * qy) / rs
    if fit_ellipse:
        for j, (a00, a01, a11) in ((2, (0.5, 0.0, -0.5)), (3, (0.0, 0.5, 0.0))):
            tx = a00 * qx + a01 * qy
            ty = a01 * qx + a11 * qy
            dqx = -(m00 * tx + m01 * ty)
            dqy = -(m01 * tx + m11 * ty)
            jac[:, j] = (qx * dqx + qy * dqy) / rs
    jac[:, -1] = -qr
    jac *= w_sqrt[:, None]
    return res, jac


@dataclass(frozen=True)
class _JointFit:
    centre: CentreResult
    ellipse: Ellipse
    ellipticity_sigma: float
    major_axis_sigma_deg: float
    K: float
    sigma_K: float
    radius_px: np.ndarray
    radius_sigma_px: np.ndarray
    n_points: int


def _fit_joint_points(pts_list, q, centre, ellipse, K0, fit_ellipse) -> _JointFit:
    """Least squares of centre, (e, φ) and K over points on rings tied to ``R_i = K·q_i``."""
    n_rings = len(pts_list)
    pts = np.concatenate(pts_list)
    ring = np.concatenate([np.full(len(p), i) for i, p in enumerate(pts_list)])
    p1, p2 = ellipse.components
    x0 = np.array([centre[0], centre[1], p1, p2, K0]) if fit_ellipse else np.array([centre[0], centre[1], K0])
    n_par = len(x0)
    w = np.ones(len(pts))
    keep = np.ones(len(pts), bool)
    x = x0
    for _round in range(6):
        if np.count_nonzero(keep) <= n_par + 2:
            raise FitError(f"too few ring points for the joint fit ({np.count_nonzero(keep)})")
        pk, rk, wk = pts[keep], ring[keep], np.sqrt(w[keep])
        sol = optimize.least_squares(
            lambda v: _joint_residuals(v, pk, rk, q, wk, fit_ellipse)[0], x,
            jac=lambda v: _joint_residuals(v, pk, rk, q, wk, fit_ellipse)[1],
            method="lm", xtol=1e-12, ftol=1e-12,
        )
        if not np.all(np.isfinite(sol.x)):
            raise FitError("the joint fit of centre, ellipse and K did not converge")
        x = sol.x
        if fit_ellipse and math.hypot(x[2], x[3]) > 0.5:
            raise FitError(f"the joint fit gives an implausible ellipticity {math.hypot(x[2], x[3]):.3f}")
        raw, _ = _joint_residuals(x, pts, ring, q, np.ones(len(pts)), fit_ellipse)
        # per-ring robust scatter sets the weights; points beyond 4 robust sigmas are outliers
        sig_ring = np.empty(n_rings)
        for i in range(n_rings):
            r = raw[(ring == i) & keep]
            med = np.median(r) if len(r) else 0.0
            mad = 1.4826 * np.median(np.abs(r - med)) if len(r) else np.nan
            sig_ring[i] = mad if np.isfinite(mad) and mad > 1e-4 else max(float(np.std(r)) if len(r) > 1 else 1.0, 1e-3)
        new_w = 1.0 / sig_ring[ring] ** 2
        new_keep = np.abs(raw - np.array([np.median(raw[(ring == i) & keep]) for i in range(n_rings)])[ring]) \
            <= 4.0 * sig_ring[ring]
        for i in range(n_rings):  # never drop a whole ring
            if np.count_nonzero(new_keep & (ring == i)) < 3:
                new_keep |= ring == i
        if np.array_equal(new_keep, keep) and np.allclose(new_w, w, rtol=0.05):
            break
        keep, w = new_keep, new_w
    res, jac = _joint_residuals(x, pts[keep], ring[keep], q, np.sqrt(w[keep]), fit_ellipse)
    dof = len(res) - n_par
    s2 = float(np.sum(res**2) / dof) if dof > 0 else math.nan
    jtj = jac.T @ jac
    if np.linalg.matrix_rank(jtj) < n_par:
        raise FitError("the ring points do not constrain the centre, ellipse and K")
    cov = np.linalg.inv(jtj) * s2
    sig = np.sqrt(np.clip(np.diag(cov), 0.0, None))
    if fit_ellipse:
        ell = Ellipse.from_components(x[2], x[3])
        sig_e, sig_phi = _ellipse_sigmas(x[2], x[3], cov[2:4, 2:4])
    else:
        ell, sig_e, sig_phi = NO_DISTORTION, 0.0, 0.0
    K, sK = float(x[-1]), float(sig[-1])
    # per-ring measured radius with the fitted centre and ellipse
    dinv = ell.inverse_matrix
    rho = np.hypot(*((pts - x[:2]) @ dinv.T).T)
    radius = np.empty(n_rings)
    radius_sig = np.empty(n_rings)
    for i in range(n_rings):
        r = rho[(ring == i) & keep]
        radius[i] = float(np.mean(r))
        radius_sig[i] = float(np.std(r, ddof=1) / math.sqrt(len(r))) if len(r) > 1 else math.nan
    centre_res = CentreResult(float(x[0]), float(x[1]), float(sig[0]), float(sig[1]), "rings", n_rings)
    return _JointFit(centre_res, ell, sig_e, sig_phi, K, sK, radius, radius_sig, int(np.count_nonzero(keep)))


# --------------------------------------------------------------------------- checks


def _trend(R, res_pct, sig_pct) -> tuple[float, float] | None:
    """Weighted straight line of residual (%) against radius: (change across the rings in %, t)."""
    if len(R) < 4:
        return None
    w = 1.0 / np.maximum(sig_pct, 1e-6) ** 2
    X = np.column_stack([np.ones_like(R), R - np.average(R, weights=w)])
    A = X.T @ (X * w[:, None])
    b = X.T @ (w * res_pct)
    try:
        coef = np.linalg.solve(A, b)
        cov = np.linalg.inv(A)
    except np.linalg.LinAlgError:
        return None
    chi2 = float(np.sum(w * (res_pct - X @ coef) ** 2) / (len(R) - 2))
    sig_slope = math.sqrt(cov[1, 1] * max(chi2, 1.0))
    change = float(coef[1] * (R.max() - R.min()))
    t = float(coef[1] / sig_slope) if sig_slope > 0 else math.inf
    return change, t


def _apparent_b(d_A, power, expected, snr) -> tuple[float, float] | None:
    """Apparent Debye–Waller factor (Å²) of observed over expected ring power, with its σ.

    ``ln(P_obs / P_calc) = a − 2B·s²`` with ``s = 1/(2d)``; weights from the
    SNR with a 10 % model floor (common practice for kinematic ring intensities).
    """
    ok = (power > 0) & (expected > 0) & np.isfinite(power) & (snr >= SIGNIFICANT_SNR)
    if np.count_nonzero(ok) < 3:
        return None
    s2 = 1.0 / (4.0 * d_A[ok] ** 2)
    if s2.max() - s2.min() < 0.02:
        return None
    y = np.log(power[ok] / expected[ok])
    sig = np.sqrt((2.0 / snr[ok]) ** 2 + 0.1**2)
    w = 1.0 / sig**2
    X = np.column_stack([np.ones_like(s2), s2])
    A = X.T @ (X * w[:, None])
    coef = np.linalg.solve(A, X.T @ (w * y))
    cov = np.linalg.inv(A)
    n = len(y)
    chi2 = float(np.sum(w * (y - X @ coef) ** 2) / (n - 2)) if n > 2 else 1.0
    sig_slope = math.sqrt(cov[1, 1] * max(chi2, 1.0))
    return float(-coef[1] / 2.0), float(sig_slope / 2.0)


def _fmt_pct(x: float) -> str:
    return f"{100 * x:.2f} %"


def _ellipticity_warnings(ell: Ellipse) -> list[str]:
    """The large-ellipticity warning with its usual remedy, when it applies."""
    if ell.ellipticity <= ELLIPTICITY_WARN:
        return []
    return [f"ellipticity e = {_fmt_pct(ell.ellipticity)} (> {_fmt_pct(ELLIPTICITY_WARN)}) at "
            f"{ell.major_axis_deg:.1f}°: check the projector/intermediate-lens astigmatism (stigmators), "
            "or keep the ellipse correction on"]


# --------------------------------------------------------------------------- rings


def _unwrap_image(image):
    """(data, mask, sha256, pixel size) of a PatternImage or an array."""
    if hasattr(image, "data") and hasattr(image, "sha256"):
        data = np.asarray(image.data)
        m = getattr(image, "mask", None)
        m = None if m is None else np.asarray(m, bool)
        if m is not None and not m.any():
            m = None
        return data, m, image.sha256, getattr(image, "pixel_size_um", None)
    return np.asarray(image), None, None, None


def _resolve_phase(standard) -> Phase:
    if isinstance(standard, Phase):
        return standard
    if isinstance(standard, str) or hasattr(standard, "__fspath__"):
        from saedkit.core.crystallography.library import find_phase

        return find_phase(standard)
    raise InputError(f"standard must be a Phase, a library name or a CIF path, got {type(standard).__name__}")


def _derived_lengths(K: float, pixel_size_um, voltage_kv: float) -> tuple[float | None, float | None]:
    if pixel_size_um is None:
        return None, None
    return (calculate_camera_length_mm(K, pixel_size_um, voltage_kv), calculate_lambda_L_mm_A(K, pixel_size_um))


def calibrate_from_rings(
    image,
    standard,
    *,
    voltage_kv: float,
    mask=None,
    pixel_size_um: float | None = None,
    centre_guess_xy=None,
    d_tolerance_pct: float = 1.5,
    min_snr: float = 4.0,
    fit_ellipse: bool = True,
    exact_camera_equation: bool = False,
    expected_camera_constant_px_A: float | None = None,
    expected_range_pct: float = 10.0,
    progress: Callable[[int, int], None] | None = None,
    should_stop: Callable[[], bool] | None = None,
) -> Calibration:
    """Fit the camera constant, centre and ellipse on a ring pattern of a known standard.

    Parameters
    ----------
    image : PatternImage or (rows, cols) array
        The ring pattern of the standard. A PatternImage also supplies its
        mask, hash and pixel size.
    standard : Phase or str
        The standard: a Phase, a library name (``"Au"``) or a CIF path.
    voltage_kv : float
        Accelerating voltage, kV.
    mask : (rows, cols) bool array, optional
        True where pixels are excluded (beam stop, saturated core); joined
        with the PatternImage's own mask.
    pixel_size_um : float, optional
        Detector pixel size (after binning), µm, for the camera length; by
        default the image's.
    centre_guess_xy : [x, y], optional
        Starting centre; by default the centre of point symmetry.
    d_tolerance_pct : float
        A ring is assigned to a family when its radius is within this many
        percent of ``K/d``.
    min_snr : float
        Smallest ring SNR in the radial profile.
    fit_ellipse : bool
        Fit the elliptical distortion (else circles).
    exact_camera_equation : bool
        Use ``R = L·tan 2θ`` instead of ``R = K/d`` (differs by about 10⁻⁴ for
        Au at 200 kV; see :mod:`saedkit.core.optics`).
    expected_camera_constant_px_A : float, optional
        Roughly the K to expect (from the nominal camera length): the rings are
        then assigned only with K within ``expected_range_pct`` of it. Needed
        when the film holds a second phase of the standard's structure (Cu
        with an Au standard) whose rings are about as strong.
    expected_range_pct : float
        Half-width of that window, percent.
    progress : callable(done, total), optional
    should_stop : callable() -> bool, optional
        Polled between steps; the fit stops with FitError when it returns True.

    Returns
    -------
    Calibration

    Raises
    ------
    InputError
        Bad image, mask, standard or options.
    FitError
        No ring found, or no scale K lines the rings up with the standard.

    Notes
    -----
    1. Rings, centre and ellipse: :func:`saedkit.core.detection.rings.find_rings`.
    2. Assignment without K: :func:`find_ring_indexing` over the standard's
       allowed ring families (:func:`calculate_ring_families`).
    3. Joint least squares of ``(cx, cy, e·cos 2φ, e·sin 2φ, K)`` over
       points sampled around every assigned ring
       (:func:`~saedkit.core.detection.rings.sample_ring_points`), residuals
       ``|D⁻¹(p − c)| − K/d_i``, each ring weighted by its own scatter,
       4σ outliers rejected. The covariance is ``s²(JᵀWJ)⁻¹``; σ_K is then
       scaled by ``sqrt(χ²_ν)`` of the ring radii about ``K/d`` when it
       exceeds 1 (ring-to-ring misfit is not in the point scatter).
       If this fit fails, K comes from the one-parameter fit of the ring radii
       (:func:`fit_camera_constant`) and a warning says so.
    4. Checks (see the module notes) set the quality and the warnings.

    Examples
    --------
    >>> from saedkit.core.crystallography.library import find_phase
    >>> from saedkit.core.simulation.simulate import simulate_ring_pattern
    >>> img, truth = simulate_ring_pattern(find_phase("Au"), shape=(512, 512), camera_constant_px_A=250.0,
    ...                                    rng=np.random.default_rng(0))
    >>> cal = calibrate_from_rings(img, "Au", voltage_kv=200)  # doctest: +SKIP
    >>> abs(cal.camera_constant_px_A / 250.0 - 1) < 1e-3  # doctest: +SKIP
    True
    """
    from saedkit.core.detection.rings import calculate_radial_profile, find_rings, sample_ring_points

    data, own_mask, sha, own_px = _unwrap_image(image)
    phase = _resolve_phase(standard)
    kv = check_positive("voltage_kv", voltage_kv)
    lam = calculate_wavelength_A(kv)
    tol_pct = check_positive("d_tolerance_pct", d_tolerance_pct)
    if tol_pct > 10:
        raise InputError(f"d_tolerance_pct must be at most 10, got {d_tolerance_pct!r}")
    px = pixel_size_um if pixel_size_um is not None else own_px
    if px is not None:
        px = check_positive("pixel_size_um", px)
    if mask is not None:
        m = np.asarray(mask)
        if m.shape != data.shape or m.dtype != bool:
            raise InputError(f"mask must be a bool array of the image's shape {data.shape}, got {m.dtype} {m.shape}")
        mask = m if own_mask is None else (m | own_mask)
    else:
        mask = own_mask
    exact = bool(exact_camera_equation)
    k_range = None
    if expected_camera_constant_px_A is not None:
        k_exp = check_positive("expected_camera_constant_px_A", expected_camera_constant_px_A)
        span = check_positive("expected_range_pct", expected_range_pct) / 100.0
        if span >= 1:
            raise InputError(f"expected_range_pct must be below 100, got {expected_range_pct!r}")
        k_range = (k_exp * (1 - span), k_exp * (1 + span))

    total = 10

    def report(done: int) -> None:
        if progress is not None:
            progress(done, total)
        if should_stop is not None and should_stop():
            raise FitError("calibration stopped on request")

    def ring_progress(done: int, of: int) -> None:
        if progress is not None:
            progress(int(6 * done / max(of, 1)), total)

    ring_fit = find_rings(data, mask=mask, centre_guess_xy=centre_guess_xy, min_snr=min_snr,
                          fit_ellipse=fit_ellipse, progress=ring_progress, should_stop=should_stop)
    report(6)
    rings = list(ring_fit.rings)
    R = np.array([r.radius_px for r in rings])
    Rsig = np.array([r.radius_sigma_px for r in rings])
    snr = np.array([r.snr for r in rings])
    height = np.array([r.height for r in rings])
    width = np.array([r.width_px for r in rings])
    sane = np.isfinite(R) & np.isfinite(Rsig) & (Rsig < np.maximum(2.0, 0.01 * R)) & (R > 0)

    # the standard's ring families, far enough out for every hypothesis (but not below 0.3 Å)
    d1 = _first_d(phase)
    n_anchor_fam = 10
    anchor_R = R[sane] if np.any(sane) else R
    fams_all = _ring_families(phase, kv, max(0.3, 0.25 * d1))
    if not fams_all:
        raise FitError(f"the standard {phase.name} has no allowed ring in reach")
    n_anchor_fam = min(n_anchor_fam, len(fams_all))
    d_need = 0.97 * fams_all[n_anchor_fam - 1].d_A * float(np.min(anchor_R)) / float(np.max(R))
    if d_need < fams_all[-1].d_A and fams_all[-1].d_A > 0.3:
        fams_all = _ring_families(phase, kv, max(0.3, d_need))
    fams = [f for f in fams_all if f.allowed]
    fam_d = np.array([f.d_A for f in fams])
    fam_I = np.array([f.intensity for f in fams])

    prof = ring_fit.profile

    def noise_at(r):
        ok = np.isfinite(prof.sigma) & (prof.counts > 1)
        return np.interp(np.asarray(r, float), prof.radius_px[ok], prof.sigma[ok], left=np.nan, right=np.nan)

    use = np.flatnonzero(sane)
    if len(use) == 0:
        raise FitError("no ring is measured well enough to calibrate on (every ring's radius is uncertain)")
    filled = np.flatnonzero(prof.counts > 1)
    first_profile_r = float(prof.radius_px[filled[min(3, len(filled) - 1)]]) if len(filled) else 0.0
    lo = max(first_profile_r + 2.0, 0.5 * float(R[use].min()))
    idxg = find_ring_indexing(
        R[use], fam_d, d_tolerance_pct=tol_pct, snr=snr[use], height=height[use], family_intensity=fam_I,
        noise_at=noise_at, radius_range_px=(lo, 1.01 * float(R[use].max())), min_snr=min_snr,
        exact=exact, wavelength_A=lam, n_anchor_families=n_anchor_fam, camera_constant_range_px_A=k_range,
    )
    if idxg is None:
        where = "" if k_range is None else f" with K in {k_range[0]:.1f}–{k_range[1]:.1f} px·Å"
        raise FitError(f"no camera constant{where} lines up the {len(use)} measured rings with the rings of {phase.name}")
    fam_of = np.full(len(R), -1)
    fam_of[use] = idxg.family_index
    report(7)
    q_all = _inverse_spacing(fam_d, exact=exact, wavelength_A=lam)
    w_fam = fam_I / np.maximum(q_all, 1e-12)  # ring height ∝ m|F|²/R: weight of a family in a blend

    def blends(fam_of_now, K_now):
        """Effective q of each assigned ring, its members (primary first) — families closer than its FWHM."""
        out_q, out_members = {}, {}
        P = K_now * q_all
        for i in np.flatnonzero(fam_of_now >= 0):
            f = fam_of_now[i]
            members = np.flatnonzero(np.abs(P - P[f]) < max(float(width[i]), 1e-6))
            if f not in members:
                members = np.append(members, f)
            members = members[np.argsort(-w_fam[members])]
            out_q[i] = float(np.sum(w_fam[members] * q_all[members]) / np.sum(w_fam[members]))
            out_members[i] = members
        return out_q, out_members

    # joint fit over ring points, re-matching if the refined K assigns other rings
    warnings: list[str] = []
    joint = None
    K = idxg.camera_constant_px_A
    centre, ellipse = ring_fit.centre.xy, ring_fit.ellipse
    fit_kind = "joint"
    joint_error = None

    def ring_points(i, c, ell, radius):
        n_sec = min(int(np.clip((snr[i] / 4.0) ** 2, 36, 180)), max(36, int(math.pi * R[i])))
        return sample_ring_points(
            data, c, ell, radius, mask=mask, n_sectors=n_sec, ring_width_px=float(np.clip(width[i], 1.0, 30.0)),
            other_radii_px=[float(r) for j, r in enumerate(R) if j != i],
        )

    for _loop in range(3):
        assigned = np.flatnonzero(fam_of >= 0)
        q_eff_map, _ = blends(fam_of, K)
        q_eff = np.array([q_eff_map[i] for i in assigned])
        try:
            pts_list = []
            for k, i in enumerate(assigned):
                pts = ring_points(i, centre, ellipse, K * q_eff[k])
                if len(pts) < 8:
                    raise FitError(f"ring {format_indices(fams[fam_of[i]].hkl)} gave only {len(pts)} points")
                pts_list.append(pts)
            joint = _fit_joint_points(pts_list, q_eff, centre, ellipse, K, fit_ellipse)
            # a second pass sampled about the refined centre and ellipse
            pts_list = [ring_points(i, joint.centre.xy, joint.ellipse, joint.K * q_eff[k])
                        for k, i in enumerate(assigned)]
            if min(len(p) for p in pts_list) >= 8:
                joint = _fit_joint_points(pts_list, q_eff, joint.centre.xy, joint.ellipse, joint.K, fit_ellipse)
            K, centre, ellipse = joint.K, joint.centre.xy, joint.ellipse
            fit_kind = "joint"
        except FitError as exc:
            joint, joint_error = None, str(exc)
            fit_kind = "radii"
            K, _, _ = fit_camera_constant(R[assigned], _spacing_from_inverse(q_eff, exact=exact, wavelength_A=lam),
                                          radius_sigma_px=np.maximum(Rsig[assigned], 0.005),
                                          exact=exact, voltage_kv=kv)
        if should_stop is not None and should_stop():
            raise FitError("calibration stopped on request")
        # re-match every sane ring with the refined K
        new = np.full(len(R), -1)
        new[use] = _match(R[use], K * q_all, tol_pct / 100.0)
        if np.array_equal(new, fam_of):
            break
        if np.count_nonzero(new >= 0) < np.count_nonzero(fam_of >= 0):
            break  # never lose rings by re-matching
        fam_of = new
        joint = None
    report(9)

    assigned = np.flatnonzero(fam_of >= 0)
    q_eff_map, members_map = blends(fam_of, K)
    q_a = np.array([q_eff_map[i] for i in assigned])
    if joint is not None:
        R_meas, R_sig = joint.radius_px, joint.radius_sigma_px
        K, sK = joint.K, joint.sigma_K
        centre_res = joint.centre
        ell, sig_e, sig_phi = joint.ellipse, joint.ellipticity_sigma, joint.major_axis_sigma_deg
        n_points = joint.n_points
    else:
        R_meas, R_sig = R[assigned], np.maximum(Rsig[assigned], 0.005)
        K, sK, _ = fit_camera_constant(R_meas, _spacing_from_inverse(q_a, exact=exact, wavelength_A=lam),
                                       radius_sigma_px=R_sig, exact=exact, voltage_kv=kv)
        centre_res = ring_fit.centre
        ell, sig_e, sig_phi = ring_fit.ellipse, ring_fit.ellipticity_sigma, ring_fit.major_axis_sigma_deg
        n_points = int(getattr(ring_fit, "n_points", 0))
        if joint_error is not None:
            warnings.append(
                f"the joint fit of centre, ellipse and K over ring points failed ({joint_error}); "
                "K is fitted to the ring radii alone, with the ring search's centre and ellipse"
            )
    pred = K * q_a
    resid = R_meas - pred
    resid_pct = 100.0 * resid / pred
    sig_floor = np.where(np.isfinite(R_sig) & (R_sig > 0), R_sig, 0.01)
    n_a = len(assigned)
    chi2 = float(np.sum((resid / sig_floor) ** 2) / (n_a - 1)) if n_a > 1 else math.nan
    if joint is not None and n_a > 1 and chi2 > 1:
        sK *= math.sqrt(chi2)

    assignments = []
    for k, i in enumerate(assigned):
        mem = members_map[i]
        primary = fams[mem[0]]
        assignments.append(RingAssignment(
            hkl=tuple(int(v) for v in primary.hkl),
            d_A=float(_spacing_from_inverse(q_a[k], exact=exact, wavelength_A=lam)),
            radius_px=float(R_meas[k]), radius_sigma_px=float(R_sig[k]), residual_px=float(resid[k]),
            residual_pct=float(resid_pct[k]), multiplicity=int(sum(fams[j].multiplicity for j in mem)),
            snr=float(snr[i]), blend=tuple(tuple(int(v) for v in fams[j].hkl) for j in mem[1:]),
        ))
    assignments = tuple(assignments)

    # ---- checks
    poor = False
    name = phase.name
    if n_a < MIN_RINGS:
        poor = True
        warnings.append(
            f"only {n_a} ring{'s' if n_a != 1 else ''} assigned to {name}: K rests on too few rings to check it — "
            "record the standard with more rings in the field of view (a shorter camera length) or a longer exposure"
        )
    unassigned = [i for i in range(len(R)) if fam_of[i] < 0]
    r_first = float(R[assigned].min()) if n_a else 0.0
    inner = [i for i in unassigned if R[i] < 0.9 * r_first]
    outer = [i for i in unassigned if R[i] >= 0.9 * r_first]
    med_w = float(np.median(width[assigned])) if n_a else math.inf
    clear_outer = [i for i in outer if sane[i] and snr[i] >= SIGNIFICANT_SNR and width[i] <= 3.0 * med_w]
    # a clear ring the standard does not explain is either a second phase (the specimen on an
    # internal standard, a contamination) or a sign of the wrong standard: it is the latter when
    # it sits where the standard's lattice has a reflection that the standard's space group or
    # sites extinguish (Au rings read as Si: the Au 200 and 222 rings fall on Si's absent ones)
    if clear_outer:
        absent_P = K * _inverse_spacing(_absent_ring_d(phase, kv, 0.9 * K / max(float(R.max()), 1e-9)),
                                        exact=exact, wavelength_A=lam)
        # "sits where": as closely as the standard's own rings fit K/d (the extinct families are
        # dense at high index, so the whole tolerance would catch a second phase's rings by chance)
        close = max(3.0 * float(np.sqrt(np.mean((resid / pred) ** 2))), 1.5e-3) if n_a else tol_pct / 100.0
        on_absent = [i for i in clear_outer if len(absent_P) and
                     np.min(np.abs(absent_P - R[i]) / absent_P) <= min(close, tol_pct / 100.0)]
        rs = ", ".join(f"{R[i]:.1f}" for i in clear_outer)
        if 2 * len(on_absent) >= len(clear_outer):  # most of them: one coincidence is chance
            poor = True
            warnings.append(
                f"{len(clear_outer)} clear ring{'s' if len(clear_outer) != 1 else ''} (R = {rs} px) match no ring "
                f"of {name} within ±{tol_pct:g} %, {len(on_absent)} of them where {name} has an extinct "
                "reflection: the standard may be wrong, or the pattern distorted — check the standard, the "
                "voltage and the ellipse correction"
            )
        else:
            warnings.append(
                f"{len(clear_outer)} clear ring{'s' if len(clear_outer) != 1 else ''} (R = {rs} px) match no ring "
                f"of {name} within ±{tol_pct:g} %: another phase (the specimen, a contamination) — they are "
                "listed as unassigned and left out of K"
            )
    clear_inner = [i for i in inner if sane[i] and snr[i] >= SIGNIFICANT_SNR and width[i] <= 3.0 * med_w]
    if clear_inner:
        rs = ", ".join(f"{R[i]:.1f}" for i in clear_inner)
        warnings.append(
            f"ring-like feature{'s' if len(clear_inner) != 1 else ''} at R = {rs} px inside the first ring of "
            f"{name} left out (central-beam tail, beam-stop edge, or another phase)"
        )
    # strong rings of the standard inside the measured range that were not found at all
    if n_a:
        P = K * q_all
        gap = np.maximum(tol_pct / 100.0 * P, 2.0 * med_w)
        near = np.min(np.abs(P[:, None] - R[None, :]), axis=1) <= gap
        inside = (P >= lo) & (P <= float(R[assigned].max()))
        cand = np.flatnonzero(inside & ~near)
        if len(cand):
            exp_snr = _expected_snr(P[cand], fam_I[cand], R[assigned], height[assigned], snr[assigned],
                                    np.array([np.sum(fam_I[members_map[i]]) for i in assigned]), noise_at)
            missed = [j for j, e in zip(cand, exp_snr) if np.isfinite(e) and e >= 5.0 * min_snr]
            if missed:
                poor = True
                miss = ", ".join(f"{format_indices(fams[j].hkl)} at {P[j]:.1f} px" for j in missed)
                warnings.append(
                    f"ring{'s' if len(missed) != 1 else ''} {miss} of {name} should be clearly visible but "
                    f"{'were' if len(missed) != 1 else 'was'} not found: the standard may be wrong, or the "
                    "pattern distorted"
                )
    rms_pct = float(np.sqrt(np.mean(resid_pct**2))) if n_a else math.nan
    if n_a > 1 and chi2 > CHI2_LIMIT and rms_pct > PRACTICAL_RESIDUAL_PCT:
        poor = True
        worst = int(np.argmax(np.abs(resid_pct)))
        warnings.append(
            f"the ring radii deviate from K/d more than their uncertainties allow (reduced χ² = {chi2:.3g}, "
            f"largest residual {resid_pct[worst]:+.3f} % at {format_indices(assignments[worst].hkl)}): "
            "the standard may be wrong, or the pattern distorted beyond an ellipse"
        )
    tr = _trend(R_meas, resid_pct, 100.0 * sig_floor / pred) if n_a >= 4 else None
    if tr is not None and abs(tr[1]) > 3.0 and abs(tr[0]) > TREND_LIMIT_PCT:
        poor = True
        warnings.append(
            f"the residuals trend with radius ({tr[0]:+.2f} % from the first to the last ring): the standard's "
            "lattice parameter may be wrong (another phase, strain, temperature), or the projector lens adds "
            "radial distortion"
        )
    single = [k for k, i in enumerate(assigned) if len(members_map[i]) == 1]
    ab = None
    if len(single) >= 3:
        sel = assigned[single]
        ab = _apparent_b(fam_d[fam_of[sel]], height[sel] * width[sel] * R[sel], fam_I[fam_of[sel]], snr[sel])
    if ab is not None and ab[0] < APPARENT_B_LIMIT_A2 and ab[0] < -3.0 * ab[1]:
        poor = True
        warnings.append(
            f"the ring intensities do not follow {name}: the outer rings are much stronger than {name} can give "
            f"(apparent Debye–Waller factor {ab[0]:.2f} ± {ab[1]:.2f} Å²). The film may not be {name} — a heavier "
            "element with the same structure has the same ring radii — or strongly textured; check the standard"
        )
    warnings.extend(_ellipticity_warnings(ell))
    report(10)
    final_profile = calculate_radial_profile(data, centre_res.xy, mask=mask, ellipse=ell)
    L, lamL = _derived_lengths(K, px, kv)
    return Calibration(
        camera_constant_px_A=float(K),
        camera_constant_sigma_px_A=float(sK),
        ellipse=ell,
        ellipticity_sigma=float(sig_e),
        major_axis_sigma_deg=float(sig_phi),
        centre=centre_res,
        voltage_kv=kv,
        wavelength_A=lam,
        pixel_size_um=px,
        camera_length_mm=L,
        lambda_L_mm_A=lamL,
        standard=phase.name,
        method="rings",
        rings=assignments,
        unassigned_radii_px=tuple(float(R[i]) for i in unassigned),
        warnings=tuple(warnings),
        quality=QUALITY_POOR if poor else QUALITY_GOOD,
        image_sha256=sha,
        profile=final_profile,
        reduced_chi2=chi2,
        n_points=int(n_points),
        exact_camera_equation=exact,
        fit=fit_kind,
    )


@lru_cache(maxsize=32)
def _ring_families(phase: Phase, voltage_kv: float, d_min_A: float) -> tuple:
    """The phase's allowed ring families down to ``d_min_A`` (cached: phases compare by identity)."""
    from saedkit.core.crystallography.structure_factors import calculate_ring_families

    return tuple(f for f in calculate_ring_families(phase, d_min_A=round(d_min_A, 4), voltage_kv=voltage_kv)
                 if f.allowed)


@lru_cache(maxsize=32)
def _absent_ring_d(phase: Phase, voltage_kv: float, d_min_A: float) -> np.ndarray:
    """Spacings (Å) of the phase's extinct ring families (space-group or site absences) down to ``d_min_A``."""
    from saedkit.core.crystallography.structure_factors import calculate_ring_families

    fams = calculate_ring_families(phase, d_min_A=round(max(d_min_A, 0.3), 4), voltage_kv=voltage_kv,
                                   include_absent=True)
    return np.array([f.d_A for f in fams if not f.allowed], float)


def _first_d(phase: Phase) -> float:
    """Largest allowed spacing of the phase (Å)."""
    cell = phase.cell
    longest = max(cell.a, cell.b, cell.c)
    fams = _ring_families(phase, 200.0, longest / 4.0)
    return fams[0].d_A if fams else longest


# --------------------------------------------------------------------------- spots


def _index_from_basis(v, v1, v2, h1, h2, tol_px):
    """hkl of offset ``v`` as a rational combination of the chosen reflections, or None."""
    B = np.column_stack([v1, v2])
    ab = np.linalg.solve(B, v)
    for n in (1, 2, 3, 4, 6):
        c = np.round(ab * n) / n
        if np.hypot(*(B @ c - v)) > tol_px:
            continue
        hkl = c[0] * h1 + c[1] * h2
        if np.allclose(hkl, np.round(hkl), atol=1e-6) and np.any(np.round(hkl) != 0):
            return tuple(int(x) for x in np.round(hkl))
    return None


def calibrate_from_spots(
    spots_xy,
    centre_xy,
    standard,
    *,
    voltage_kv: float,
    reflections,
    pixel_size_um: float | None = None,
    fit_ellipse: bool = True,
    index_tolerance_px: float | None = None,
    image_sha256: str | None = None,
) -> Calibration:
    """Fit K (and the ellipse) on a single-crystal pattern of a standard, indexed from two reflections.

    Parameters
    ----------
    spots_xy : (N, 2) array
        Spot positions ``[x, y]``, pixels (the central beam may be among them;
        it is left out).
    centre_xy : [x, y]
        Pattern centre, pixels; refined by the fit when enough spots allow.
    standard : Phase or str
        The standard (Si, say): a Phase, a library name or a CIF path.
    voltage_kv : float
        Accelerating voltage, kV.
    reflections : sequence of ((x, y), (h, k, l))
        At least two indexed spots whose offsets are not collinear (from the
        user or the zone-axis matcher). They fix the 2-D basis in pixels and
        in hkl; every other spot is indexed as a combination of them (halves
        and thirds too, when the chosen pair is not primitive).
    pixel_size_um : float, optional
        Detector pixel size, µm, for the camera length.
    fit_ellipse : bool
        Fit the ellipse when at least five non-collinear spots are indexed.
    index_tolerance_px : float, optional
        Largest distance of a spot from its lattice point to be indexed; by
        default 8 % of the shorter chosen reflection, at least 2 px.
    image_sha256 : str, optional
        Hash of the image, for the record.

    Returns
    -------
    Calibration
        ``method == "spots"``; ``rings`` holds one entry per indexed spot.

    Raises
    ------
    InputError
        Bad points, fewer than two reflections, collinear reflections, or
        (000) among them.

    Notes
    -----
    With the reciprocal-lattice vectors ``g`` expressed in an orthonormal
    frame of the zone plane (``u``, Å⁻¹), the observed offsets are
    ``v = A·u + t`` with ``A = K·D·Rot(θ)`` (times a mirror when the
    frame's handedness is opposite to the image's) and ``t`` the centre
    correction. ``A`` and ``t`` are fitted by linear least squares; the polar
    decomposition ``A = P·U`` gives ``P = K·D``, whose eigenvalues
    ``λ₁ ≥ λ₂`` give ``K = (λ₁ + λ₂)/2`` and ``e = (λ₁ − λ₂)/K``, and whose
    major eigenvector gives ``φ``. With fewer than five spots, or without
    the ellipse, a similarity ``v = K·Rot(θ)·u (+ t)`` is fitted instead.
    Uncertainties come from the least-squares covariance (scaled by the
    residual scatter) by first-order propagation.
    """
    pts = check_points_xy("spots_xy", spots_xy)
    c0 = check_xy("centre_xy", centre_xy)
    phase = _resolve_phase(standard)
    kv = check_positive("voltage_kv", voltage_kv)
    lam = calculate_wavelength_A(kv)
    px = None if pixel_size_um is None else check_positive("pixel_size_um", pixel_size_um)
    refl = list(reflections)
    if len(refl) < 2:
        raise InputError(f"reflections must hold at least two indexed spots ((x, y), (h, k, l)), got {len(refl)}")
    r_xy, r_hkl = [], []
    for i, item in enumerate(refl):
        try:
            xy, hkl = item
        except (TypeError, ValueError):
            raise InputError(f"reflections[{i}] must be ((x, y), (h, k, l)), got {item!r}") from None
        r_xy.append(check_xy(f"reflections[{i}] position", xy))
        h = np.asarray(hkl, dtype=float)
        if h.shape != (3,) or not np.allclose(h, np.round(h)) or not np.any(h != 0):
            raise InputError(f"reflections[{i}] indices must be three integers, not all zero, got {hkl!r}")
        r_hkl.append(np.round(h).astype(int))
    v1, v2 = r_xy[0] - c0, r_xy[1] - c0
    h1, h2 = r_hkl[0], r_hkl[1]
    cross = abs(v1[0] * v2[1] - v1[1] * v2[0]) / (np.hypot(*v1) * np.hypot(*v2) + 1e-12)
    if cross < math.sin(math.radians(10.0)):
        raise InputError("the first two reflections are collinear with the centre (less than 10° apart): "
                         "choose two spots in different directions")
    if np.allclose(np.cross(h1, h2), 0):
        raise InputError(f"reflections {tuple(h1)} and {tuple(h2)} are parallel in reciprocal space")
    if index_tolerance_px is not None:
        tol_px = check_positive("index_tolerance_px", index_tolerance_px)
    else:
        tol_px = max(2.0, 0.08 * min(np.hypot(*v1), np.hypot(*v2)))

    # index every spot
    off = pts - c0
    far = np.hypot(*off.T) > 0.3 * min(np.hypot(*v1), np.hypot(*v2))  # leave out the central beam
    idx_hkl: list[tuple[int, int, int]] = []
    idx_xy: list[np.ndarray] = []
    unindexed: list[float] = []
    for v, ok in zip(off, far):
        if not ok:
            continue
        hkl = _index_from_basis(v, v1, v2, h1, h2, tol_px)
        if hkl is None:
            unindexed.append(float(np.hypot(*v)))
        else:
            idx_hkl.append(hkl)
            idx_xy.append(v + c0)
    for xy, h in zip(r_xy, r_hkl):  # the chosen reflections always count
        key = tuple(int(x) for x in h)
        if key not in idx_hkl:
            idx_hkl.append(key)
            idx_xy.append(xy)
    # one spot per reflection: the one nearest its lattice point
    H = np.array(idx_hkl, dtype=float)
    XY = np.array(idx_xy, dtype=float)
    B = phase.cell.reciprocal_basis
    g = H @ B.T  # Cartesian Å⁻¹
    g1, g2 = B @ h1, B @ h2
    e1 = g1 / np.linalg.norm(g1)
    n = np.cross(g1, g2)
    n /= np.linalg.norm(n)
    e2 = np.cross(n, e1)
    U = np.column_stack([g @ e1, g @ e2])
    off_i = XY - c0
    if len(U) >= 2:
        # the chosen pair fixes a first map; drop duplicates far from it
        A0 = np.column_stack([v1, v2]) @ np.linalg.inv(np.column_stack([[g1 @ e1, g1 @ e2], [g2 @ e1, g2 @ e2]]))
        pred0 = U @ A0.T
        dist = np.hypot(*(off_i - pred0).T)
        keep = np.ones(len(U), bool)
        for key in set(idx_hkl):
            rows = [k for k, h in enumerate(idx_hkl) if h == key]
            if len(rows) > 1:
                best = rows[int(np.argmin(dist[rows]))]
                for k in rows:
                    if k != best:
                        keep[k] = False
                        unindexed.append(float(np.hypot(*off_i[k])))
        H, XY, U, off_i, g = H[keep], XY[keep], U[keep], off_i[keep], g[keep]
        idx_hkl = [h for h, k in zip(idx_hkl, keep) if k]

    n_spots = len(U)
    # non-collinear count: rank of the indexed set
    rank2 = n_spots >= 3 and np.linalg.matrix_rank(U, tol=1e-6 * np.abs(U).max()) == 2
    use_affine = fit_ellipse and n_spots >= 5 and rank2
    fit_t = n_spots >= 5 and rank2
    warnings: list[str] = []
    if use_affine:
        X = np.column_stack([U, np.ones(n_spots)])
        coef, *_ = np.linalg.lstsq(X, off_i, rcond=None)  # (3, 2)
        A = coef[:2].T
        t = coef[2]
        res = off_i - X @ coef
        dof = 2 * n_spots - 6
        s2 = float(np.sum(res**2) / dof) if dof > 0 else math.nan
        covX = np.linalg.inv(X.T @ X) * (s2 if math.isfinite(s2) else 0.0)
        K, ell, theta = _decompose_affine(A)
        # propagate: parameters (A00, A01, A10, A11) with cov = blockdiag(covX[:2,:2], covX[:2,:2])
        cA = np.zeros((4, 4))
        cA[:2, :2] = covX[:2, :2]
        cA[2:, 2:] = covX[:2, :2]
        a = A.ravel()

        def comps(av):
            Kx, ex, _ = _decompose_affine(av.reshape(2, 2))
            p1, p2 = ex.components
            return np.array([Kx, p1, p2])

        base = comps(a)
        Jm = np.zeros((3, 4))
        step = 1e-6 * max(np.abs(a).max(), 1.0)
        for k in range(4):
            da = np.zeros(4)
            da[k] = step
            Jm[:, k] = (comps(a + da) - comps(a - da)) / (2 * step)
        cP = Jm @ cA @ Jm.T
        sK = float(math.sqrt(max(cP[0, 0], 0.0)))
        sig_e, sig_phi = _ellipse_sigmas(base[1], base[2], cP[1:, 1:])
        centre = CentreResult(float(c0[0] + t[0]), float(c0[1] + t[1]), float(math.sqrt(max(covX[2, 2], 0.0))),
                              float(math.sqrt(max(covX[2, 2], 0.0))), "lattice-fit", n_spots)
        fit_kind = "affine"
        pred = X @ coef
    else:
        # similarity: v = a·u (complex), with the handedness of the chosen pair
        det = np.linalg.det(np.column_stack([v1, v2])) * np.linalg.det(
            np.column_stack([[g1 @ e1, g1 @ e2], [g2 @ e1, g2 @ e2]]))
        uz = U[:, 0] + 1j * U[:, 1]
        if det < 0:
            uz = np.conj(uz)
        vz = off_i[:, 0] + 1j * off_i[:, 1]
        if fit_t:
            X = np.column_stack([uz, np.ones(n_spots)])
        else:
            X = uz[:, None]
        coef, *_ = np.linalg.lstsq(X, vz, rcond=None)
        res_z = vz - X @ coef
        n_par = 2 * X.shape[1]
        dof = 2 * n_spots - n_par
        s2 = float(np.sum(np.abs(res_z) ** 2) / dof) if dof > 0 else math.nan
        covc = np.linalg.inv((X.conj().T @ X).real) * (s2 / 2.0 if math.isfinite(s2) else 0.0)
        K = float(abs(coef[0]))
        sK = float(math.sqrt(max(covc[0, 0], 0.0)))
        ell, sig_e, sig_phi = NO_DISTORTION, 0.0, 0.0
        tz = coef[1] if fit_t else 0.0
        st = float(math.sqrt(max(covc[1, 1], 0.0))) if fit_t else math.nan
        centre = CentreResult(float(c0[0] + tz.real), float(c0[1] + tz.imag), st, st,
                              "lattice-fit" if fit_t else "manual", n_spots if fit_t else 0)
        pz = X @ coef
        pred = np.column_stack([pz.real, pz.imag])
        res = off_i - pred
        fit_kind = "similarity"
        if fit_ellipse and not use_affine:
            warnings.append(
                f"only {n_spots} spots indexed{' in a line' if n_spots >= 3 and not rank2 else ''}: the ellipse "
                "needs at least five non-collinear ones, so none is fitted"
            )
    # per-spot assignments
    dinv = ell.inverse_matrix
    off_c = XY - centre.xy
    R_obs = np.hypot(*(off_c @ dinv.T).T)
    d_spots = 1.0 / np.linalg.norm(g, axis=1)
    R_pred = K / d_spots
    pos_sig = math.sqrt(s2 / 2.0) if math.isfinite(s2) else math.nan
    assignments = tuple(
        RingAssignment(hkl=h, d_A=float(d), radius_px=float(r), radius_sigma_px=pos_sig,
                       residual_px=float(r - rp), residual_pct=float(100.0 * (r - rp) / rp), multiplicity=1)
        for h, d, r, rp in zip(idx_hkl, d_spots, R_obs, R_pred)
    )
    poor = False
    name = phase.name
    if n_spots < MIN_RINGS:
        poor = True
        warnings.append(f"only {n_spots} spots indexed: K rests on the chosen pair alone and cannot be checked")
    # check the chosen pair against the standard's geometry: ratio and angle
    ratio_obs = np.hypot(*v2) / np.hypot(*v1)
    ratio_calc = np.linalg.norm(g2) / np.linalg.norm(g1)
    ang_obs = math.degrees(math.acos(np.clip(v1 @ v2 / (np.hypot(*v1) * np.hypot(*v2)), -1, 1)))
    ang_calc = phase.cell.calculate_plane_angle_deg(h1, h2)
    # tolerances: 2–3 % in ratio, 1–2° in angle (common practice), widened by the ellipse
    # an ellipse e changes a length ratio by up to e and an angle by up to e radians
    e_allow = min(ell.ellipticity, 0.05)
    ratio_bad = abs(ratio_obs / ratio_calc - 1) > 0.03 + e_allow
    angle_bad = abs(ang_obs - ang_calc) > 2.0 + math.degrees(e_allow)
    if ell.ellipticity > 0.1:
        poor = True
        warnings.append(
            f"the fitted ellipticity {_fmt_pct(ell.ellipticity)} is implausible for a microscope: the chosen "
            "indices are probably wrong (the other spots were indexed from them) — check them"
        )
    if ratio_bad or angle_bad:
        poor = True
        warnings.append(
            f"the chosen reflections {format_indices(h1)} and {format_indices(h2)} do not fit {name}: measured "
            f"length ratio {ratio_obs:.3f} and angle {ang_obs:.1f}° against {ratio_calc:.3f} and {ang_calc:.1f}° — "
            "check the indices"
        )
    if unindexed:
        warnings.append(
            f"{len(unindexed)} spot{'s' if len(unindexed) != 1 else ''} not on the lattice of the chosen "
            "reflections were left out (another grain, a Laue zone above, or noise)"
        )
    rms = float(np.sqrt(np.mean(np.sum(res**2, axis=1)))) if n_spots else math.nan
    chi2 = math.nan
    if n_spots >= 3 and math.isfinite(rms):
        # a spot centre is good to a fraction of a pixel; 1 px RMS is a misfit (common practice)
        chi2 = (rms / 0.3) ** 2
        if rms > max(1.0, 0.01 * float(np.median(np.hypot(*off_i.T)))):
            poor = True
            warnings.append(
                f"the indexed spots deviate from the fitted lattice by {rms:.2f} px RMS: the indices, the "
                "centre or the standard may be wrong, or the pattern distorted"
            )
    warnings.extend(_ellipticity_warnings(ell))
    L, lamL = _derived_lengths(K, px, kv)
    return Calibration(
        camera_constant_px_A=float(K),
        camera_constant_sigma_px_A=float(sK),
        ellipse=ell,
        ellipticity_sigma=float(sig_e),
        major_axis_sigma_deg=float(sig_phi),
        centre=centre,
        voltage_kv=kv,
        wavelength_A=lam,
        pixel_size_um=px,
        camera_length_mm=L,
        lambda_L_mm_A=lamL,
        standard=name,
        method="spots",
        rings=assignments,
        unassigned_radii_px=tuple(unindexed),
        warnings=tuple(warnings),
        quality=QUALITY_POOR if poor else QUALITY_GOOD,
        image_sha256=image_sha256,
        profile=None,
        reduced_chi2=chi2,
        n_points=n_spots,
        exact_camera_equation=False,
        fit=fit_kind,
    )


def _decompose_affine(A: np.ndarray) -> tuple[float, Ellipse, float]:
    """``A = K·D·U`` (U orthogonal): K, the ellipse of D, and the rotation angle of U (degrees)."""
    M = A @ A.T
    evals, evecs = np.linalg.eigh(M)  # ascending
    lam = np.sqrt(np.clip(evals, 0.0, None))
    l2, l1 = lam[0], lam[1]
    K = 0.5 * (l1 + l2)
    e = (l1 - l2) / K if K > 0 else 0.0
    v = evecs[:, 1]
    phi = math.degrees(math.atan2(v[1], v[0]))
    P = evecs @ np.diag(lam) @ evecs.T
    Uo = np.linalg.solve(P, A)
    theta = math.degrees(math.atan2(Uo[1, 0], Uo[0, 0]))
    return float(K), Ellipse(min(e, 0.5), phi), theta


# --------------------------------------------------------------------------- applying a calibration


def calculate_corrected_radius_array(offsets_xy, ellipse: Ellipse = NO_DISTORTION) -> np.ndarray:
    """Ideal (ellipse-corrected) distances ``|D⁻¹v|`` of offsets from the centre, pixels."""
    v = check_points_xy("offsets_xy", offsets_xy)
    return np.hypot(*ellipse.correct_array(v).T) if len(v) else np.zeros(0)


def calculate_d_from_offset_array(offsets_xy, calibration) -> np.ndarray:
    """Spacings (Å) of reflections at ``offsets_xy`` from the centre, with the ellipse corrected.

    A shortcut to :func:`saedkit.core.measure.measure_positions` about the origin.

    Parameters
    ----------
    offsets_xy : (N, 2) array
        Observed offsets ``[dx, dy]`` from the pattern centre, pixels.
    calibration : CameraModel
        Any calibration (fitted, saved, entered).

    Returns
    -------
    (N,) ndarray
        ``d = K / |D⁻¹v|`` (or the exact camera equation when the
        calibration was fitted with it); NaN at the centre.

    Examples
    --------
    >>> from saedkit.core.calibration.camera import EnteredCalibration
    >>> calculate_d_from_offset_array([[200.0, 0.0]], EnteredCalibration(500.0)).tolist()
    [2.5]
    """
    from saedkit.core.measure import measure_positions

    v = check_points_xy("offsets_xy", offsets_xy)
    return measure_positions(v, 0.0, (0.0, 0.0), 0.0, calibration).d_A


def calculate_d_sigma_array(offsets_xy, offsets_sigma, calibration) -> np.ndarray:
    """Statistical standard uncertainties (Å) of the spacings of :func:`calculate_d_from_offset_array`.

    Parameters
    ----------
    offsets_xy : (N, 2) array
        Observed offsets from the centre, pixels.
    offsets_sigma : float, (N,) or (N, 2) array
        Position uncertainty, pixels: one value per point (the same in x and
        y), or ``[σx, σy]`` per point. Include the centre's uncertainty here
        when it matters.
    calibration : CameraModel

    Returns
    -------
    (N,) ndarray
        ``σ_d = d·sqrt((σ_R/R)² + (σ_K/K)²)`` (small-angle form), ``σ_R`` the
        position uncertainty projected on the radial direction of the ideal
        offset. The reproducibility of K is left out: the whole measurement,
        with it, is :func:`saedkit.core.measure.measure_positions`.
    """
    from saedkit.core.measure import measure_positions

    v = check_points_xy("offsets_xy", offsets_xy)
    sig = np.asarray(offsets_sigma, dtype=float)
    if sig.ndim == 0:
        sig = np.full((len(v), 2), float(sig))
    elif sig.shape == (len(v),):
        sig = np.column_stack([sig, sig])
    elif sig.shape != (len(v), 2):
        raise InputError(f"offsets_sigma must be a number, (N,) or (N, 2) with N = {len(v)}, got shape {sig.shape}")
    if np.any(~np.isfinite(sig)) or np.any(sig < 0):
        raise InputError("offsets_sigma must be finite and >= 0")
    return measure_positions(v, sig, (0.0, 0.0), 0.0, calibration).d_stat_sigma_A


def calculate_d_from_radius_array(radius_px, calibration) -> np.ndarray:
    """Spacings (Å) of rings or reflections at ideal (ellipse-corrected) radii ``radius_px``.

    ``d = K/R`` (or the exact camera equation when the calibration was fitted with it);
    see :func:`saedkit.core.measure.measure_radii`.
    """
    from saedkit.core.measure import measure_radii

    return measure_radii(radius_px, None, calibration).d_A


def calculate_d_sigma_from_radius_array(radius_px, radius_sigma_px, calibration) -> np.ndarray:
    """Statistical standard uncertainties (Å) of :func:`calculate_d_from_radius_array`:
    ``σ_d/d = sqrt((σ_R/R)² + (σ_K/K)²)`` (the reproducibility of K left out)."""
    from saedkit.core.measure import measure_radii

    return measure_radii(radius_px, radius_sigma_px, calibration).d_stat_sigma_A
