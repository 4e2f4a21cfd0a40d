"""numba kernels of the corrections: arithmetic only, on plain arrays.

Crystal-pair kernels walk every crystal pair that a sinogram bin can hold.
The pairs are listed once per geometry as an in-plane table (``ja < jb``,
the in-plane bin, and whether crystal ``ja`` is end 1 of the LOR, see
:func:`twinray.corrections.pairs.inplane_pairs`) crossed with every ring
pair; crystal ``a = ra*N + ja`` and ``b = rb*N + jb``. Each unordered
crystal pair is visited exactly once. "Ring-difference index" ``dr`` is
``ring(end 1) - ring(end 2) + rings - 1`` (0 .. 2*rings - 2).

The Python functions that validate inputs and call these kernels are in
:mod:`twinray.corrections.pairs`, :mod:`twinray.corrections.normalization`,
:mod:`twinray.corrections.randoms` and :mod:`twinray.corrections.attenuation`.
"""

from __future__ import annotations

import numpy as np
from numba import njit, prange

from ..raytrace import siddon_line_integral


@njit(cache=True, nogil=True)
def _pair_indices(ra, rb, ja, jb, a_is_end1, n, rings, plane_of_rings):
    """Crystals, plane and ring-difference index of one crystal pair (plane -1 if not binned)."""
    a = ra * n + ja
    b = rb * n + jb
    if a_is_end1:
        plane = plane_of_rings[ra, rb]
        dr = ra - rb + rings - 1
    else:
        plane = plane_of_rings[rb, ra]
        dr = rb - ra + rings - 1
    return a, b, plane, dr


@njit(cache=True, nogil=True)
def pair_product_sinogram(factor, pair_table, pair_ja, pair_jb, pair_inplane, pair_end1_is_a, pair_radial, n, rings,
                          plane_of_rings, bins_per_plane, out):
    """``out[bin] += factor[a] * factor[b] * pair_table[dr, radial]`` over the crystal pairs of each bin."""
    for ra in range(rings):
        for rb in range(rings):
            for k in range(pair_ja.shape[0]):
                a, b, plane, dr = _pair_indices(ra, rb, pair_ja[k], pair_jb[k], pair_end1_is_a[k], n, rings,
                                                plane_of_rings)
                if plane < 0:
                    continue
                out[plane * bins_per_plane + pair_inplane[k]] += factor[a] * factor[b] * pair_table[dr, pair_radial[k]]


@njit(cache=True, nogil=True)
def fan_and_table_sums(factor, pair_table, pair_ja, pair_jb, pair_inplane, pair_end1_is_a, pair_radial, n, rings,
                       plane_of_rings, fan_out, table_out):
    """Model sums of the fan-sum normalization for ``m_ab = f_a f_b G[dr, radial]``.

    ``fan_out[a] += f_b * G`` (the fan sum of crystal a divided by f_a) and
    ``table_out[dr, radial] += f_a * f_b`` (the model sum of a table cell
    divided by G).
    """
    for ra in range(rings):
        for rb in range(rings):
            for k in range(pair_ja.shape[0]):
                a, b, plane, dr = _pair_indices(ra, rb, pair_ja[k], pair_jb[k], pair_end1_is_a[k], n, rings,
                                                plane_of_rings)
                if plane < 0:
                    continue
                radial = pair_radial[k]
                g = pair_table[dr, radial]
                fan_out[a] += factor[b] * g
                fan_out[b] += factor[a] * g
                table_out[dr, radial] += factor[a] * factor[b]


@njit(cache=True, nogil=True)
def binned_fan_em_sums(factor, measured_flat, model_flat, pair_ja, pair_jb, pair_inplane, pair_end1_is_a, pair_radial,
                       n, rings, plane_of_rings, bins_per_plane, numerator, denominator):
    """One EM step for binned data modelled as ``sum over pairs in bin of f_a f_b``.

    Each bin's counts are shared among its pairs in proportion to
    ``f_a f_b``; ``numerator[a]`` receives crystal a's share and
    ``denominator[a]`` the sum of ``f_b`` over its fan. The update is
    ``f_a <- numerator[a] / denominator[a]``.
    """
    for ra in range(rings):
        for rb in range(rings):
            for k in range(pair_ja.shape[0]):
                a, b, plane, dr = _pair_indices(ra, rb, pair_ja[k], pair_jb[k], pair_end1_is_a[k], n, rings,
                                                plane_of_rings)
                if plane < 0:
                    continue
                flat = plane * bins_per_plane + pair_inplane[k]
                m = model_flat[flat]
                if m > 0.0:
                    share = measured_flat[flat] * factor[a] * factor[b] / m
                    numerator[a] += share
                    numerator[b] += share
                denominator[a] += factor[b]
                denominator[b] += factor[a]


