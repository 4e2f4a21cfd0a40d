"""Filtered back projection, 2-D per plane.

For every plane: arc-correct the projections to uniform radial sampling
(``arc.py``), filter them with the apodized ramp built from the spatial
kernel of Kak & Slaney (``filters.py``, zero padded), and back project with
linear interpolation::

    f(x, y) = (pi / K) * sum_k Q_k(x cos(phi_k) + y sin(phi_k))

for K views evenly spread over [0, pi). 3-D data are first rebinned by SSRB
(``rebin.ssrb_average``: the planes that share an axial mid-point are
averaged, because each is an estimate of the same line integral).

References
----------
A. C. Kak and M. Slaney, *Principles of Computerized Tomographic Imaging*,
IEEE Press 1988, ch. 3 (filtered back projection for parallel projections).
M. E. Daube-Witherspoon and G. Muehllehner, J Nucl Med 28(11):1717-1724,
1987 (SSRB).
"""

from __future__ import annotations

import numpy as np

from ..errors import TwinrayInputError
from ..projectors import ImageGrid
from . import _fbp_kernels
from .arc import arc_correct
from .filters import filter_projections
from .rebin import ssrb_average


def check_views_cover_half_turn(view_angles_rad) -> None:
    """FBP needs K views evenly spaced over a half turn."""
    phi = np.asarray(view_angles_rad, dtype=np.float64)
    if len(phi) < 2:
        raise TwinrayInputError("FBP needs at least two views")
    step = np.diff(phi)
    if not (np.allclose(step, step[0], rtol=1e-4, atol=1e-9) and abs(step[0] * len(phi) - np.pi) < 1e-3 * np.pi):
        raise TwinrayInputError("FBP needs views evenly spaced over 180 degrees; "
                                "the file's view_angles_rad are not")


def fbp_uniform(sinogram: np.ndarray, view_angles_rad, first_radial_mm: float, radial_spacing_mm: float,
                grid: ImageGrid, filter_name: str = "ramp", cutoff: float = 1.0) -> np.ndarray:
    """FBP of uniformly sampled parallel projections, one image slice per plane.

    Parameters
    ----------
    sinogram : ndarray, shape (planes, views, radial)
        Line integrals at ``s_k = first_radial_mm + k*radial_spacing_mm``
        (mm times the image unit).
    view_angles_rad : array, shape (views,)
        Evenly spaced over [0, pi) (any start).
    first_radial_mm, radial_spacing_mm : float
    grid : ImageGrid
        ``grid.nz`` must equal the number of planes.
    filter_name, cutoff
        Apodization window and its cutoff (fraction of Nyquist).

    Returns
    -------
    ndarray of float64, shape (planes, ny, nx)
        The image, in the unit of the line integrals per mm; 0 outside the
        circle of radius ``max |s|`` that the projections cover.

    References
    ----------
    Kak & Slaney (1988), ch. 3.
    """
    sino = np.asarray(sinogram, dtype=np.float64)
    if sino.ndim != 3:
        raise TwinrayInputError(f"sinogram must be (plane, view, radial), got shape {sino.shape}")
    if grid.nz != sino.shape[0]:
        raise TwinrayInputError(f"image grid has {grid.nz} slices for {sino.shape[0]} planes")
    check_views_cover_half_turn(view_angles_rad)
    filtered = np.ascontiguousarray(filter_projections(sino, radial_spacing_mm, filter_name, cutoff))
    phi = np.asarray(view_angles_rad, dtype=np.float64)
    out = np.empty(grid.shape, dtype=np.float64)
    n = sino.shape[-1]
    fov = max(abs(first_radial_mm), abs(first_radial_mm + (n - 1) * radial_spacing_mm))
    _fbp_kernels.backproject_filtered(filtered, np.cos(phi), np.sin(phi), float(first_radial_mm),
                                      float(radial_spacing_mm), grid.x_mm(), grid.y_mm(),
                                      np.pi / len(phi), float(fov), out)
    return out


def fbp(sinogram: np.ndarray, view_angles_rad, radial_positions_mm, plane_z_mm, grid: ImageGrid,
        filter_name: str = "ramp", cutoff: float = 1.0) -> np.ndarray:
    """FBP of a stored (possibly 3-D, not arc-corrected) sinogram.

    Parameters
    ----------
    sinogram : ndarray, shape (planes, views, radial)
        Line integrals (e.g. corrected data divided by ``T*k``, see
        ``units.py``), at the scanner's radial positions.
    view_angles_rad, radial_positions_mm, plane_z_mm : arrays
        From the sinogram file.
    grid : ImageGrid
        Slices at the distinct ``plane_z_mm`` (after SSRB).

    Returns
    -------
    ndarray of float64, shape (nz, ny, nx)
    """
    rebinned, z = ssrb_average(sinogram, plane_z_mm)
    if len(z) != grid.nz or not np.allclose(z, grid.slice_z_mm, atol=1e-6):
        raise TwinrayInputError("image slices must sit at the rebinned planes' z")
    uniform, s_grid = arc_correct(rebinned, radial_positions_mm)
    tau = float(s_grid[1] - s_grid[0])
    return fbp_uniform(uniform, view_angles_rad, float(s_grid[0]), tau, grid, filter_name, cutoff)
