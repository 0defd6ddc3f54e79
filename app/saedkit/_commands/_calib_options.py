"""The calibration options shared by the commands that convert distances to spacings.

Every command that takes ``--camera-constant K`` also takes
``--calibration NAME|FILE`` (a calibration saved in the library, or a JSON
file holding one); the two exclude each other.
"""

from __future__ import annotations

import argparse
import math

from saedkit._commands._common import positive_float

__all__ = ["add_calibration_options", "resolve_calibration_options", "calibration_source_record"]

ENTERED = "entered on the command line"


def _non_negative_float(text: str) -> float:
    try:
        v = float(text)
    except ValueError:
        raise argparse.ArgumentTypeError(f"must be a number, got {text!r}") from None
    if not math.isfinite(v) or v < 0:
        raise argparse.ArgumentTypeError(f"must be a number >= 0, got {text!r}")
    return v


def add_calibration_options(parser: argparse.ArgumentParser, *, required: bool = False) -> None:
    """Add ``--camera-constant K`` | ``--calibration NAME|FILE`` (mutually exclusive) and ``--camera-constant-sigma``.

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
        help="standard uncertainty of --camera-constant in pixel·Å (default 0)",
    )


def resolve_calibration_options(args):
    """``(K, K_sigma, Ellipse, source)`` from the parsed options, or None when neither was given.

    ``source`` is the :class:`~saedkit.core.calibration.library.SavedCalibration`
    for ``--calibration`` and the text ``"entered on the command line"`` for
    ``--camera-constant``.

    Raises
    ------
    LibraryError
        When the named calibration is not saved or the file is not a calibration.
    InputError
        When ``--camera-constant-sigma`` comes without ``--camera-constant``.
    """
    from saedkit.core.distortion import NO_DISTORTION
    from saedkit.core.errors import InputError

    K = getattr(args, "camera_constant", None)
    name = getattr(args, "calibration", None)
    sigma = getattr(args, "camera_constant_sigma", None)
    if sigma is not None and K is None:
        raise InputError("--camera-constant-sigma needs --camera-constant")
    if K is not None:
        return float(K), float(sigma or 0.0), NO_DISTORTION, ENTERED
    if name:
        from saedkit.core.calibration.library import resolve_calibration

        cal = resolve_calibration(name)
        return float(cal.camera_constant_px_A), float(cal.camera_constant_sigma_px_A), cal.ellipse, cal
    return None


def calibration_source_record(resolved) -> dict | None:
    """The ``calibration`` entry of a record: where K came from, K, σ_K and the ellipse."""
    if resolved is None:
        return None
    K, sK, ellipse, source = resolved
    rec = {
        "source": "camera constant" if source == ENTERED else "library",
        "camera_constant_px_A": K,
        "camera_constant_sigma_px_A": sK,
        "camera_constant_rel_sigma": sK / K,
        "ellipse": ellipse.to_dict(),
    }
    if source != ENTERED:
        rec.update({"name": source.name, "date": source.date, "standard": source.standard,
                    "voltage_kv": source.voltage_kv, "binning": source.binning,
                    "nominal_camera_length_mm": source.nominal_camera_length_mm})
    return rec
