"""Single-slice rebinning (SSRB) of a stored 3-D sinogram for the 2-D paths.

Every oblique plane goes to the direct or cross plane at its axial
mid-point (its ``plane_z_mm``) and its obliqueness is ignored
(Daube-Witherspoon & Muehllehner 1987). How the stored planes that meet in
one rebinned plane are combined depends on what they hold:

* Corrected data (FBP): each plane is an estimate of the same line
  integral, so they are **averaged** (a sum would scale the image by the
  number of ring pairs).
* Counts (OSEM prompts, randoms, scatter): **summed**, and the
  multiplicative factors ``m = 1/(norm*acf)`` are summed as well, so the
  Poisson model ``E[prompts] = T*m*(A x) + randoms + scatter`` stays exact
  for the summed data within the SSRB approximation that every ring pair
  sees the same 2-D line integral.

References
----------
M. E. Daube-Witherspoon and G. Muehllehner, "Treatment of axial data in
three-dimensional PET", J Nucl Med 28(11):1717-1724, 1987.
"""

from __future__ import annotations

import numpy as np


def rebinned_planes(plane_z_mm) -> tuple:
    """The distinct plane positions and, per stored plane, its rebinned plane.

    Returns
    -------
    z_mm : ndarray, shape (planes_2d,), increasing
    index : ndarray of int, shape (planes,)
    """
    z = np.asarray(plane_z_mm, dtype=np.float64)
    # Plane positions are multiples of half the axial pitch; round off float noise.
    key = np.round(z, 6)
    z_unique, index = np.unique(key, return_inverse=True)
    return z_unique, index.ravel()


def ssrb_sum(data: np.ndarray, plane_z_mm) -> tuple:
    """Sum the stored planes of equal axial mid-point (counts, factors m).

    Returns
    -------
    summed : ndarray of float64, shape (planes_2d, views, radial)
    z_mm : ndarray
    """
    z_unique, index = rebinned_planes(plane_z_mm)
    out = np.zeros((len(z_unique),) + np.shape(data)[1:], dtype=np.float64)
    for p, target in enumerate(index):
        out[target] += data[p]
    return out, z_unique


def ssrb_average(data: np.ndarray, plane_z_mm) -> tuple:
    """Average the stored planes of equal axial mid-point (corrected data).

    Returns
    -------
    averaged : ndarray of float64, shape (planes_2d, views, radial)
    z_mm : ndarray
    """
    summed, z_unique = ssrb_sum(data, plane_z_mm)
    _, index = rebinned_planes(plane_z_mm)
    counts = np.bincount(index, minlength=len(z_unique)).astype(np.float64)
    return summed / counts[:, None, None], z_unique