@njit(cache=True, nogil=True)
def fan_sums_batch(crystal_a, crystal_b, delayed, use_delayed, energy_a, energy_b, use_energy, e_lo, e_hi, n, rings,
                   radial_bins, inplane_bin, end1_is_a, plane_of_rings, counts, fan_prompts, fan_delayed,
                   table_prompts, table_delayed):
    """Fan sums and (ring difference, radial) sums of a batch of events, with the accounting.

    An event is counted where binning would put it: the rejection reasons
    are tried in the order of data contract section 5 (invalid crystal,
    energy window, no LOR, ring difference, radial field of view; a norm scan
    has no time frame) and ``counts`` (ordered as
    :data:`twinray.accounting.FIELDS`) gets one increment per row.
    """
    n_crystals = n * rings
    for i in range(crystal_a.shape[0]):
        counts[0] += 1
        ca = crystal_a[i]
        cb = crystal_b[i]
        if ca < 0 or ca >= n_crystals or cb < 0 or cb >= n_crystals:
            counts[3] += 1
            continue
        if use_energy:
            ea = energy_a[i]
            eb = energy_b[i]
            if not (ea >= e_lo and ea <= e_hi and eb >= e_lo and eb <= e_hi):
                counts[5] += 1
                continue
        ra = ca // n
        rb = cb // n
        ja = ca - ra * n
        jb = cb - rb * n
        inplane = inplane_bin[ja, jb]
        if inplane == -1:
            counts[6] += 1
            continue
        if end1_is_a[ja, jb]:
            r1 = ra
            r2 = rb
        else:
            r1 = rb
            r2 = ra
        if plane_of_rings[r1, r2] < 0:
            counts[7] += 1
            continue
        if inplane < 0:
            counts[8] += 1
            continue
        dr = r1 - r2 + rings - 1
        radial = inplane % radial_bins
        if use_delayed and delayed[i]:
            counts[2] += 1
            fan_delayed[ca] += 1
            fan_delayed[cb] += 1
            table_delayed[dr, radial] += 1
        else:
            counts[1] += 1
            fan_prompts[ca] += 1
            fan_prompts[cb] += 1
            table_prompts[dr, radial] += 1


@njit(cache=True, parallel=True)
def acf_sinogram(mu_per_cm, origin_mm, voxel_mm, transaxial_ends, axial_ends, out):
    """``exp(line integral of mu)`` along the nominal LOR of every (plane, view, radial) bin.

    ``mu_per_cm`` in 1/cm (lengths are mm, hence the 1/10), indexed
    ``[iz, iy, ix]`` with ``origin_mm`` and ``voxel_mm`` in (z, y, x) order;
    ``transaxial_ends`` is (views, radial, 2, 2) (end 1 / end 2, x / y) and
    ``axial_ends`` (planes, 2) (z of end 1 / end 2); ``out`` (float32) is
    (planes, views, radial).
    """
    planes = axial_ends.shape[0]
    views = transaxial_ends.shape[0]
    radial = transaxial_ends.shape[1]
    for pv in prange(planes * views):
        p = pv // views
        v = pv - p * views
        z1 = axial_ends[p, 0]
        z2 = axial_ends[p, 1]
        for r in range(radial):
            integral = siddon_line_integral(mu_per_cm, origin_mm, voxel_mm,
                                            z1, transaxial_ends[v, r, 0, 1], transaxial_ends[v, r, 0, 0],
                                            z2, transaxial_ends[v, r, 1, 1], transaxial_ends[v, r, 1, 0])
            out[p, v, r] = np.exp(0.1 * integral)


@njit(cache=True, nogil=True)
def singles_sums(time_ns, crystal, counts, interval_ns, frame_starts, frame_ends, n_crystals, out, bad):
    """Add singles counts to ``out[frame, crystal]``, weighting each interval by its overlap with the frame.

    ``bad[0]`` counts rows with a crystal id outside the scanner, ``bad[1]``
    rows with negative counts.
    """
    for i in range(time_ns.shape[0]):
        c = crystal[i]
        if c < 0 or c >= n_crystals:
            bad[0] += 1
            continue
        if counts[i] < 0:
            bad[1] += 1
            continue
        t0 = time_ns[i]
        t1 = t0 + interval_ns
        for k in range(frame_starts.shape[0]):
            lo = t0 if t0 > frame_starts[k] else frame_starts[k]
            hi = t1 if t1 < frame_ends[k] else frame_ends[k]
            if hi > lo:
                out[k, c] += counts[i] * (hi - lo) / interval_ns


@njit(cache=True, nogil=True)
def gaussian_tail_fit(d_tail, y_tail, view_of, use, sigma, views, amp):
    """Per-view least-squares amplitudes of ``exp(-d^2 / (2 sigma^2))`` on tail bins; returns the residual.

    ``amp`` (views,) receives the amplitudes (clipped at 0); the residual
    sums only over bins whose view has ``use`` set.
    """
    num = np.zeros(views)
    den = np.zeros(views)
    shape = np.empty(d_tail.shape[0])
    inv = 0.5 / (sigma * sigma)
    for i in range(d_tail.shape[0]):
        g = np.exp(-d_tail[i] * d_tail[i] * inv)
        shape[i] = g
        num[view_of[i]] += g * y_tail[i]
        den[view_of[i]] += g * g
    for v in range(views):
        a = num[v] / den[v] if den[v] > 0.0 else 0.0
        amp[v] = a if a > 0.0 else 0.0
    resid = 0.0
    for i in range(d_tail.shape[0]):
        if use[i]:
            r = y_tail[i] - amp[view_of[i]] * shape[i]
            resid += r * r
    return resid
