"""One analysis of one pattern, as a frozen record: what the report and the JSON output show.

The GUI's :class:`~saedkit.core.workflow.session.Session` (mutable, with undo) and the
command line both produce an :class:`Analysis`; the exports in
:mod:`saedkit.report` and ``--json`` only read it. ``to_dict()`` gives the
machine-readable record documented in the README.
"""

from __future__ import annotations

import datetime as _dt
from dataclasses import dataclass, field
from typing import Any

from saedkit import __version__

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

    def _camera_source(self):
        """What turns spot radii into d: the calibration, else the chosen candidate's K (no ellipse)."""
        if self.calibration is not None:
            return self.calibration
        cand = self.candidate
        if cand is None:
            return None
        from types import SimpleNamespace

        from saedkit.core.distortion import NO_DISTORTION

        return SimpleNamespace(camera_constant_px_A=cand.camera_constant_px_A,
                               camera_constant_sigma_px_A=cand.camera_constant_sigma_px_A, ellipse=NO_DISTORTION)

    def _spot_records(self) -> list[dict]:
        """Spots with their radius from the centre (ellipse-corrected) and, when K is known, d ± σ."""
        import numpy as np

        from saedkit.core.calibration.calibrate import calculate_corrected_radius_array, calculate_d_from_offset_array, calculate_d_sigma_array
        from saedkit.core.distortion import NO_DISTORTION

        recs = [s.to_dict() for s in self.spots]
        if self.centre is None:
            return recs
        source = self._camera_source()
        offsets = np.array([[s.x, s.y] for s in self.spots], float) - self.centre.xy
        R = calculate_corrected_radius_array(offsets, getattr(source, "ellipse", None) or NO_DISTORTION)
        for rec, r in zip(recs, R):
            rec["radius_px"] = float(r)
        if source is not None:
            # each spot's position uncertainty and the centre's, per axis
            sig = np.hypot(np.array([[s.sigma_x, s.sigma_y] for s in self.spots], float),
                           [self.centre.sigma_x, self.centre.sigma_y])
            d = calculate_d_from_offset_array(offsets, source)
            d_sig = calculate_d_sigma_array(offsets, np.nan_to_num(sig), source)
            for rec, r, di, si in zip(recs, R, d, d_sig):
                if r > 0:
                    rec["d_A"] = float(di)
                    rec["d_sigma_A"] = float(si)
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
