"""One analysis of one pattern, as a frozen record: what the report and the JSON output show.

The GUI's :class:`~saedkit.core.workflow.session.Session` (mutable, with undo) and the
command line both produce an :class:`Analysis`; the exports in
:mod:`saedkit.report` and ``--json`` only read it. ``to_dict()`` gives the
machine-readable record documented in the README.
"""

from __future__ import annotations

import datetime as _dt
import math
from dataclasses import dataclass, field
from typing import Any

from saedkit import __version__

__all__ = ["Analysis", "candidate_camera", "measure_candidates"]


def candidate_camera(candidate):
    """The camera model of a zone candidate's refined K (for uncalibrated matches)."""
    from saedkit.core.calibration.camera import EnteredCalibration

    sig = candidate.camera_constant_sigma_px_A
    return EnteredCalibration(candidate.camera_constant_px_A, sig if sig == sig else 0.0,
                              name=f"refined by the zone-axis match ({candidate.phase})",
                              reproducibility_pct=0.0, source="match")


def measure_candidates(match, spots, centre, calibration=None):
    """The match with every candidate's spot spacings from :func:`~saedkit.core.measure.measure_positions`.

    Each candidate's spots are measured about ``centre`` with the detected
    spots' position uncertainties (a candidate spot with no detected spot
    within 0.5 px counts as exact) and the calibration's camera model — the
    candidate's refined K only when there is no calibration — so that they
    agree with the record's ``spots`` and every table. The spacing error of
    an indexed spot is recomputed against its predicted spacing.
    """
    import dataclasses

    import numpy as np

    from saedkit.core.measure import measure_positions

    if match is None or not match.candidates or centre is None:
        return match
    xy = np.array([[s.x, s.y] for s in spots], float).reshape(-1, 2)
    sig = np.array([[s.sigma_x, s.sigma_y] for s in spots], float).reshape(-1, 2)
    out = []
    for cand in match.candidates:
        if not cand.spots:
            out.append(cand)
            continue
        camera = calibration if calibration is not None else candidate_camera(cand)
        cxy = np.array([[s.x, s.y] for s in cand.spots], float).reshape(-1, 2)
        csig = np.zeros_like(cxy)
        if len(xy):
            dist = np.hypot(cxy[:, None, 0] - xy[None, :, 0], cxy[:, None, 1] - xy[None, :, 1])
            j = np.argmin(dist, axis=1)
            near = dist[np.arange(len(cxy)), j] < 0.5
            cxy[near] = xy[j[near]]
            csig[near] = sig[j[near]]
        m = measure_positions(cxy, csig, centre.xy, [centre.sigma_x, centre.sigma_y], camera)
        new_spots = []
        for i, s in enumerate(cand.spots):
            d = float(m.d_A[i])
            err = s.d_error_pct
            if err is not None and math.isfinite(err) and math.isfinite(s.d_A) and s.d_A > 0:
                d_pred = s.d_A / (1 + err / 100.0)  # the predicted spacing behind the matcher's error
                err = (d - d_pred) / d_pred * 100.0
            new_spots.append(dataclasses.replace(
                s, d_A=d, d_sigma_A=float(m.d_sigma_A[i]), d_stat_sigma_A=float(m.d_stat_sigma_A[i]),
                d_sys_sigma_A=float(m.d_sys_sigma_A[i]), d_error_pct=err))
        out.append(dataclasses.replace(cand, spots=tuple(new_spots)))
    return dataclasses.replace(match, candidates=tuple(out))


def _maybe(obj) -> Any:
    return None if obj is None else obj.to_dict()


