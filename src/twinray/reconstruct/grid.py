"""Default image grids for reconstruction.

The transaxial field of view of a sinogram is the circle of radius
``max |radial_positions_mm|``: no LOR passes outside it. The default square
grid covers that circle with voxels the size of the radial spacing at the
centre (half a crystal pitch for a ring scanner, its natural sampling), an
odd matrix so that one voxel is centred on the scanner axis. Slices sit at
the planes' z (the rebinned planes for 3-D data).
"""

from __future__ import annotations

import math

import numpy as np

from ..errors import TwinrayInputError
from ..projectors import ImageGrid, image_grid


def transaxial_fov_radius_mm(radial_positions_mm) -> float:
    """Radius of the transaxial field of view, mm."""
    return float(np.max(np.abs(np.asarray(radial_positions_mm, dtype=np.float64))))


def centre_radial_spacing_mm(radial_positions_mm) -> float:
    """Distance between the radial positions nearest the centre, mm.

    For ``s_m = R*sin(pi*m/N)`` this is the largest spacing (``~pi*R/N``,
    half a crystal pitch); the spacing shrinks towards the edge.
    """
    s = np.sort(np.asarray(radial_positions_mm, dtype=np.float64))
    if len(s) < 2:
        raise TwinrayInputError("a sinogram needs at least two radial bins to reconstruct")
    k = int(np.argmin(np.abs(s)))
    k = min(max(k, 0), len(s) - 2)
    return float(s[k + 1] - s[k])


def reconstruction_grid(radial_positions_mm, slice_z_mm, matrix: int | None = None,
                        voxel_mm: float | None = None) -> ImageGrid:
    """The image grid for ``--matrix`` / ``--voxel-mm`` (either, both or neither).

    Parameters
    ----------
    radial_positions_mm : array
    slice_z_mm : array
        Slice centres (evenly spaced).
    matrix : int, optional
        Voxels along x and y. Default: enough to cover the field of view.
    voxel_mm : float, optional
        Transaxial voxel size, mm. Default: field-of-view diameter / matrix
        when ``matrix`` is given, else the centre radial spacing.

    Returns
    -------
    ImageGrid
    """
    fov = 2.0 * transaxial_fov_radius_mm(radial_positions_mm)
    if matrix is not None and matrix < 1:
        raise TwinrayInputError(f"--matrix must be a positive number of voxels, got {matrix}")
    if voxel_mm is not None and not (voxel_mm > 0):
        raise TwinrayInputError(f"--voxel-mm must be positive, got {voxel_mm}")
    if voxel_mm is None:
        voxel_mm = fov / matrix if matrix is not None else centre_radial_spacing_mm(radial_positions_mm)
    if matrix is None:
        matrix = int(math.ceil(fov / voxel_mm - 1e-9))
        matrix += 1 - matrix % 2
    return image_grid(matrix, matrix, float(voxel_mm), slice_z_mm)
