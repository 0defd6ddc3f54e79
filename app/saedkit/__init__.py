"""saedkit: measure, calibrate and index selected-area electron diffraction patterns.

The package is cheap to import: the computation lives in :mod:`saedkit.core`,
the exports in :mod:`saedkit.report` (matplotlib imported lazily), the desktop
program in :mod:`saedkit.gui` (the only place that imports Qt).
"""

__version__ = "0.1.0"
__all__ = ["__version__"]