@dataclass(frozen=True)
class Analysis:
    """Everything measured on one pattern.

    Parameters
    ----------
    image : PatternImage, optional
        The pattern (data, mask and metadata).
    centre : CentreResult, optional
    spots : tuple of Spot
        Detected and hand-placed spots.
    ring_fit : RingFit, optional
        Rings, ellipse and radial profile of a ring pattern.
    calibration : Calibration or SavedCalibration, optional
        The camera constant used (fitted here, or applied from the library).
    match : MatchResult, optional
        Ranked zone-axis candidates.
    chosen_candidate : int
        Index into ``match.candidates`` of the candidate shown (0 = best).
    phase_id : PhaseIdentification, optional
        Phases ranked against a ring pattern.
    parameters : dict
        Every parameter of the run (tolerances, voltage, options), for reproduction.
    """

    image: Any = None
    centre: Any = None
    spots: tuple = ()
    ring_fit: Any = None
    calibration: Any = None
    match: Any = None
    chosen_candidate: int = 0
    phase_id: Any = None
    parameters: dict = field(default_factory=dict)
    created: str = field(default_factory=lambda: _dt.datetime.now(_dt.timezone.utc).isoformat(timespec="seconds"))

    def __post_init__(self) -> None:
        # one measurement for every number: the candidates' spots are measured like the record's spots
        if self.match is not None and self.centre is not None:
            object.__setattr__(self, "match",
                               measure_candidates(self.match, self.spots, self.centre, self.calibration))

    @property
    def candidate(self):
        """The chosen zone-axis candidate, or None."""
        if self.match is None or not self.match.candidates:
            return None
        i = min(max(self.chosen_candidate, 0), len(self.match.candidates) - 1)
        return self.match.candidates[i]

    @property
    def camera(self):
        """The camera model the spot and ring spacings use, or None.

        The calibration (fitted here, saved, or typed in) when there is one;
        otherwise the chosen candidate's camera constant as refined by the
        zone-axis match (``source == "match"``, no ellipse, no reproducibility
        term: it is fitted to the phase, not measured).
        """
        if self.calibration is not None:
            return self.calibration
        cand = self.candidate
        if cand is None:
            return None
        return candidate_camera(cand)

    def measure_spots(self):
        """:class:`~saedkit.core.measure.Measurements` of the spots about the centre with :attr:`camera`."""
        from saedkit.core.measure import measure_positions

        xy = [[s.x, s.y] for s in self.spots]
        sig = [[s.sigma_x, s.sigma_y] for s in self.spots]
        c = self.centre
        if c is None:
            return measure_positions(xy, sig, None, None, self.camera)
        return measure_positions(xy, sig, c.xy, [c.sigma_x, c.sigma_y], self.camera)

    def _spot_records(self) -> list[dict]:
        """Spots with their radius from the centre (ellipse-corrected) and, when K is known, d ± σ."""
        recs = [s.to_dict() for s in self.spots]
        if self.centre is None:
            return recs
        m = self.measure_spots()
        for i, rec in enumerate(recs):
            row = m.row(i)
            rec["radius_px"] = row["radius_px"]
            rec["radius_sigma_px"] = row["radius_sigma_px"]
            rec["angle_deg"] = row["angle_deg"]
            if m.camera is not None and row["d_A"] is not None:
                for k in ("d_A", "d_sigma_A", "d_stat_sigma_A", "d_sys_sigma_A", "g_per_nm", "g_sigma_per_nm",
                          "g_stat_sigma_per_nm", "g_sys_sigma_per_nm"):
                    rec[k] = row[k]
        return recs

    def to_dict(self) -> dict:
        """The JSON record (schema in the README)."""
        rec: dict[str, Any] = {
            "software": {"name": "saedkit", "version": __version__},
            "created": self.created,
            "image": _maybe(self.image),
            "parameters": dict(self.parameters),
        }
        if self.centre is not None:
            c = self.centre.to_dict()
            rec["centre_px"] = c["centre_px"]
            rec["centre_sigma_px"] = c["centre_sigma_px"]
            rec["centre_method"] = c.get("method")
        if self.ring_fit is not None:
            rec["ring_fit"] = self.ring_fit.to_dict()
        if self.calibration is not None:
            rec["calibration"] = self.calibration.to_dict()
        camera = self.camera
        if camera is not None:
            from saedkit.core.calibration.camera import camera_terms

            rec["camera"] = camera_terms(camera).to_dict()
        if self.spots:
            rec["spots"] = self._spot_records()
        if self.match is not None:
            rec["match"] = self.match.to_dict()
            # the candidates stand at the top level of the record (README schema), once
            rec["candidates"] = rec["match"].pop("candidates", [])
            from saedkit.core.calibration.camera import camera_terms

            for cand, crec in zip(self.match.candidates, rec["candidates"]):
                # which K the candidate's spot spacings used (its refined K stands beside it)
                crec["spots_camera"] = camera_terms(self.calibration if self.calibration is not None
                                                    else candidate_camera(cand)).to_dict()
            rec["chosen_candidate"] = self.chosen_candidate
        if self.phase_id is not None:
            rec["phase_identification"] = self.phase_id.to_dict()
        return rec
