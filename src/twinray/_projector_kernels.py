"""numba kernels of the Joseph projector pair (see ``projectors.py``).

Kernels take contiguous arrays and scalars only. The image is indexed
``[z, y, x]``; a LOR is given by its view (``cos_phi``, ``sin_phi``), its
signed radial position ``s`` (mm), the half length of its transaxial chord
``h`` (mm) and the fractional slice index of its two ends. The forward and
back kernels visit exactly the same (voxel, weight) pairs, so one is the
transpose of the other.
"""

from __future__ import annotations

import math

import numpy as np
from numba import njit, prange


@njit(cache=True, nogil=True)
def _gather(image, k0, wz, j0, wy, i, along_x):
    """Bilinear read: ``along_x`` means ``i`` is the column and ``j0`` a row."""
    nz, ny, nx = image.shape
    acc = 0.0
    n_inner = ny if along_x else nx
    for dk in range(2):
        k = k0 + dk
        w_k = wz if dk == 1 else 1.0 - wz
        if w_k == 0.0 or k < 0 or k >= nz:
            continue
        for dj in range(2):
            j = j0 + dj
            w = wy if dj == 1 else 1.0 - wy
            if w == 0.0 or j < 0 or j >= n_inner:
                continue
            if along_x:
                acc += w_k * w * image[k, j, i]
            else:
                acc += w_k * w * image[k, i, j]
    return acc


@njit(cache=True, nogil=True)
def _scatter(image, value, k0, wz, j0, wy, i, along_x):
    """Transpose of :func:`_gather`: add ``value`` times the same weights."""
    nz, ny, nx = image.shape
    n_inner = ny if along_x else nx
    for dk in range(2):
        k = k0 + dk
        w_k = wz if dk == 1 else 1.0 - wz
        if w_k == 0.0 or k < 0 or k >= nz:
            continue
        for dj in range(2):
            j = j0 + dj
            w = wy if dj == 1 else 1.0 - wy
            if w == 0.0 or j < 0 or j >= n_inner:
                continue
            if along_x:
                image[k, j, i] += w_k * w * value
            else:
                image[k, i, j] += w_k * w * value


@njit(cache=True, nogil=True)
def _lor(image, value, forward, c, sn, s, h, fz1, fz2, dz_mm, x0, y0, vx, vy):
    """Walk one LOR (Joseph 1982): read (forward) or add ``value`` (back).

    Returns the line integral for ``forward``; 0 otherwise.
    """
    if h <= 0.0:
        return 0.0
    nz, ny, nx = image.shape
    # Length along the 3-D line per unit of transaxial length.
    axial = math.sqrt(1.0 + (dz_mm / (2.0 * h)) ** 2)
    inv_2h = 1.0 / (2.0 * h)
    acc = 0.0
    # Point at parameter t: (s*c - t*sn, s*sn + t*c); end 1 at t = +h.
    if abs(sn) >= abs(c):
        # Steps along x (one per image column); interpolate in y and z.
        step = vx / abs(sn) * axial
        xc = s * c
        half = h * abs(sn)
        i_lo = max(0, int(math.ceil((xc - half - x0) / vx)))
        i_hi = min(nx - 1, int(math.floor((xc + half - x0) / vx)))
        for i in range(i_lo, i_hi + 1):
            x = x0 + i * vx
            t = (xc - x) / sn
            fy = (s * sn + t * c - y0) / vy
            j0 = int(math.floor(fy))
            fz = fz2 + (fz1 - fz2) * (t + h) * inv_2h
            k0 = int(math.floor(fz))
            if forward:
                acc += _gather(image, k0, fz - k0, j0, fy - j0, i, True)
            else:
                _scatter(image, value * step, k0, fz - k0, j0, fy - j0, i, True)
    else:
        # Steps along y (one per image row); interpolate in x and z.
        step = vy / abs(c) * axial
        yc = s * sn
        half = h * abs(c)
        j_lo = max(0, int(math.ceil((yc - half - y0) / vy)))
        j_hi = min(ny - 1, int(math.floor((yc + half - y0) / vy)))
        for j in range(j_lo, j_hi + 1):
            y = y0 + j * vy
            t = (y - yc) / c
            fx = (s * c - t * sn - x0) / vx
            i0 = int(math.floor(fx))
            fz = fz2 + (fz1 - fz2) * (t + h) * inv_2h
            k0 = int(math.floor(fz))
            if forward:
                acc += _gather(image, k0, fz - k0, i0, fx - i0, j, False)
            else:
                _scatter(image, value * step, k0, fz - k0, i0, fx - i0, j, False)
    return acc * step


@njit(cache=True, parallel=True)
def forward_kernel(image, cos_phi, sin_phi, radial_mm, half_chord_mm, fz_end1, fz_end2, dz_mm,
                   x0, y0, vx, vy, views, out):
    """Line integrals of ``image`` for every (plane, selected view, radial) bin.

    ``out[p, k, r]`` is the LOR of plane ``p``, view ``views[k]``, radial bin ``r``.
    Each output bin is written by one thread only (no races).
    """
    n_planes = out.shape[0]
    n_views = views.shape[0]
    n_radial = out.shape[2]
    for item in prange(n_planes * n_views):
        p = item // n_views
        k = item % n_views
        v = views[k]
        for r in range(n_radial):
            out[p, k, r] = _lor(image, 0.0, True, cos_phi[v], sin_phi[v], radial_mm[r], half_chord_mm[r],
                                fz_end1[p], fz_end2[p], dz_mm[p], x0, y0, vx, vy)


@njit(cache=True, parallel=True)
def back_kernel(sino, cos_phi, sin_phi, radial_mm, half_chord_mm, fz_end1, fz_end2, dz_mm,
                x0, y0, vx, vy, views, buffers):
    """Transpose of :func:`forward_kernel`, accumulated into per-thread buffers.

    ``buffers`` has shape ``(n_chunks, nz, ny, nx)`` and is zero on entry;
    chunk ``c`` handles a contiguous range of (plane, view) items and writes
    only to ``buffers[c]``, so there are no write races. The caller sums the
    buffers.
    """
    n_chunks = buffers.shape[0]
    n_planes = sino.shape[0]
    n_views = views.shape[0]
    n_radial = sino.shape[2]
    total = n_planes * n_views
    for ch in prange(n_chunks):
        start = ch * total // n_chunks
        stop = (ch + 1) * total // n_chunks
        image = buffers[ch]
        for item in range(start, stop):
            p = item // n_views
            k = item % n_views
            v = views[k]
            for r in range(n_radial):
                value = sino[p, k, r]
                if value == 0.0:
                    continue
                _lor(image, value, False, cos_phi[v], sin_phi[v], radial_mm[r], half_chord_mm[r],
                     fz_end1[p], fz_end2[p], dz_mm[p], x0, y0, vx, vy)


@njit(cache=True, parallel=True)
def sum_buffers(buffers, out):
    """``out = buffers.sum(axis=0)``, parallel over slices."""
    n_chunks, nz, ny, nx = buffers.shape
    for k in prange(nz):
        for j in range(ny):
            for i in range(nx):
                acc = 0.0
                for c in range(n_chunks):
                    acc += buffers[c, k, j, i]
                out[k, j, i] = acc
