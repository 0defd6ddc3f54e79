"""The calibration options shared by the commands that convert distances to spacings.

Every command that takes ``--camera-constant K`` also takes
``--calibration NAME|FILE`` (a calibration saved in the library, or a JSON
file holding one); the two exclude each other.
"""

from __future__ import annotations

import argparse
import math

from saedkit._commands._common import positive_float

__all__ = ["add_calibration_options", "add_reproducibility_option", "resolve_calibration_options",
           "calibration_source_record", "describe_camera"]

ENTERED = "entered on the command line"


def _non_negative_float(text: str) -> float:
    try:
        v = float(text)
    except ValueError:
        raise argparse.ArgumentTypeError(f"must be a number, got {text!r}") from None
    if not math.isfinite(v) or v < 0:
        raise argparse.ArgumentTypeError(f"must be a number >= 0, got {text!r}")
    return v


def add_reproducibility_option(parser: argparse.ArgumentParser, *, what: str) -> None:
    """Add ``--reproducibility-pct R``: the systematic relative uncertainty of K, in %."""
    from saedkit.core.calibration.camera import DEFAULT_REPRODUCIBILITY_PCT

    parser.add_argument(
        "--reproducibility-pct", type=_non_negative_float, metavar="R", default=None,
        help=f"reproducibility of K between calibration and measurement (specimen height, lens hysteresis, "
        f"refocusing), in %% of K, {what} (default {DEFAULT_REPRODUCIBILITY_PCT:g} %%, common practice "
        "without an internal standard); it adds a systematic part to every d, |g| and camera length",
    )


def add_calibration_options(parser: argparse.ArgumentParser, *, required: bool = False) -> None:
    """Add ``--camera-constant K`` | ``--calibration NAME|FILE`` (mutually exclusive), ``--camera-constant-sigma``
    and ``--reproducibility-pct``.

    Parameters
    ----------
    parser : argparse.ArgumentParser
    required : bool
        Make one of the two compulsory.
    """
    group = parser.add_mutually_exclusive_group(required=required)
    group.add_argument(
        "--camera-constant", type=positive_float, metavar="K",
        help="camera constant K in pixel·Å (R = K/d), typed in; no ellipse correction",
    )
    group.add_argument(
        "--calibration", metavar="NAME|FILE",
        help="a calibration saved with `saedkit calibrate --save NAME` (see `saedkit calibrations`), "
        "or a JSON file holding one; supplies K, its uncertainty and the ellipse correction",
    )
    parser.add_argument(
        "--camera-constant-sigma", type=_non_negative_float, metavar="S", default=None,
        help="statistical standard uncertainty of --camera-constant in pixel·Å (default 0)",
    )
    add_reproducibility_option(parser, what="overriding the saved calibration's value")


def resolve_calibration_options(args, *, voltage_kv: float | None = None):
    """The camera model of the parsed options (the edge), or None when neither option was given.

    ``--calibration`` gives the
    :class:`~saedkit.core.calibration.library.SavedCalibration`,
    ``--camera-constant`` an
    :class:`~saedkit.core.calibration.camera.EnteredCalibration`; either with
    ``--reproducibility-pct`` applied.

    Raises
    ------
    LibraryError
        When the named calibration is not saved or the file is not a calibration.
    InputError
        When ``--camera-constant-sigma`` comes without ``--camera-constant``, or
        ``--reproducibility-pct`` without either.
    """
    from saedkit.core.errors import InputError
    from saedkit.core.workflow.pipeline import as_camera

    K = getattr(args, "camera_constant", None)
    name = getattr(args, "calibration", None)
    sigma = getattr(args, "camera_constant_sigma", None)
    rep = getattr(args, "reproducibility_pct", None)
    if sigma is not None and K is None:
        raise InputError("--camera-constant-sigma needs --camera-constant")
    cal = None
    if name:
        from saedkit.core.calibration.library import resolve_calibration

        cal = resolve_calibration(name)
    if cal is None and K is None:
        if rep is not None:
            raise InputError("--reproducibility-pct needs --camera-constant or --calibration")
        return None
    camera = as_camera(cal, camera_constant_px_A=K, camera_constant_sigma_px_A=sigma, reproducibility_pct=rep,
                       voltage_kv=voltage_kv)
    if K is not None:
        import dataclasses

        camera = dataclasses.replace(camera, name=ENTERED)
    return camera


def calibration_source_record(camera) -> dict | None:
    """The ``calibration`` entry of a record: the camera model's own record (None without one)."""
    return None if camera is None else camera.to_dict()


def describe_camera(camera) -> str:
    """One line: K ± total σ (statistical, systematic) and where it came from."""
    from saedkit.core.calibration.camera import camera_terms

    t = camera_terms(camera)
    src = "entered" if t.source == "entered" else f"calibration {t.name!r}" if t.name else t.source
    return (f"K = {t.camera_constant_px_A:.3f} ± {t.total_sigma_px_A:.2g} px·Å ({src}; statistical "
            f"{t.stat_sigma_px_A:.2g}, reproducibility {t.reproducibility_pct:g} % = {t.sys_sigma_px_A:.2g})")
