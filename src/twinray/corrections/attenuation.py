"""Attenuation correction factors from a mu-map, by exact ray tracing.

``acf = exp(integral of mu along the LOR)`` for the nominal LOR of every
(plane, view, radial) bin, oblique planes included: the LOR runs between its
two end points on the detector cylinder, at the plane's axial positions of
end 1 and end 2 (``geometry.axial_endpoints_mm``). The line integral is the
exact radiological path through the voxels (Siddon 1985, see
:mod:`twinray.raytrace`). When a plane holds several ring pairs (span > 1)
the nominal LOR of the plane is used (segment-centre ring difference).

The mu-map must be linear attenuation coefficients at 511 keV in 1/cm in the
scanner frame (data contract section 4). Values that look like Hounsfield
units (negative down to -1000, or above 3/cm) or like 1/mm (water 0.0096)
are refused with a message that says so.

References
----------
R. L. Siddon, Medical Physics 12(2):252-255, 1985.
J. H. Hubbell and S. M. Seltzer, NIST Standard Reference Database 126
(water at 511 keV: 0.096/cm, used in the checks).
"""

from __future__ import annotations

import numpy as np

from ..errors import TwinrayInputError
from ..geometry import SinogramGeometry
from ..raytrace import grid_from_affine
from . import _kernels

#: Highest plausible 511 keV attenuation coefficient, 1/cm (lead is about 1.7).
MU_MAX_PER_CM = 3.0
#: Below this maximum a non-empty map is taken for 1/mm (water would be 0.0096/mm).
MU_MIN_MAX_PER_CM = 0.02
#: Small negative values (interpolation ringing) are clipped to 0, larger ones refused.
MU_NEGATIVE_TOLERANCE = -0.01


def check_mu_map(mu, where: str = "mu-map") -> np.ndarray:
    """Check that a mu-map is in 1/cm at 511 keV and return it as float32 (small negatives -> 0).

    Parameters
    ----------
    mu : ndarray, 3-D (a 4-D image with one volume is accepted)
    where : str
        Name of the file, for messages.

    Returns
    -------
    ndarray of float32, 3-D

    Raises
    ------
    TwinrayInputError
        Wrong dimensions, non-finite values, values that look like
        Hounsfield units or like 1/mm.
    """
    mu = np.asarray(mu)
    if mu.ndim == 4 and mu.shape[3] == 1:
        mu = mu[..., 0]
    if mu.ndim != 3:
        raise TwinrayInputError(f"{where} must be a 3-D image, got shape {mu.shape}")
    if mu.size == 0:
        raise TwinrayInputError(f"{where} is empty")
    if not np.all(np.isfinite(mu)):
        raise TwinrayInputError(f"{where} contains NaN or infinite values")
    lo, hi = float(mu.min()), float(mu.max())
    if lo < -100 or hi > 100:
        raise TwinrayInputError(f"{where} values run from {lo:g} to {hi:g}: these look like Hounsfield units; "
                                "convert to linear attenuation coefficients in 1/cm at 511 keV (water 0.096)")
    if lo < MU_NEGATIVE_TOLERANCE:
        raise TwinrayInputError(f"{where} has negative attenuation coefficients (down to {lo:g}/cm)")
    if hi > MU_MAX_PER_CM:
        raise TwinrayInputError(f"{where} values reach {hi:g}: too high for 1/cm at 511 keV (water 0.096, "
                                f"lead about 1.7); is it in 1/m or another unit?")
    if 0 < hi < MU_MIN_MAX_PER_CM:
        raise TwinrayInputError(f"{where} values reach only {hi:g}: this looks like 1/mm (water 0.0096/mm); "
                                "the mu-map must be in 1/cm (multiply by 10)")
    return np.clip(mu, 0.0, None).astype(np.float32)


def _crop_to_support(mu, origin, voxel):
    """Drop all-zero outer slabs; zero voxels add nothing to a line integral, so the result is exact."""
    nz = np.nonzero(mu)
    if nz[0].size == 0:
        return None, origin, voxel
    lo = [int(ix.min()) for ix in nz]
    hi = [int(ix.max()) + 1 for ix in nz]
    cropped = np.ascontiguousarray(mu[lo[0]:hi[0], lo[1]:hi[1], lo[2]:hi[2]])
    return cropped, origin + np.array(lo) * voxel, voxel


def attenuation_factors(mu_per_cm, affine, geometry: SinogramGeometry) -> np.ndarray:
    """ACF of every sinogram bin, by Siddon ray tracing through the mu-map.

    Parameters
    ----------
    mu_per_cm : ndarray, shape (nx, ny, nz)
        Linear attenuation coefficients at 511 keV, 1/cm (checked with
        :func:`check_mu_map`).
    affine : ndarray, shape (4, 4)
        Voxel index -> scanner-frame mm (axis-aligned).
    geometry : SinogramGeometry

    Returns
    -------
    ndarray of float32, shape ``geometry.shape``
        ``exp(line integral of mu)``, >= 1; 1 where the LOR misses the map.

    References
    ----------
    R. L. Siddon, Medical Physics 12(2):252-255, 1985.
    """
    mu = check_mu_map(mu_per_cm)
    grid, origin, voxel = grid_from_affine(mu, affine)
    grid, origin, voxel = _crop_to_support(grid, origin, voxel)
    if grid is None:
        return np.ones(geometry.shape, np.float32)
    trans = np.ascontiguousarray(geometry.transaxial_endpoints_mm(), np.float64)
    axial = np.ascontiguousarray(geometry.axial_endpoints_mm(), np.float64)
    acf = np.empty(geometry.shape, np.float32)
    # LORs run mostly transaxially: store the map as [iz, iy, ix] so the frequent x and y steps
    # of the walk touch nearby memory (the kernel gets the axes in that order; Siddon's method
    # does not care which axis is which).
    grid_zyx = np.ascontiguousarray(grid.transpose(2, 1, 0))
    _kernels.acf_sinogram(grid_zyx, origin[::-1].copy(), voxel[::-1].copy(), trans, axial, acf)
    return acf


def attenuation_factors_from_file(path, geometry: SinogramGeometry) -> np.ndarray:
    """Read a mu-map NIfTI (1/cm, scanner frame) and return the ACF sinogram.

    Raises
    ------
    TwinrayInputError
        Unreadable file, bad units (see :func:`check_mu_map`), a rotated
        affine, or a map that does not overlap the scanner's field of view.
    """
    from ..images import read_image

    data, affine, _ = read_image(path, what="mu-map")
    mu = check_mu_map(data, where=f"mu-map {path}")
    try:
        grid_from_affine(mu, affine)
    except TwinrayInputError as exc:
        raise TwinrayInputError(f"mu-map {path}: {exc}") from None
    corners = np.array([[i, j, k, 1.0] for i in (0, mu.shape[0] - 1) for j in (0, mu.shape[1] - 1)
                        for k in (0, mu.shape[2] - 1)]) @ affine.T
    R = geometry.scanner.radius_mm
    half_z = geometry.scanner.axial_length_mm / 2
    if (corners[:, 0].min() > R or corners[:, 0].max() < -R or corners[:, 1].min() > R
            or corners[:, 1].max() < -R or corners[:, 2].min() > half_z or corners[:, 2].max() < -half_z):
        raise TwinrayInputError(f"mu-map {path} lies outside the scanner's field of view "
                                "(is its affine in scanner-frame millimetres?)")
    return attenuation_factors(mu, affine, geometry)
