"""numba kernels of the Joseph projector pair (see ``projectors.py``).

Kernels take contiguous arrays and scalars only. Inside the kernels the
image is stored ``[y, x, z]`` (z fastest), zero-padded by one voxel on
every side and flattened: every plane of a sinogram shares
the transaxial path of a (view, radial) LOR, so the path (columns or rows
visited, in-plane interpolation weights) is computed once and then all
planes are served from contiguous runs of z. A LOR column is given by its
view (``cos_phi``, ``sin_phi``), its signed radial position ``s`` (mm), the
half length of its transaxial chord ``h`` (mm); each plane by the
fractional slice index of its two ends. The forward and back kernels visit
exactly the same (voxel, weight) pairs, so one is the transpose of the
other.
"""

from __future__ import annotations

import math

import numpy as np
from numba import njit, prange


@njit(cache=True, nogil=True)
def _column(image, ny, nx, nz, acc, values, forward, c, sn, s, h, fz_end1, fz_end2, x0, y0, vx, vy):
    """Walk the transaxial path of one (view, radial) LOR for every plane (Joseph 1982).

    ``image`` is the flattened ``[y, x, z]`` grid of ``ny x nx x nz``
    voxels padded with one zero voxel on every side (index ``n + 1`` holds
    grid voxel ``n``), so taps that fall just outside the grid read or write
    the padding and the inner loop needs no bounds tests. Flat offsets are
    used instead of array views (a view costs a reference-count update).
    ``forward``: ``acc[p] += sum over steps of interpolated image`` (the
    caller multiplies by the step length). Otherwise: add ``values[p]``
    (already multiplied by the step length) times the same weights.
    Returns the transaxial step length, mm.
    """
    if h <= 0.0:
        return 0.0
    row_stride = (nx + 2) * (nz + 2)
    col_stride = nz + 2
    n_planes = fz_end1.shape[0]
    inv_2h = 1.0 / (2.0 * h)
    along_x = abs(sn) >= abs(c)
    # Point at parameter t: (s*c - t*sn, s*sn + t*c); end 1 at t = +h.
    if along_x:
        step = vx / abs(sn)
        centre = s * c
        half = h * abs(sn)
        lo = max(0, int(math.ceil((centre - half - x0) / vx)))
        hi = min(nx - 1, int(math.floor((centre + half - x0) / vx)))
        n_inner = ny
    else:
        step = vy / abs(c)
        centre = s * sn
        half = h * abs(c)
        lo = max(0, int(math.ceil((centre - half - y0) / vy)))
        hi = min(ny - 1, int(math.floor((centre + half - y0) / vy)))
        n_inner = nx
    # t, the in-plane fraction f and the axial fraction a are linear in the step: no divisions inside.
    if along_x:
        t_lo = (centre - (x0 + lo * vx)) / sn
        dt = -vx / sn
        f_lo = (s * sn + t_lo * c - y0) / vy
        df = dt * c / vy
    else:
        t_lo = ((y0 + lo * vy) - centre) / c
        dt = vy / c
        f_lo = (s * c - t_lo * sn - x0) / vx
        df = -dt * sn / vx
    a_lo = (t_lo + h) * inv_2h
    da = dt * inv_2h
    for n in range(lo, hi + 1):
        i = n - lo
        f = f_lo + i * df
        if f <= -1.0 or f >= n_inner:
            continue
        m = int(f + 1.0)            # padded index of the lower tap (f + 1 > 0, so int() is floor)
        w1 = f + 1.0 - m
        w0 = 1.0 - w1
        if along_x:
            base_a = m * row_stride + (n + 1) * col_stride
            base_b = base_a + row_stride
        else:
            base_a = (n + 1) * row_stride + m * col_stride
            base_b = base_a + col_stride
        a = a_lo + i * da
        for p in range(n_planes):
            fz = fz_end2[p] + (fz_end1[p] - fz_end2[p]) * a
            if fz <= -1.0 or fz >= nz:
                continue
            k = int(fz + 1.0)
            wz1 = fz + 1.0 - k
            wz0 = 1.0 - wz1
            a0 = base_a + k
            b0 = base_b + k
            if forward:
                acc[p] += (w0 * (wz0 * image[a0] + wz1 * image[a0 + 1])
                           + w1 * (wz0 * image[b0] + wz1 * image[b0 + 1]))
            else:
                v = values[p]
                if v == 0.0:
                    continue
                image[a0] += w0 * wz0 * v
                image[a0 + 1] += w0 * wz1 * v
                image[b0] += w1 * wz0 * v
                image[b0 + 1] += w1 * wz1 * v
    return step


