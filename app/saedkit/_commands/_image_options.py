"""Options shared by the commands that look at one image (spots, index, rings, report): a known
centre and a mask of the user's own."""

from __future__ import annotations

import argparse
import math

__all__ = ["add_image_options", "resolve_centre", "resolve_mask"]


def _finite(text: str) -> float:
    try:
        v = float(text)
    except ValueError:
        raise argparse.ArgumentTypeError(f"must be a number, got {text!r}") from None
    if not math.isfinite(v):
        raise argparse.ArgumentTypeError(f"must be a finite number, got {text!r}")
    return v


def add_image_options(parser: argparse.ArgumentParser, *, centre_is_guess: bool = False) -> None:
    """Add ``--centre X Y`` and ``--mask FILE``."""
    what = ("a first guess of the pattern centre for the ring fit, pixels (x = column, y = row)" if centre_is_guess
            else "the pattern centre in pixels (x = column, y = row), instead of finding it")
    parser.add_argument("--centre", nargs=2, type=_finite, metavar=("X", "Y"), help=what)
    parser.add_argument("--mask", metavar="FILE",
                        help="pixels to exclude: an image of the same shape (TIFF, PNG, NPY), non-zero = excluded; "
                        "added to the automatic mask (detector gaps, hot pixels, saturated beam, beam stop)")


def resolve_centre(args, image):
    """``--centre`` as ``[x, y]``, checked to lie on the image, or None."""
    from saedkit.core.errors import InputError

    c = getattr(args, "centre", None)
    if c is None:
        return None
    rows, cols = image.data.shape
    x, y = float(c[0]), float(c[1])
    if not (-0.5 <= x <= cols - 0.5 and -0.5 <= y <= rows - 0.5):
        raise InputError(f"--centre {x:g} {y:g} lies outside the image {args.image} "
                         f"({cols} columns x {rows} rows: x in [0, {cols - 1}], y in [0, {rows - 1}])")
    return [x, y]


def _read_mask_file(path: str):
    """The pixels of a mask image (TIFF, NPY, PNG/JPEG/BMP), as an array; colour images
    are reduced to their largest channel (an alpha channel is ignored)."""
    from pathlib import Path

    import numpy as np

    from saedkit.core.errors import InputError

    p = Path(path)
    if not p.is_file():
        raise InputError(f"--mask {path}: file not found")
    suffix = p.suffix.lower()
    try:
        if suffix == ".npy":
            m = np.load(p, allow_pickle=False)
        elif suffix in (".tif", ".tiff"):
            import tifffile

            m = tifffile.imread(p)
        elif suffix in (".png", ".jpg", ".jpeg", ".bmp"):
            from PIL import Image

            with Image.open(p) as im:
                m = np.asarray(im)
            if m.ndim == 3:
                m = m[..., : 3 if m.shape[2] >= 3 else 1].max(axis=2)
        else:
            raise InputError(f"--mask {path}: expected a .tif, .tiff, .npy, .png, .jpg or .bmp file, got {suffix!r}")
    except InputError:
        raise
    except Exception as exc:  # a damaged or foreign file: one clear line
        raise InputError(f"--mask {path}: cannot be read as a mask image ({type(exc).__name__}: {exc})") from None
    m = np.asarray(m)
    if m.dtype.kind not in "biuf":
        raise InputError(f"--mask {path}: expected numbers (non-zero = excluded), got dtype {m.dtype}")
    return m


def resolve_mask(args, image):
    """The full mask for the analysis when ``--mask`` is given (the file's non-zero pixels, the image's
    own mask and the automatic mask), else None (each command then builds its default)."""
    import numpy as np

    from saedkit.core.detection.masks import find_auto_mask
    from saedkit.core.errors import InputError

    path = getattr(args, "mask", None)
    if path is None:
        return None
    m = _read_mask_file(path)
    if m.ndim != 2:
        raise InputError(f"--mask {path}: expected a 2-D image, got shape {m.shape}")
    if m.shape != image.data.shape:
        raise InputError(f"--mask {path} has shape {m.shape[0]} x {m.shape[1]} (rows x columns); "
                         f"the image {args.image} has {image.data.shape[0]} x {image.data.shape[1]}")
    user = np.isfinite(m) & (m != 0) if m.dtype.kind == "f" else m != 0
    if user.all():
        raise InputError(f"--mask {path} excludes every pixel of the image")
    centre = resolve_centre(args, image)
    auto = find_auto_mask(image.data, centre_xy=centre, saturation_value=image.saturation_value)
    return user | np.asarray(image.mask, bool) | auto
