"""Pure computation for saedkit: numpy in, numbers and dataclasses out.

No Qt, no plotting, no printing. Import submodules directly, e.g.
``from saedkit.core.optics import calculate_wavelength_A``.
"""

from saedkit.core.errors import (
    CrystalError,
    FitError,
    ImageReadError,
    InputError,
    LibraryError,
    SaedkitError,
)

__all__ = [
    "SaedkitError",
    "InputError",
    "ImageReadError",
    "CrystalError",
    "FitError",
    "LibraryError",
]
