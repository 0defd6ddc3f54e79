"""Electron optics: relativistic wavelength and the camera equation.

The camera equation relates a reflection of spacing ``d`` to its distance
``R`` from the pattern centre on the detector. In the small-angle form
``R·d = λL``; with ``R`` in pixels the product ``K = λL / p`` (pixel·Å, ``p``
the pixel size) is the camera constant used everywhere in saedkit, so that
``R_px = K / d_A``. The exact form is ``R = L·tan(2θ)`` with
``λ = 2 d sin θ``. The small-angle form puts a reflection closer to the
centre than the exact one by the relative amount
``tan(2 arcsin(λ/2d)) / (λ/d) − 1 ≈ (3/8)(λ/d)²``
(:func:`calculate_small_angle_error_array`): 5.1×10⁻⁴ at 100 kV for d = 1 Å,
1.0×10⁻³ at 80 kV for d = 0.8 Å, 5.9×10⁻⁵ at 200 kV for d = 2 Å, up to
3.6×10⁻³ at 60 kV for d = 0.5 Å (the README has the table). A calibration
made and used with the same form absorbs part of it: what is left in a
measured d is the difference of the error at the specimen's spacing and at
the standard's. The functions here take
the small-angle form unless told ``exact=True``; the command line uses the
exact form by default on ring standards (``calibrate --small-angle`` turns
it off).
"""

from __future__ import annotations

import math

import numpy as np
from scipy import constants as sc

from saedkit.core._validate import check_positive
from saedkit.core.errors import InputError

__all__ = [
    "calculate_wavelength_A",
    "calculate_lorentz_factor",
    "calculate_velocity_ratio",
    "calculate_relativistic_voltage_V",
    "calculate_interaction_constant",
    "calculate_camera_constant_px_A",
    "calculate_camera_length_mm",
    "calculate_lambda_L_mm_A",
    "calculate_radius_px",
    "calculate_d_A",
    "calculate_small_angle_error_array",
]

_M0C2_EV = sc.m_e * sc.c**2 / sc.e  # electron rest energy in eV


def _volts(voltage_kv: float) -> float:
    return check_positive("voltage_kv", voltage_kv) * 1e3


def calculate_relativistic_voltage_V(voltage_kv: float) -> float:
    """Relativistically corrected accelerating voltage ``V(1 + eV / 2m₀c²)`` in volts."""
    v = _volts(voltage_kv)
    return v * (1 + v / (2 * _M0C2_EV))


def calculate_wavelength_A(voltage_kv: float) -> float:
    """Relativistic electron wavelength in Å.

    Parameters
    ----------
    voltage_kv : float
        Accelerating voltage in kV.

    Returns
    -------
    float
        λ in Å.

    Notes
    -----
    ``λ = h / sqrt(2 m₀ e V (1 + eV / (2 m₀ c²)))`` with CODATA constants from
    :mod:`scipy.constants`.

    References
    ----------
    .. [1] D. B. Williams and C. B. Carter, *Transmission Electron Microscopy*,
       2nd ed., Springer (2009), ch. 1.

    Examples
    --------
    >>> round(calculate_wavelength_A(200), 5)
    0.02508
    """
    v_star = calculate_relativistic_voltage_V(voltage_kv)
    momentum = math.sqrt(2 * sc.m_e * sc.e * v_star)
    if momentum == 0.0:
        raise InputError(f"voltage_kv={voltage_kv!r} is too small to give an electron wavelength")
    return _in_range("wavelength", sc.h / momentum * 1e10, voltage_kv=voltage_kv)


def calculate_lorentz_factor(voltage_kv: float) -> float:
    """γ = 1 + eV / m₀c²."""
    return 1 + _volts(voltage_kv) / _M0C2_EV


def calculate_velocity_ratio(voltage_kv: float) -> float:
    """v / c of the electrons."""
    g = calculate_lorentz_factor(voltage_kv)
    return math.sqrt(1 - 1 / g**2)


def calculate_interaction_constant(voltage_kv: float) -> float:
    """Interaction constant σ = 2π γ m₀ e λ / h² in rad V⁻¹ Å⁻¹."""
    lam_m = calculate_wavelength_A(voltage_kv) * 1e-10
    g = calculate_lorentz_factor(voltage_kv)
    return 2 * math.pi * g * sc.m_e * sc.e * lam_m / sc.h**2 * 1e-10


def _in_range(what: str, value: float, **inputs: float) -> float:
    """``value`` when finite and > 0; else an InputError naming the inputs that gave it."""
    if not (math.isfinite(value) and value > 0):
        given = ", ".join(f"{k}={v!r}" for k, v in inputs.items())
        raise InputError(f"{given} give a {what} out of the range of a float ({value!r})")
    return value


