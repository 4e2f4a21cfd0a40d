"""Arc correction: from the scanner's radial positions to a uniform grid.

A ring scanner samples the radial coordinate at ``s_m = R*sin(pi*m/N)``
(DEVELOPERS.md): spacing about ``pi*R/N`` at the centre, closer towards the edge.
Filtered back projection needs uniform samples, so every projection is
linearly interpolated onto ``s_k = k*tau`` with ``tau`` the spacing at the
centre (common practice).
"""

from __future__ import annotations

import numpy as np

from ..errors import TwinrayInputError
from .grid import centre_radial_spacing_mm


def uniform_radial_grid(radial_positions_mm, spacing_mm: float | None = None) -> np.ndarray:
    """Uniform positions ``k*tau`` (symmetric about 0) covering the measured range.

    Parameters
    ----------
    radial_positions_mm : array, increasing
    spacing_mm : float, optional
        Default: the spacing at the centre (the largest for a ring scanner,
        so no more samples are made than measured near the centre).
    """
    s = np.asarray(radial_positions_mm, dtype=np.float64)
    if s.size < 2 or np.any(np.diff(s) <= 0):
        raise TwinrayInputError("radial positions must be at least two increasing values")
    tau = centre_radial_spacing_mm(s) if spacing_mm is None else float(spacing_mm)
    if tau <= 0:
        raise TwinrayInputError(f"radial spacing must be positive, got {tau}")
    k_max = int(np.floor(min(-s[0], s[-1]) / tau + 1e-9))
    return np.arange(-k_max, k_max + 1) * tau


def arc_correct(sinogram: np.ndarray, radial_positions_mm, spacing_mm: float | None = None):
    """Interpolate the last axis of a sinogram onto a uniform radial grid.

    Parameters
    ----------
    sinogram : ndarray, shape (..., radial)
    radial_positions_mm : array, shape (radial,), increasing
    spacing_mm : float, optional

    Returns
    -------
    uniform : ndarray of float64, shape (..., len(grid))
    grid_mm : ndarray
        The uniform radial positions, mm.
    """
    s = np.asarray(radial_positions_mm, dtype=np.float64)
    grid = uniform_radial_grid(s, spacing_mm)
    idx = np.clip(np.searchsorted(s, grid, side="right") - 1, 0, len(s) - 2)
    w = (grid - s[idx]) / (s[idx + 1] - s[idx])
    data = np.asarray(sinogram, dtype=np.float64)
    uniform = data[..., idx] * (1.0 - w) + data[..., idx + 1] * w
    return uniform, grid
