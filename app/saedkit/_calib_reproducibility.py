"""Which reproducibility term a new calibration carries, and why (shared by the CLI and the GUI)."""

from __future__ import annotations

__all__ = ["choose_reproducibility"]


def choose_reproducibility(given: float | None, library, *, voltage_kv: float,
                           nominal_camera_length_mm: float | None, binning: int | None = None
                           ) -> tuple[float, str]:
    """``(reproducibility_pct, basis)``: the value given, else the library's history estimate, else the default.

    Parameters
    ----------
    given : float or None
        A value the user set (%).
    library : CalibrationLibrary
        Its earlier calibrations of the same voltage, camera length and binning
        give the estimate (3 or more needed).
    """
    from saedkit.core.calibration.camera import DEFAULT_REPRODUCIBILITY_PCT, check_reproducibility_pct
    from saedkit.core.calibration.library import estimate_reproducibility_pct

    if given is not None:
        return check_reproducibility_pct(given, name="--reproducibility-pct"), "given"
    from saedkit.core.errors import LibraryError

    try:
        history = library.history(voltage_kv=voltage_kv, nominal_camera_length_mm=nominal_camera_length_mm,
                                  binning=binning)
    except LibraryError:  # an unreadable library gives no history; saving says so
        history = []
    est = estimate_reproducibility_pct(history)
    if est is not None:
        return est, f"estimated from {len(history)} earlier calibrations of this setting"
    return DEFAULT_REPRODUCIBILITY_PCT, "default (common practice without an internal standard)"
