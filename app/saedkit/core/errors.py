"""The error types of saedkit.

Every expected failure (bad input, a file that cannot be read, a fit that
cannot be made) raises a :class:`SaedkitError` or one of its subclasses, with a
message that names the value or file and the problem. Anything else is a bug.
"""

from __future__ import annotations

__all__ = [
    "SaedkitError",
    "InputError",
    "ImageReadError",
    "CrystalError",
    "FitError",
    "LibraryError",
]


class SaedkitError(Exception):
    """Base class of every expected failure in saedkit."""


class InputError(SaedkitError, ValueError):
    """An argument has a value the function cannot use."""


class ImageReadError(SaedkitError):
    """An image file cannot be read (missing, corrupt, unknown type, bad pixels)."""


class CrystalError(SaedkitError):
    """A phase, cell, space group, site or CIF is invalid."""


class FitError(SaedkitError):
    """A fit or search could not produce a result (too few points, no match)."""


class LibraryError(SaedkitError):
    """The calibration or phase library cannot be read or written."""