def calculate_camera_constant_px_A(camera_length_mm: float, pixel_size_um: float, voltage_kv: float) -> float:
    """Camera constant ``K = λL / p`` in pixel·Å from a camera length.

    Parameters
    ----------
    camera_length_mm : float
        Camera length L in mm.
    pixel_size_um : float
        Detector pixel size p in µm (after binning).
    voltage_kv : float
        Accelerating voltage in kV.
    """
    L = check_positive("camera_length_mm", camera_length_mm)
    p_mm = check_positive("pixel_size_um", pixel_size_um) * 1e-3
    return _in_range("camera constant", calculate_wavelength_A(voltage_kv) * L / p_mm if p_mm > 0 else math.inf,
                     camera_length_mm=camera_length_mm, pixel_size_um=pixel_size_um)


def calculate_camera_length_mm(camera_constant_px_A: float, pixel_size_um: float, voltage_kv: float) -> float:
    """Camera length ``L = K·p / λ`` in mm from a camera constant in pixel·Å."""
    K = check_positive("camera_constant_px_A", camera_constant_px_A)
    p_mm = check_positive("pixel_size_um", pixel_size_um) * 1e-3
    return _in_range("camera length", K * p_mm / calculate_wavelength_A(voltage_kv),
                     camera_constant_px_A=camera_constant_px_A, pixel_size_um=pixel_size_um)


def calculate_lambda_L_mm_A(camera_constant_px_A: float, pixel_size_um: float) -> float:
    """The product λL in mm·Å from K (pixel·Å) and the pixel size (µm)."""
    K = check_positive("camera_constant_px_A", camera_constant_px_A)
    return _in_range("λL", K * check_positive("pixel_size_um", pixel_size_um) * 1e-3,
                     camera_constant_px_A=camera_constant_px_A, pixel_size_um=pixel_size_um)


def calculate_radius_px(d_A, camera_constant_px_A: float, *, exact: bool = False, voltage_kv: float | None = None):
    """Distance from the centre (pixels) of reflections with spacing ``d_A``.

    Parameters
    ----------
    d_A : float or array
        Interplanar spacings in Å.
    camera_constant_px_A : float
        K = λL/p in pixel·Å.
    exact : bool
        Use ``R = L·tan(2θ)`` instead of ``R = K/d``; needs ``voltage_kv``.
    voltage_kv : float, optional
        Accelerating voltage (exact form only).

    Notes
    -----
    Small-angle: ``R = K / d``. Exact: ``R = (K/λ)·tan(2 arcsin(λ/2d))``,
    since ``L/p = K/λ``.
    """
    K = check_positive("camera_constant_px_A", camera_constant_px_A)
    d = np.asarray(d_A, dtype=float)
    if not exact:
        return K / d
    if voltage_kv is None:
        raise InputError("voltage_kv is needed for the exact camera equation")
    lam = calculate_wavelength_A(voltage_kv)
    return K / lam * np.tan(2 * np.arcsin(lam / (2 * d)))


def calculate_d_A(radius_px, camera_constant_px_A: float, *, exact: bool = False, voltage_kv: float | None = None):
    """Interplanar spacing (Å) of a reflection at ``radius_px`` from the centre.

    The inverse of :func:`calculate_radius_px`; the exact form uses
    ``2θ = arctan(R·λ/K)`` and ``d = λ / (2 sin θ)``.
    """
    K = check_positive("camera_constant_px_A", camera_constant_px_A)
    R = np.asarray(radius_px, dtype=float)
    if not exact:
        return K / R
    if voltage_kv is None:
        raise InputError("voltage_kv is needed for the exact camera equation")
    lam = calculate_wavelength_A(voltage_kv)
    two_theta = np.arctan(R * lam / K)
    return lam / (2 * np.sin(two_theta / 2))


def calculate_small_angle_error_array(d_A, voltage_kv: float) -> np.ndarray:
    """Relative error of the small-angle camera equation, ``R_exact / R_small − 1``.

    Parameters
    ----------
    d_A : float or array
        Interplanar spacings in Å.
    voltage_kv : float
        Accelerating voltage in kV.

    Returns
    -------
    ndarray
        ``tan(2 arcsin(λ/2d)) / (λ/d) − 1`` (positive: the small-angle form
        places the reflection too close to the centre).

    Notes
    -----
    With ``sin θ = λ/2d`` the exact radius is ``L·tan 2θ`` and the small-angle
    one ``L·λ/d = 2L sin θ``; the ratio is ``1 + (3/2)θ² + O(θ⁴)``.

    Examples
    --------
    >>> float(calculate_small_angle_error_array(0.8, 100)) > 5e-4
    True
    """
    d = np.asarray(d_A, dtype=float)
    if np.any(~np.isfinite(d)) or np.any(d <= 0):
        raise InputError(f"d_A must be positive spacings in Å, got {d_A!r}")
    lam = calculate_wavelength_A(voltage_kv)
    x = lam / (2 * d)
    if np.any(x >= 1):
        raise InputError(f"d_A must exceed λ/2 = {lam / 2:.4g} Å at {voltage_kv} kV, got {d_A!r}")
    return np.tan(2 * np.arcsin(x)) / (2 * x) - 1
