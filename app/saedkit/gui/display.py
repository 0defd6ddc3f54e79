"""The display mapping, as the window imports it: it lives in :mod:`saedkit.core.presentation.display`, shared with the report."""

from saedkit.core.presentation.display import *  # noqa: F401,F403
from saedkit.core.presentation.display import __all__, _pool  # noqa: F401
