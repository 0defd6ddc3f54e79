"""The pattern centre (position of the undiffracted beam).

Ways to find it: Friedel symmetry of a spot pattern (the intensity at c + v
equals that at c − v, so the image correlates best with its point reflection
through c; and the midpoints of Friedel pairs g, −g all fall on c); the common
centre of ring ellipses (:mod:`saedkit.core.rings`); or set by hand.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from ._validate import check_finite

__all__ = ["CentreResult", "manual_centre"]


@dataclass(frozen=True)
class CentreResult:
    """A pattern centre with its standard uncertainty.

    Parameters
    ----------
    x, y : float
        Centre in image pixels (x = column, y = row).
    sigma_x, sigma_y : float
        Standard uncertainties, pixels.
    method : str
        How it was found: ``"friedel-correlation"``, ``"friedel-pairs"``,
        ``"rings"`` or ``"manual"``.
    n_used : int
        Number of pairs, rings or points behind the estimate (0 when manual).
    """

    x: float
    y: float
    sigma_x: float
    sigma_y: float
    method: str
    n_used: int = 0

    @property
    def xy(self) -> np.ndarray:
        """The centre as an array ``[x, y]``."""
        return np.array([self.x, self.y])

    def to_dict(self) -> dict:
        """JSON-ready record."""
        return {
            "centre_px": [self.x, self.y],
            "centre_sigma_px": [self.sigma_x, self.sigma_y],
            "method": self.method,
            "n_used": self.n_used,
        }


def manual_centre(x: float, y: float, *, sigma_px: float = 1.0) -> CentreResult:
    """A centre set by hand, e.g. by a click.

    Parameters
    ----------
    x, y : float
        Centre in pixels.
    sigma_px : float
        The uncertainty to carry (a click is good to about a pixel: common practice).
    """
    return CentreResult(
        check_finite("x", x), check_finite("y", y), float(sigma_px), float(sigma_px), "manual", 0
    )
