"""numba kernel of the FBP back projection (see ``fbp.py``)."""

from __future__ import annotations

import math

import numpy as np
from numba import njit, prange


@njit(cache=True, nogil=True)
def _clamp(value, lo, hi):
    return min(max(value, lo), hi)


@njit(cache=True, parallel=True, fastmath=True)
def backproject_filtered(filtered, cos_phi, sin_phi, s0_mm, tau_mm, x_mm, y_mm, scale, fov_radius_mm, out):
    """``out[p, j, i] = scale * sum_v Q[p, v](x_i cos(phi_v) + y_j sin(phi_v))``.

    Linear interpolation between the uniform radial samples
    ``s_k = s0_mm + k*tau_mm``; 0 outside them and outside the circle of
    radius ``fov_radius_mm`` (no LOR measures those voxels). Each thread owns
    whole image rows (a gather, so no write races). ``x_mm`` must be evenly
    spaced.
    """
    n_planes, n_views, n_radial = filtered.shape
    ny = y_mm.shape[0]
    nx = x_mm.shape[0]
    dx = x_mm[1] - x_mm[0] if nx > 1 else 0.0
    for item in prange(n_planes * ny):
        p = item // ny
        j = item % ny
        y = y_mm[j]
        row = np.zeros(nx)
        # Columns inside the field-of-view circle on this row.
        half = fov_radius_mm ** 2 - y * y
        i_lo, i_hi = 0, -1
        if half >= 0.0 and nx > 0:
            half = math.sqrt(half)
            step = dx if dx > 0 else 1.0
            i_lo = max(0, int(math.ceil((-half - x_mm[0]) / step)))
            i_hi = min(nx - 1, int(math.floor((half - x_mm[0]) / step)))
        top = n_radial - 1
        for v in range(n_views):
            # u is linear along the row, u_i = u0 + i*du: find the columns with 0 <= u < n_radial - 1
            # once, so the inner loop has no branch.
            u0 = (x_mm[0] * cos_phi[v] + y * sin_phi[v] - s0_mm) / tau_mm
            du = dx * cos_phi[v] / tau_mm
            lo, hi = i_lo, i_hi
            # (float bounds are clamped before conversion: du can be ~1e-17 at 90 degrees)
            if du > 0.0:
                lo = max(lo, int(_clamp(math.ceil(-u0 / du), -1.0, nx)))
                hi = min(hi, int(_clamp(math.ceil((top - u0) / du), -1.0, nx)))
            elif du < 0.0:
                lo = max(lo, int(_clamp(math.floor((top - u0) / du), -1.0, nx)))
                hi = min(hi, int(_clamp(math.floor(-u0 / du), -1.0, nx)))
            elif not (0.0 <= u0 < top):
                continue
            while lo <= hi and not (0.0 <= u0 + lo * du < top):
                lo += 1
            while hi >= lo and not (0.0 <= u0 + hi * du < top):
                hi -= 1
            for i in range(lo, hi + 1):
                u = u0 + i * du
                k = int(u)
                row[i] += filtered[p, v, k] + (u - k) * (filtered[p, v, k + 1] - filtered[p, v, k])
        for i in range(nx):
            out[p, j, i] = row[i] * scale
