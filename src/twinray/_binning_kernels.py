"""numba kernels of the binning step: arithmetic only, on plain arrays.

The Python function that validates inputs and calls these is
:func:`twinray.binning.bin_event_arrays`. A batch is binned in two passes:

1. :func:`classify_batch` decides for every event either its flat bin
   (frame, plane, view, radial, and whether it is a delayed coincidence),
   encoded as one non-negative int64 "code", or the first rejection reason of
   data contract section 5, and fills the accounting counters;
2. :func:`accumulate_codes` (or :func:`accumulate_codes_direct`) adds the codes to the sinograms, after a counting
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


@njit(cache=True, nogil=True, inline="always")
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


def inplane_codes(inplane_bin, end1_is_a):
    """One lookup table for the in-plane step: ``inplane << 1 | end1_is_a``, or the negative marks.

    ``inplane_bin`` marks ``-1`` (no LOR) and ``-2`` (outside the radial
    field of view) are kept as they are; one random access per event instead
    of two.
    """
    inplane = np.asarray(inplane_bin, dtype=np.int64)
    code = np.where(inplane >= 0, (inplane << 1) | np.asarray(end1_is_a, dtype=np.int64), inplane)
    return np.ascontiguousarray(code, dtype=np.int32)


def crystal_tables(rings, crystals_per_ring):
    """Ring and in-ring position of every global crystal id (avoids two divisions per event)."""
    ids = np.arange(rings * crystals_per_ring, dtype=np.int64)
    return (np.ascontiguousarray(ids // crystals_per_ring, dtype=np.int32),
            np.ascontiguousarray(ids % crystals_per_ring, dtype=np.int32))


def inplane_factors(inplane_code, radial_bins):
    """Split the in-plane table into small tables by index sum and difference, if it factors exactly.

    With the view/radial convention of :mod:`twinray.geometry`, the entry for
    crystals ``ja``, ``jb`` is the view of ``ja + jb`` plus the radial
    position and end of ``ja - jb`` for the half-turn ``half[ja + jb]``:
    ``code = by_sum[ja + jb] + by_diff[half[ja + jb], ja - jb + N - 1]``, or
    ``by_diff`` alone when that is a negative mark. Tables of about 8N
    entries stay in the first-level cache, unlike the N^2 table.

    The factors are read off ``inplane_code`` itself and checked against it
    for every pair, so the geometry module stays the only source of truth;
    ``None`` is returned when the table does not factor (the full table is
    then used).

    Returns
    -------
    (by_sum, half, by_diff) : int32 arrays of shapes (2N-1,), (2N-1,), (2, 2N-1), or None
    """
    table = np.asarray(inplane_code, dtype=np.int64)
    n = table.shape[0]
    ja, jb = np.meshgrid(np.arange(n), np.arange(n), indexing="ij")
    total = (ja + jb).ravel()
    diff = (ja - jb + n - 1).ravel()
    code = table.ravel()
    half = ((np.arange(2 * n - 1) // 2) >= n // 2).astype(np.int64)
    good = code >= 0
    by_sum = np.zeros(2 * n - 1, np.int64)
    by_sum[total[good]] = (((code[good] >> 1) // radial_bins) * radial_bins) << 1
    rel = np.where(good, code - by_sum[total], code)
    by_diff = np.full((2, 2 * n - 1), -1, np.int64)
    by_diff[half[total], diff] = rel
    part = by_diff[half[total], diff]
    rebuilt = np.where(part < 0, part, by_sum[total] + part)
    if not np.array_equal(rebuilt, code):
        return None
    return (np.ascontiguousarray(by_sum, dtype=np.int32), np.ascontiguousarray(half, dtype=np.int32),
            np.ascontiguousarray(by_diff, dtype=np.int32))


@njit(cache=True, nogil=True, inline="always")
def inplane_lookup(ca, cb, n_crystals, position_of, inplane_code, factored, by_sum, half, by_diff):
    """The in-plane table entry of a crystal pair (that of 0, 0 for invalid ids; they are rejected later).

    Uses the small factor tables of :func:`inplane_factors` when ``factored``,
    else the full table.
    """
    valid = (ca >= 0) & (ca < n_crystals) & (cb >= 0) & (cb < n_crystals)
    pa = position_of[ca if valid else 0]
    pb = position_of[cb if valid else 0]
    if factored:
        t = pa + pb
        part = by_diff[half[t], pa - pb + (by_diff.shape[1] - 1) // 2]
        return part if part < 0 else by_sum[t] + part
    return inplane_code[pa, pb]


@njit(cache=True, nogil=True, inline="always")
def classify_event(ca, cb, code, in_frame, ea, eb, use_energy, e_lo, e_hi, n_crystals, ring_of, plane_of_rings,
                   bins_per_plane):
    """Flat sinogram bin of one coincidence, or minus its rejection reason.

    ``code`` is :func:`inplane_lookup` of the pair. The reasons are tried in
    the order of data contract section 5: invalid crystal, outside frame,
    energy window (both photons, limits inclusive; a NaN energy is outside),
    no LOR, ring difference, radial field of view. Returns
    ``plane * bins_per_plane + inplane`` (>= 0) or ``-reason`` with
    ``reason`` the index of the counter in :data:`twinray.accounting.FIELDS`.
    ``ring_of`` comes from :func:`crystal_tables`.

    Written with selects rather than early returns, so that the work on
    neighbouring events overlaps instead of waiting on mispredicted branches.
    """
    valid = (ca >= 0) & (ca < n_crystals) & (cb >= 0) & (cb < n_crystals)
    ra = ring_of[ca if valid else 0]
    rb = ring_of[cb if valid else 0]
    # End 1 first. For the radial-FOV mark (-2) the order does not matter: the ring-difference
    # test is symmetric and comes first.
    end1_is_a = (code & 1) != 0
    r1 = ra if end1_is_a else rb
    r2 = rb if end1_is_a else ra
    plane = plane_of_rings[r1, r2]
    energy_ok = (ea >= e_lo) & (ea <= e_hi) & (eb >= e_lo) & (eb <= e_hi)
    result = plane * bins_per_plane + (code >> 1)
    # Later lines win, so they go from the last reason of the contract's order to the first.
    result = -RADIAL_FOV if code == -2 else result
    result = -RING_DIFF if plane < 0 else result
    result = -NO_LOR if code == -1 else result
    result = -ENERGY if (use_energy and not energy_ok) else result
    result = -OUTSIDE_FRAME if not in_frame else result
    result = -INVALID_CRYSTAL if not valid else result
    return result


@njit(cache=True, nogil=True)
def classify_batch(crystal_a, crystal_b, time_ns, use_time, delayed, use_delayed, energy_a, energy_b, use_energy,
                   e_lo, e_hi, frame_starts, frame_ends, n_crystals, ring_of, position_of, inplane_code,
                   factored, by_sum, half, by_diff, plane_of_rings, bins_per_plane, n_bins, codes, counts):
    """Pass 1: a code per event (see the module docstring) and the counters.

    ``counts`` has shape (n_frames + 1, len(FIELDS)) and is added to; row
    ``k`` counts the events whose time lies in frame ``k`` and the last row
    those outside every frame. Without ``use_time`` every event is in
    frame 0. Returns the number of binned events (codes >= 0).

    The in-plane look-up (small factor tables when the table factors, else
    the crystals_per_ring^2 table, larger than a core's cache for a
    whole-body ring) is done in a first tight loop, so that many look-ups are
    in flight at once; the decisions follow on sequential data.
    """
    n = crystal_a.shape[0]
    for i in range(n):
        codes[i] = inplane_lookup(crystal_a[i], crystal_b[i], n_crystals, position_of, inplane_code, factored,
                                  by_sum, half, by_diff)
    local = np.zeros(counts.shape, np.int64)
    if use_time or use_energy:
        binned = _decide_general(crystal_a, crystal_b, time_ns, use_time, delayed, use_delayed, energy_a, energy_b,
                                 use_energy, e_lo, e_hi, frame_starts, frame_ends, n_crystals, ring_of,
                                 plane_of_rings, bins_per_plane, n_bins, codes, local)
    else:
        binned = _decide_simple(crystal_a, crystal_b, delayed, use_delayed, n_crystals, ring_of, plane_of_rings,
                                bins_per_plane, codes, local)
    # Every row got exactly one field, so the rows read per slot are the row sums.
    for s in range(local.shape[0]):
        total = 0
        for f in range(local.shape[1]):
            total += local[s, f]
        local[s, READ] = total
        for f in range(local.shape[1]):
            counts[s, f] += local[s, f]
    return binned


@njit(cache=True, nogil=True)
def _decide_simple(crystal_a, crystal_b, delayed, use_delayed, n_crystals, ring_of, plane_of_rings, bins_per_plane,
                   codes, local):
    """Pass 1, second loop, one frame holding every event and no energy window (the lean case)."""
    binned = 0
    zero = np.float32(0.0)
    for i in range(crystal_a.shape[0]):
        code = classify_event(crystal_a[i], crystal_b[i], codes[i], True, zero, zero, False, zero, zero,
                              n_crystals, ring_of, plane_of_rings, bins_per_plane)
        is_delayed = delayed[i] if use_delayed else False
        ok = code >= 0
        field = (DELAYED if is_delayed else PROMPTS) if ok else -code
        local[0, field] += 1
        codes[i] = ((code << 1) | np.int64(is_delayed)) if ok else REJECTED
        binned += ok
    return binned


@njit(cache=True, nogil=True)
def _decide_general(crystal_a, crystal_b, time_ns, use_time, delayed, use_delayed, energy_a, energy_b, use_energy,
                    e_lo, e_hi, frame_starts, frame_ends, n_crystals, ring_of, plane_of_rings, bins_per_plane,
                    n_bins, codes, local):
    """Pass 1, second loop, with time frames and/or the energy window."""
    n_frames = frame_starts.shape[0]
    binned = 0
    for i in range(crystal_a.shape[0]):
        slot = 0
        in_frame = True
        if use_time:
            k = frame_of(time_ns[i], frame_starts, frame_ends)
            in_frame = k >= 0
            slot = k if in_frame else n_frames
        ea = energy_a[i] if use_energy else np.float32(0.0)
        eb = energy_b[i] if use_energy else np.float32(0.0)
        code = classify_event(crystal_a[i], crystal_b[i], codes[i], in_frame, ea, eb, use_energy, e_lo, e_hi,
                              n_crystals, ring_of, plane_of_rings, bins_per_plane)
        is_delayed = delayed[i] if use_delayed else False
        ok = code >= 0
        field = (DELAYED if is_delayed else PROMPTS) if ok else -code
        local[slot, field] += 1
        codes[i] = (((slot * n_bins + code) << 1) | np.int64(is_delayed)) if ok else REJECTED
        binned += ok
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


@njit(cache=True, nogil=True, inline="always")
def frame_of_code(c, span, k, lo):
    """``(frame, first code of the frame)`` of a binned code, ``span = 2 * n_bins`` codes per frame.

    Events usually arrive in time order, so the frame of the previous code
    (``k``, starting at ``lo``) is tried before dividing.
    """
    if c < lo or c >= lo + span:
        k = c // span
        lo = k * span
    return k, lo


@njit(cache=True, nogil=True)
def split_by_frame(codes, n_bins, offsets, out):
    """Binned codes grouped by frame: ``out[offsets[k]:offsets[k + 1]]`` holds frame ``k``'s codes.

    The frame index is taken off each code, leaving ``flat_bin << 1 |
    is_delayed`` as uint32 (stable counting sort; rejected codes are
    dropped). ``offsets`` has length n_frames + 1.
    """
    n_frames = offsets.shape[0] - 1
    offsets[:] = 0
    span = np.int64(n_bins) << 1
    k, lo = np.int64(0), np.int64(0)
    for i in range(codes.shape[0]):
        c = codes[i]
        if c >= 0:
            k, lo = frame_of_code(c, span, k, lo)
            offsets[k + 1] += 1
    for f in range(n_frames):
        offsets[f + 1] += offsets[f]
    fill = offsets[:n_frames].copy()
    k, lo = np.int64(0), np.int64(0)
    for i in range(codes.shape[0]):
        c = codes[i]
        if c >= 0:
            k, lo = frame_of_code(c, span, k, lo)
            out[fill[k]] = np.uint32(c - lo)
            fill[k] += 1


# ---- the lean path: one frame window, arithmetic-only classification ------------------------------------------
#
# The table kernels above spend much of their time waiting: on a table entry whose address depends on
# another table entry, and on selects that the compiler turns into jumps the processor mispredicts (about
# a third of the events of a study are rejected, at random). The lean kernels compute the ring and in-ring
# index by multiplication, look up both ring orders at once, decide with integer arithmetic and a small
# table of first reasons, and count in a separate pass over the codes.



def lean_tables(ring_of, position_of, crystals_per_ring, by_sum, half, by_diff, plane_of_rings):
    """Tables of the lean kernels, or None when the geometry does not allow them.

    Returns ``(ring_multiplier, by_sum, diff_flat, plane_flat, first_reason)``:
    ``ring = (crystal * ring_multiplier) >> 32`` (checked exact for every
    crystal id, in place of a division), the difference table flattened with
    the half-turn of index sum ``t`` being ``t >= crystals_per_ring``
    (checked), the ring-pair table flattened, and the first rejection reason
    of every combination of the six reason flags (bit order: invalid crystal,
    outside frame, energy, no LOR, ring difference, radial FOV).
    """
    n = int(crystals_per_ring)
    ids = np.arange(len(ring_of), dtype=np.int64)
    multiplier = (1 << 32) // n + 1
    if not np.array_equal((ids * multiplier) >> 32, ring_of) or not np.array_equal(ids - ring_of * n, position_of):
        return None
    sums = np.arange(len(half))
    if not np.array_equal(np.asarray(half), (sums >= n).astype(np.asarray(half).dtype)):
        return None
    order = (INVALID_CRYSTAL, OUTSIDE_FRAME, ENERGY, NO_LOR, RING_DIFF, RADIAL_FOV)
    first_reason = np.zeros(64, np.int64)
    for flags in range(1, 64):
        first_reason[flags] = order[(flags & -flags).bit_length() - 1]
    return (np.int64(multiplier), np.ascontiguousarray(by_sum, dtype=np.int32),
            np.ascontiguousarray(np.asarray(by_diff).reshape(-1), dtype=np.int32),
            np.ascontiguousarray(np.asarray(plane_of_rings).reshape(-1), dtype=np.int32), first_reason)


@njit(cache=True, nogil=True)
def classify_lean(crystal_a, crystal_b, time_ns, use_time, frame_starts, frame_ends, delayed, use_delayed, energy_a,
                  energy_b, use_energy, e_lo, e_hi, n_crystals, ring_multiplier, crystals_per_ring, by_sum,
                  diff_flat, plane_flat, rings, bins_per_plane, n_bins, first_reason, codes):
    """Codes of a batch, as :func:`classify_batch` gives them for binned events, or minus a tally slot.

    A binned event gets ``(frame * n_bins + flat_bin) << 1 | is_delayed``; a
    rejected one ``-(slot * 16 + reason)``, ``slot`` its frame (n_frames when
    its time is in none), ``reason`` the first of data contract section 5
    that applies (the same decisions as :func:`classify_event`; the tests
    hold the two paths equal). :func:`tally_and_split` counts them.
    """
    n_frames = frame_starts.shape[0]
    one = np.int64(1)
    n_cr = np.int64(crystals_per_ring)
    width = 2 * n_cr - 1
    limit = np.uint64(n_crystals)
    for i in range(crystal_a.shape[0]):
        a0 = np.int64(crystal_a[i])
        b0 = np.int64(crystal_b[i])
        valid = np.int64((np.uint64(a0) < limit) & (np.uint64(b0) < limit))
        a = a0 * valid                      # crystal 0 stands in for an invalid id
        b = b0 * valid
        ra = (a * ring_multiplier) >> 32
        rb = (b * ring_multiplier) >> 32
        pa = a - ra * n_cr
        pb = b - rb * n_cr
        t = pa + pb
        part = np.int64(diff_flat[np.int64(t >= n_cr) * width + (n_cr - 1) + pa - pb])
        base = np.int64(by_sum[t])
        plane_ab = np.int64(plane_flat[ra * rings + rb])
        plane_ba = np.int64(plane_flat[rb * rings + ra])
        mark = part >> 63                   # -1 for the marks (-1 no LOR, -2 outside the radial FOV)
        inplane = part + (base & ~mark)
        end1_is_a = part & one
        plane = plane_ab * end1_is_a + plane_ba * (one - end1_is_a)
        is_delayed = np.int64(delayed[i]) if use_delayed else np.int64(0)
        inside = one
        slot = np.int64(0)
        if use_time:
            k = frame_of(time_ns[i], frame_starts, frame_ends)
            inside = np.int64(k >= 0)
            slot = k + (one - inside) * (n_frames - k)
        energy_ok = one
        if use_energy:
            ea = energy_a[i]
            eb = energy_b[i]
            energy_ok = np.int64((ea >= e_lo) & (ea <= e_hi) & (eb >= e_lo) & (eb <= e_hi))
        flags = ((one - valid) | ((one - inside) << 1) | ((one - energy_ok) << 2)
                 | (np.int64(inplane == -1) << 3) | ((plane >> 63) & 16) | (np.int64(inplane == -2) << 5))
        keep = -np.int64(flags == 0)        # all ones when binned
        code = ((slot * n_bins + plane * bins_per_plane + (inplane >> 1)) << 1) | is_delayed
        rejected = -(slot * 16 + first_reason[flags])
        codes[i] = (code & keep) | (rejected & ~keep)


@njit(cache=True, nogil=True)
def tally_and_split(codes, n_bins, n_total, tally, listing, even, odd):
    """Count a share of a batch's codes and list the increments they make, by parity of the target.

    ``tally`` (4, (n_frames + 1) * 16) gets index ``slot * 16 + field``
    (four copies taken in turn, so that equal neighbouring codes do not wait
    on each other; the caller sums them). Every binned code adds one at
    ``(code >> 1) + (code & 1) * n_total`` of the combined prompts-then-
    delayed array; those indices go to ``even`` or ``odd`` by their parity,
    so that two threads can add them without ever writing the same element.
    Returns the lengths of the two lists. Without ``listing`` (callers that
    do not add to dense sinograms) only the tally is made.

    The lists are written without jumps (each index is stored in both and
    only one length grows): the increments that follow then run in a tight
    loop, which is several times faster than testing each code there.
    """
    span = np.int64(n_bins) << 1
    k, lo = np.int64(0), np.int64(0)
    n_even = 0
    n_odd = 0
    for i in range(codes.shape[0]):
        c = codes[i]
        if c < 0:
            tally[i & 3, -c] += 1
            continue
        k, lo = frame_of_code(c, span, k, lo)
        d = c & 1
        tally[i & 3, k * 16 + PROMPTS + d] += 1
        if not listing:
            continue
        index = (c >> 1) + d * n_total
        even[n_even] = index
        odd[n_odd] = index
        parity = index & 1
        n_even += 1 - parity
        n_odd += parity
    return n_even, n_odd


@njit(cache=True, nogil=True)
def add_listed(indices, count, combined):
    """``combined[indices[i]] += 1`` for the first ``count`` indices."""
    for i in range(count):
        combined[indices[i]] += 1
