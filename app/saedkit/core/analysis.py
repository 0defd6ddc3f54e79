"""One analysis of one pattern, as a frozen record: what the report and the JSON output show.

The GUI's :class:`~saedkit.core.session.Session` (mutable, with undo) and the
command line both produce an :class:`Analysis`; the exports in
:mod:`saedkit.report` and ``--json`` only read it. ``to_dict()`` gives the
machine-readable record documented in the README.
"""

from __future__ import annotations

import datetime as _dt
from dataclasses import dataclass, field
from typing import Any

from .. import __version__

__all__ = ["Analysis"]


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

    @property
    def candidate(self):
        """The chosen zone-axis candidate, or None."""
        if self.match is None or not self.match.candidates:
            return None
        i = min(max(self.chosen_candidate, 0), len(self.match.candidates) - 1)
        return self.match.candidates[i]

    def camera_terms(self) -> tuple[float | None, float, Any]:
        """(K, σ_K, ellipse) for turning spot radii into d: the calibration's, else the chosen candidate's K."""
        from .distortion import NO_DISTORTION

        cal = self.calibration
        if cal is not None:
            return float(cal.camera_constant_px_A), float(cal.camera_constant_sigma_px_A or 0.0), cal.ellipse
        cand = self.candidate
        if cand is not None:
            return float(cand.camera_constant_px_A), float(cand.camera_constant_sigma_px_A or 0.0), NO_DISTORTION
        return None, 0.0, NO_DISTORTION

    def _spot_records(self) -> list[dict]:
        """Spots with their radius from the centre (ellipse-corrected) and, when K is known, d ± σ."""
        import numpy as np

        recs = [s.to_dict() for s in self.spots]
        if self.centre is None:
            return recs
        K, K_sig, ellipse = self.camera_terms()
        xy = np.array([[s.x, s.y] for s in self.spots], float)
        R = np.hypot(*ellipse.correct_array(xy - self.centre.xy).T)
        c_sig = float(np.hypot(self.centre.sigma_x, self.centre.sigma_y)) / np.sqrt(2)
        for rec, s, r in zip(recs, self.spots, R):
            rec["radius_px"] = float(r)
            if K is not None and r > 0:
                s_r = float(np.hypot(np.hypot(s.sigma_x, s.sigma_y) / np.sqrt(2), c_sig))
                d = K / r
                rec["d_A"] = d
                rec["d_sigma_A"] = d * float(np.hypot(s_r / r, K_sig / K))
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
        if self.spots:
            rec["spots"] = self._spot_records()
        if self.match is not None:
            rec["match"] = self.match.to_dict()
            # the candidates stand at the top level of the record (README schema), once
            rec["candidates"] = rec["match"].pop("candidates", [])
            rec["chosen_candidate"] = self.chosen_candidate
        if self.phase_id is not None:
            rec["phase_identification"] = self.phase_id.to_dict()
        return rec
