"""numba kernels of the binning step: arithmetic only, on plain arrays.

The Python function that validates inputs and calls these is
:func:`twinray.binning.bin_event_arrays`. A batch is binned in two passes:

1. :func:`classify_batch` decides for every event either its flat bin
   (frame, plane, view, radial, and whether it is a delayed coincidence),
   encoded as one non-negative int64 "code", or the first rejection reason of
   data contract section 5, and fills the accounting counters;
2. :func:`accumulate_codes` adds the codes to the sinograms, after a counting
   sort by plane so that the increments of one plane hit a few hundred
   kilobytes of memory instead of the whole sinogram (random access into a
   large histogram is what limits binning; see the performance notes).

A weighted variant (e.g. resampling replicates with per-event integer
weights) reuses :func:`classify_batch` unchanged and only needs its own
accumulate step; :func:`classify_event` holds all the lookup-table logic.

Code layout: ``code = ((frame * n_bins + flat_bin) << 1) | is_delayed`` with
``flat_bin = plane * bins_per_plane + view * radial_bins + radial``;
``-1`` for a rejected event.
"""

from __future__ import annotations

import numpy as np
from numba import njit

from .accounting import DELAYED, ENERGY, INVALID_CRYSTAL, NO_LOR, OUTSIDE_FRAME, PROMPTS, RADIAL_FOV, READ, RING_DIFF

REJECTED = -1


@njit(cache=True, nogil=True)
def frame_of(t, frame_starts, frame_ends):
    """Index of the half-open frame [start, end) holding time ``t``, or -1.

    ``frame_starts`` is sorted and the frames do not overlap (binary search).
    """
    lo = 0
    hi = frame_starts.shape[0]
    while lo < hi:
        mid = (lo + hi) >> 1
        if frame_starts[mid] <= t:
            lo = mid + 1
        else:
            hi = mid
    k = lo - 1
    if k < 0 or t >= frame_ends[k]:
        return -1
    return k


@njit(cache=True, nogil=True)
def classify_event(ca, cb, in_frame, ea, eb, use_energy, e_lo, e_hi, crystals_per_ring, n_crystals,
                   inplane_bin, end1_is_a, plane_of_rings, bins_per_plane):
    """Flat sinogram bin of one coincidence, or minus its rejection reason.

    The reasons are tried in the order of data contract section 5: invalid
    crystal, outside frame, energy window (both photons, limits inclusive; a
    NaN energy is outside), no LOR, ring difference, radial field of view.
    Returns ``plane * bins_per_plane + inplane`` (>= 0) or ``-reason`` with
    ``reason`` the index of the counter in :data:`twinray.accounting.FIELDS`.
    """
    if ca < 0 or ca >= n_crystals or cb < 0 or cb >= n_crystals:
        return -INVALID_CRYSTAL
    if not in_frame:
        return -OUTSIDE_FRAME
    if use_energy:
        if not (ea >= e_lo and ea <= e_hi and eb >= e_lo and eb <= e_hi):
            return -ENERGY
    ra = ca // crystals_per_ring
    ja = ca - ra * crystals_per_ring
    rb = cb // crystals_per_ring
    jb = cb - rb * crystals_per_ring
    inplane = inplane_bin[ja, jb]
    if inplane == -1:  # geometry.NO_LOR
        return -NO_LOR
    if end1_is_a[ja, jb]:
        plane = plane_of_rings[ra, rb]
    else:
        plane = plane_of_rings[rb, ra]
    if plane < 0:
        return -RING_DIFF
    if inplane < 0:  # geometry.OUTSIDE_RADIAL
        return -RADIAL_FOV
    return plane * bins_per_plane + inplane


@njit(cache=True, nogil=True)
def classify_batch(crystal_a, crystal_b, time_ns, use_time, delayed, use_delayed, energy_a, energy_b, use_energy,
                   e_lo, e_hi, frame_starts, frame_ends, crystals_per_ring, n_crystals, inplane_bin, end1_is_a,
                   plane_of_rings, bins_per_plane, n_bins, codes, counts):
    """Pass 1: a code per event (see the module docstring) and the counters.

    ``counts`` has shape (n_frames + 1, len(FIELDS)); row ``k`` counts the
    events whose time lies in frame ``k`` and the last row those outside
    every frame. Without ``use_time`` every event is in frame 0.
    Returns the number of binned events (codes >= 0).
    """
    n = crystal_a.shape[0]
    n_frames = frame_starts.shape[0]
    binned = 0
    for i in range(n):
        slot = 0
        in_frame = True
        if use_time:
            k = frame_of(time_ns[i], frame_starts, frame_ends)
            if k < 0:
                slot = n_frames
                in_frame = False
            else:
                slot = k
        ea = np.float32(0.0)
        eb = np.float32(0.0)
        if use_energy:
            ea = energy_a[i]
            eb = energy_b[i]
        code = classify_event(crystal_a[i], crystal_b[i], in_frame, ea, eb, use_energy, e_lo, e_hi,
                              crystals_per_ring, n_crystals, inplane_bin, end1_is_a, plane_of_rings,
                              bins_per_plane)
        counts[slot, READ] += 1
        if code >= 0:
            is_delayed = use_delayed and delayed[i]
            if is_delayed:
                counts[slot, DELAYED] += 1
                codes[i] = ((slot * n_bins + code) << 1) | 1
            else:
                counts[slot, PROMPTS] += 1
                codes[i] = (slot * n_bins + code) << 1
            binned += 1
        else:
            counts[slot, -code] += 1
            codes[i] = REJECTED
    return binned


@njit(cache=True, nogil=True)
def accumulate_codes(codes, prompts_flat, delayed_flat, bins_per_plane, n_keys, key_counts, sorted_codes):
    """Pass 2: add binned codes to the flat prompts / delayed sinograms.

    Codes are first partitioned by (frame, plane) with a counting sort into
    ``sorted_codes`` (scratch, at least as long as ``codes``), so that the
    increments sweep the sinogram plane by plane. ``key_counts`` is scratch
    of length ``n_keys + 1`` (``n_keys = n_frames * planes``).
    """
    key_div = bins_per_plane << 1
    key_counts[:] = 0
    n = codes.shape[0]
    for i in range(n):
        c = codes[i]
        if c >= 0:
            key_counts[c // key_div + 1] += 1
    for k in range(n_keys):
        key_counts[k + 1] += key_counts[k]
    for i in range(n):
        c = codes[i]
        if c >= 0:
            k = c // key_div
            sorted_codes[key_counts[k]] = c
            key_counts[k] += 1
    m = key_counts[n_keys - 1] if n_keys > 0 else 0
    for i in range(m):
        c = sorted_codes[i]
        if c & 1:
            delayed_flat[c >> 1] += 1
        else:
            prompts_flat[c >> 1] += 1


@njit(cache=True, nogil=True)
def accumulate_codes_direct(codes, prompts_flat, delayed_flat):
    """Pass 2 without partitioning (random increments; kept for the benchmark)."""
    for i in range(codes.shape[0]):
        c = codes[i]
        if c >= 0:
            if c & 1:
                delayed_flat[c >> 1] += 1
            else:
                prompts_flat[c >> 1] += 1