@njit(cache=True, parallel=True)
def forward_kernel(image, ny, nx, nz, cos_phi, sin_phi, radial_mm, half_chord_mm, fz_end1, fz_end2, axial_factor,
                   x0, y0, vx, vy, views, n_chunks, out):
    """Line integrals of ``image`` for every (plane, selected view, radial) bin.

    ``image`` is the flattened, zero-padded ``[y, x, z]`` grid (see
    :func:`_column`). ``out[p, k, r]`` is the LOR of plane ``p``, view
    ``views[k]``, radial bin ``r``; ``axial_factor[p, r]`` is the 3-D length
    per unit of transaxial length. Each output bin is written by one thread
    only (no races).
    """
    n_planes = out.shape[0]
    n_views = views.shape[0]
    n_radial = out.shape[2]
    total = n_views * n_radial
    dummy = np.zeros(1)
    for ch in prange(n_chunks):
        acc = np.zeros(n_planes)
        for item in range(ch * total // n_chunks, (ch + 1) * total // n_chunks):
            k = item // n_radial
            r = item % n_radial
            v = views[k]
            acc[:] = 0.0
            step = _column(image, ny, nx, nz, acc, dummy, True, cos_phi[v], sin_phi[v], radial_mm[r],
                           half_chord_mm[r], fz_end1, fz_end2, x0, y0, vx, vy)
            for p in range(n_planes):
                out[p, k, r] = acc[p] * step * axial_factor[p, r]


@njit(cache=True, parallel=True)
def back_kernel(sino, ny, nx, nz, cos_phi, sin_phi, radial_mm, half_chord_mm, fz_end1, fz_end2, axial_factor,
                x0, y0, vx, vy, views, buffers):
    """Transpose of :func:`forward_kernel`, accumulated into per-thread buffers.

    ``buffers`` has shape ``(n_chunks, (ny+2)*(nx+2)*(nz+2))`` (flattened,
    zero-padded ``[y, x, z]``) and is zero on entry;
    chunk ``c`` handles a contiguous range of (view, radial) LOR columns and
    writes only to ``buffers[c]``, so there are no write races. The caller
    sums the buffers.
    """
    n_chunks = buffers.shape[0]
    n_planes = sino.shape[0]
    n_views = views.shape[0]
    n_radial = sino.shape[2]
    total = n_views * n_radial
    for ch in prange(n_chunks):
        start = ch * total // n_chunks
        stop = (ch + 1) * total // n_chunks
        image = buffers[ch]
        values = np.zeros(n_planes)
        for item in range(start, stop):
            k = item // n_radial
            r = item % n_radial
            v = views[k]
            h = half_chord_mm[r]
            if h <= 0.0:
                continue
            c = cos_phi[v]
            sn = sin_phi[v]
            step = vx / abs(sn) if abs(sn) >= abs(c) else vy / abs(c)
            any_value = False
            for p in range(n_planes):
                values[p] = sino[p, k, r] * step * axial_factor[p, r]
                if values[p] != 0.0:
                    any_value = True
            if any_value:
                _column(image, ny, nx, nz, values, values, False, c, sn, radial_mm[r], h,
                        fz_end1, fz_end2, x0, y0, vx, vy)


@njit(cache=True, parallel=True)
def sum_buffers_to_zyx(buffers, out):
    """``out[z, y, x] = sum_c buffers[c, y+1, x+1, z+1]`` (flattened, padding dropped), parallel over rows."""
    n_chunks = buffers.shape[0]
    nz, ny, nx = out.shape
    for j in prange(ny):
        for i in range(nx):
            base = ((j + 1) * (nx + 2) + (i + 1)) * (nz + 2) + 1
            for k in range(nz):
                acc = 0.0
                for c in range(n_chunks):
                    acc += buffers[c, base + k]
                out[k, j, i] = acc


# Serial twins for small problems: a parallel region costs a thread wake-up
# (and, on a busy machine, can wait for a descheduled thread), which is more
# than the whole job when the job is small.
forward_kernel_serial = njit(cache=True)(forward_kernel.py_func)
back_kernel_serial = njit(cache=True)(back_kernel.py_func)
sum_buffers_to_zyx_serial = njit(cache=True)(sum_buffers_to_zyx.py_func)
