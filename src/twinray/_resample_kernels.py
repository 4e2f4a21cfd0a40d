"""numba kernels of list-mode resampling: per-event weights and their histograms.

The Python function that validates inputs and calls these is
:func:`twinray.resample.bin_replicates`. Events are first classified by
:func:`twinray._binning_kernels.classify_batch` (the same lookup-table logic
as ordinary binning); these kernels only draw weights and add them up.

Random numbers are counter-based. Replicates come in pairs: the two
replicates ``2p`` and ``2p + 1`` of one thinning fraction share a generator
whose key depends only on the seed, the fraction number and ``p``
(:func:`stream_key`). For the event with global row index ``row``, output
number ``row`` of a SplitMix64 generator started at that key is one 64-bit
number; its high 32 bits are the uniform of replicate ``2p`` and its low 32
bits that of replicate ``2p + 1``. So the weight of (replicate, row) is a
pure function of ``(seed, fraction, replicate, row)``: no state is carried
from one event or batch to the next, and the replicates do not depend on
the batch size, on the order in which batches are processed, on how many
replicates are asked for, or on how many workers share the job.

Exactness. A uniform is an integer ``u`` in ``[0, 2**32)``, i.e. a
resolution of ``2**-32``. The Poisson(1) weight is found by inversion
against integer thresholds ``T[k] = ceil(F(k) * 2**32)`` of the Poisson(1)
CDF ``F`` (computed to 60 digits): the weight is the smallest ``k`` with
``u < T[k]``, which is exactly "the smallest ``k`` with ``u / 2**32 < F(k)``".
Each probability ``P(K = k)`` is therefore that of Poisson(1) to within
``2**-32`` (2.3e-10), and since ``T[12] = 2**32`` a weight never exceeds 12:
the tail ``P(K > 12)`` (6.4e-11) is folded into ``K = 12``. A 4096-entry
table on the top 12 bits of ``u`` answers directly when its cell lies between
two thresholds, and the comparisons settle the 7 cells a threshold splits
(0.17 % of draws): the table is a shortcut, the result is that of the
comparisons.
Thinning with probability ``P`` keeps an event when ``u < round(P * 2**32)``:
a Bernoulli draw with probability within ``2**-33`` of ``P``, exactly 1 for
``P = 1``.

References
----------
G. L. Steele, D. Lea and C. H. Flood, "Fast splittable pseudorandom number
generators", OOPSLA 2014 (SplitMix64; the constants are those of the
published generator).
J. A. Hanley and B. J. MacGibbon, "Creating non-parametric bootstrap samples
using Poisson frequencies", Comput Methods Programs Biomed 83(1):57-62, 2006.
"""

from __future__ import annotations

from decimal import ROUND_CEILING, Decimal, localcontext
from fractions import Fraction

import numpy as np
from llvmlite import ir
from numba import njit, prange
from numba.core import cgutils, types
from numba.extending import intrinsic

GOLDEN_GAMMA = 0x9E3779B97F4A7C15
_MASK = (1 << 64) - 1
UNIFORM_BITS = 32

MODE_BOOTSTRAP = 0
MODE_THIN = 1


def poisson1_thresholds(bits: int = UNIFORM_BITS) -> np.ndarray:
    """Integer inversion thresholds ``ceil(F(k) * 2**bits)`` of the Poisson(1) CDF ``F``.

    Only the thresholds below ``2**bits`` are returned: with ``n`` of them a
    weight lies in ``0 .. n``. ``F(k) = exp(-1) * sum_{j<=k} 1/j!`` is summed
    with 60 significant digits, so every threshold is exact.
    """
    out = []
    with localcontext() as ctx:
        ctx.prec = 60
        e_minus_1 = Decimal(-1).exp()
        term, cdf = Decimal(1), Decimal(0)
        k = 0
        while True:
            if k:
                term /= k
            cdf += e_minus_1 * term
            t = int((cdf * (1 << bits)).to_integral_value(rounding=ROUND_CEILING))
            if t >= 1 << bits:
                break
            out.append(t)
            k += 1
    return np.array(out, dtype=np.int64)


#: Poisson(1) inversion thresholds on 32-bit uniforms (12 of them).
POISSON1_THRESHOLDS = poisson1_thresholds()
#: Largest weight a Poisson(1) draw can take (12): P(K > 12) = 6.4e-11 is folded into K = 12.
MAX_WEIGHT = len(POISSON1_THRESHOLDS)
#: Bits of the uniform looked up in the shortcut table.
TABLE_BITS = 12
_NO_ENTRY = 255


def _poisson1_table() -> np.ndarray:
    """Weight of every cell of the top ``TABLE_BITS`` bits, or 255 when a threshold splits the cell."""
    shift = UNIFORM_BITS - TABLE_BITS
    cells = np.arange(1 << TABLE_BITS, dtype=np.int64)
    first = np.searchsorted(POISSON1_THRESHOLDS, cells << shift, side="right")
    last = np.searchsorted(POISSON1_THRESHOLDS, ((cells + 1) << shift) - 1, side="right")
    return np.where(first == last, first, _NO_ENTRY).astype(np.uint8)


POISSON1_TABLE = _poisson1_table()


def thin_threshold(fraction: float) -> int:
    """``round(P * 2**32)``: an event is kept when its 32-bit uniform is below it."""
    return int(round(Fraction(float(fraction)) * (1 << UNIFORM_BITS)))


def mix64(z: int) -> int:
    """SplitMix64 output function on a Python int (reference implementation)."""
    z &= _MASK
    z = ((z ^ (z >> 30)) * 0xBF58476D1CE4E5B9) & _MASK
    z = ((z ^ (z >> 27)) * 0x94D049BB133111EB) & _MASK
    return z ^ (z >> 31)


def stream_key(seed: int, stream: int) -> int:
    """Starting state of one generator (a pair of replicates), from the user's seed.

    Both numbers go through the SplitMix64 output function, so neighbouring
    seeds and generators give unrelated states.
    """
    return mix64(mix64(int(seed) & _MASK) ^ mix64((int(stream) + 1) * GOLDEN_GAMMA))


def draw_u32(key: int, row: int, half: int) -> int:
    """32-bit uniform of event ``row`` from generator ``key``: ``half`` 0 the high bits, 1 the low bits.

    Pure-Python twin of the kernels' draw.
    """
    z = mix64(key + (int(row) + 1) * GOLDEN_GAMMA)
    return (z >> 32) if half == 0 else (z & 0xFFFFFFFF)


def draw_uniform(key: int, row: int, half: int) -> float:
    """The same draw as a float in [0, 1), resolution 2**-32."""
    return draw_u32(key, row, half) * 2.0 ** -UNIFORM_BITS


def poisson1_weight(u: int) -> int:
    """Poisson(1) weight of a 32-bit uniform by inversion (pure-Python twin)."""
    return int(np.searchsorted(POISSON1_THRESHOLDS, int(u), side="right"))


@njit(cache=True, nogil=True, inline="always")
def _mix64(z):
    z = (z ^ (z >> np.uint64(30))) * np.uint64(0xBF58476D1CE4E5B9)
    z = (z ^ (z >> np.uint64(27))) * np.uint64(0x94D049BB133111EB)
    return z ^ (z >> np.uint64(31))


@njit(cache=True, nogil=True, inline="always")
def _poisson1(u):
    # Shortcut table on the top bits; the comparisons decide the few cells a threshold splits.
    w = POISSON1_TABLE[u >> (UNIFORM_BITS - TABLE_BITS)]
    if w == _NO_ENTRY:
        w = 0
        for k in range(MAX_WEIGHT):
            w += u >= POISSON1_THRESHOLDS[k]
    return w


@njit(cache=True, nogil=True, inline="always")
def _draw_weights(keys, row, thin, thresholds, mixed, out, i):
    """Weights of event ``row`` in every slot: ``out[i, g]`` (high half of generator ``g``),
    ``out[i, G + g]`` (low half). ``mixed`` is scratch of shape (G,)."""
    n_gen = keys.shape[0]
    step = (np.uint64(row) + np.uint64(1)) * np.uint64(GOLDEN_GAMMA)
    # The generator outputs first, in a loop of plain arithmetic the compiler vectorizes.
    for g in range(n_gen):
        mixed[g] = _mix64(keys[g] + step)
    for g in range(n_gen):
        hi = np.int64(mixed[g] >> np.uint64(32))
        lo = np.int64(mixed[g] & np.uint64(0xFFFFFFFF))
        if thin:
            out[i, g] = hi < thresholds[g]
            out[i, n_gen + g] = lo < thresholds[n_gen + g]
        else:
            out[i, g] = _poisson1(hi)
            out[i, n_gen + g] = _poisson1(lo)


@intrinsic
def _prefetch_for_write(typingctx, array, index):
    """Hint the cache to fetch ``array[index]`` for writing (llvm.prefetch; no effect on results)."""
    sig = types.void(array, index)

    def codegen(context, builder, signature, args):
        aryty = signature.args[0]
        ary = context.make_array(aryty)(context, builder, args[0])
        ptr = cgutils.get_item_pointer(context, builder, aryty, ary, [args[1]], wraparound=False)
        i8p = ir.IntType(8).as_pointer()
        i32 = ir.IntType(32)
        fnty = ir.FunctionType(ir.VoidType(), [i8p, i32, i32, i32])
        fn = cgutils.get_or_insert_function(builder.module, fnty, "llvm.prefetch.p0i8")
        # rw = 1 (write), locality = 3 (keep in all cache levels), cache type = 1 (data)
        builder.call(fn, [builder.bitcast(ptr, i8p), ir.Constant(i32, 1), ir.Constant(i32, 3), ir.Constant(i32, 1)])
        return context.get_dummy_value()

    return sig, codegen


@njit(cache=True, nogil=True)
def event_weights(keys, first_row, n_rows, mode, thresholds, out):
    """Weights of rows ``first_row .. first_row + n_rows - 1`` in every slot.

    ``keys`` (G,) are the generator keys; ``out`` has shape (n_rows, 2 G):
    column ``g`` is the high-half replicate of generator ``g``, column
    ``G + g`` its low-half replicate. ``mode`` 0 draws Poisson(1) weights, 1
    Bernoulli weights with the per-slot integer ``thresholds`` (2 G,).
    Used by the tests and for inspection; the binning kernel draws the same
    numbers.
    """
    mixed = np.empty(keys.shape[0], np.uint64)
    for i in range(n_rows):
        _draw_weights(keys, first_row + i, mode != 0, thresholds, mixed, out, i)


@njit(cache=True, nogil=True)
def partition_codes(codes, first_row, key_div, n_keys, key_counts, sorted_codes, sorted_rows):
    """Counting sort of the binned codes (with their global rows) by ``(code >> 1) // key_div``.

    With ``key_div`` a multiple of the radial bins, a key is a block of
    (plane, view) rows of the sinogram, so that the replicate increments that
    follow sweep the working array in order instead of jumping over all of
    it (random access is what limits binning). Returns how many codes were
    kept; afterwards ``key_counts[k]`` is the end of key ``k`` in the sorted
    arrays.
    """
    key_counts[:] = 0
    n = codes.shape[0]
    for i in range(n):
        c = codes[i]
        if c >= 0:
            key_counts[(c >> 1) // key_div + 1] += 1
    for k in range(n_keys):
        key_counts[k + 1] += key_counts[k]
    for i in range(n):
        c = codes[i]
        if c >= 0:
            k = (c >> 1) // key_div
            j = key_counts[k]
            sorted_codes[j] = c
            sorted_rows[j] = first_row + i
            key_counts[k] = j + 1
    return key_counts[n_keys - 1] if n_keys > 0 else 0


#: Events whose weights are drawn together before they are added (fits in L1 with 20 replicates).
_BLOCK = 256
#: How many events ahead the working array is prefetched.
_PREFETCH_AHEAD = 24
#: A cell is emptied into the int32 output once it exceeds this (so a uint8 never overflows).
SPILL_ABOVE = 255 - MAX_WEIGHT


@njit(cache=True, nogil=True)
def _accumulate_range(codes, rows, start, stop, keys, thin, thresholds, work_prompts, work_delayed,
                      slot_stream, out_prompts, out_delayed, row_div, spilled_rows, totals):
    n_slots = 2 * keys.shape[0]
    weights = np.empty((_BLOCK, n_slots), np.uint8)
    mixed = np.empty(keys.shape[0], np.uint64)
    for i0 in range(start, stop, _BLOCK):
        nb = min(_BLOCK, stop - i0)
        # Draw first (a compute-bound loop), then add (a memory-bound loop whose loads the
        # prefetches overlap).
        for i in range(nb):
            _draw_weights(keys, rows[i0 + i], thin, thresholds, mixed, weights, i)
        for i in range(nb):
            ahead = i0 + i + _PREFETCH_AHEAD
            if ahead < stop:
                c2 = codes[ahead]
                _prefetch_for_write(work_delayed if c2 & 1 else work_prompts, (c2 >> 1) * n_slots)
            c = codes[i0 + i]
            is_delayed = c & 1
            work = work_delayed if is_delayed else work_prompts
            b = c >> 1
            base = b * n_slots
            top = 0
            for s in range(n_slots):
                v = work[base + s] + weights[i, s]
                work[base + s] = v
                top = max(top, v)
                totals[is_delayed, s] += weights[i, s]
            if top > SPILL_ABOVE:
                # Rare (a bin with hundreds of events): empty the cell into the int32 output;
                # every cell was <= SPILL_ABOVE before this event, so none has wrapped.
                out = out_delayed if is_delayed else out_prompts
                for s in range(n_slots):
                    r = slot_stream[s]
                    if r >= 0:
                        out[r, b] += work[base + s]
                    work[base + s] = 0
                spilled_rows[b // row_div] = 1


@njit(cache=True, parallel=True)
def accumulate_replicates(codes, rows, key_ends, n_parts, keys, mode, thresholds, work_prompts, work_delayed,
                          slot_stream, out_prompts, out_delayed, row_div, spilled_rows, totals):
    """Add partitioned binned codes, each with its global row index, with their weight per replicate.

    Parameters
    ----------
    codes, rows : ndarray of int64
        From :func:`partition_codes`: ``flat_bin << 1 | delayed`` sorted by
        sinogram row, and the global row index of each event.
    key_ends : ndarray of int64
        End of every key's events in ``codes`` (``key_counts`` of
        :func:`partition_codes`); the work is split at these boundaries, so
        parallel parts never touch the same bin.
    n_parts : int
        Parts worked on in parallel.
    keys : ndarray of uint64, shape (G,)
        Generator keys; slot ``g`` is the high-half replicate of generator
        ``g``, slot ``G + g`` the low-half one.
    mode : int
        0 Poisson(1) weights (bootstrap), 1 Bernoulli weights (thinning) with
        the per-slot integer ``thresholds`` (2 G,).
    work_prompts, work_delayed : ndarray of uint8, shape (n_bins * 2 G,)
        Bin-major working counts (all slots of a bin side by side, so an
        event touches one cache line whatever the number of replicates).
    slot_stream : ndarray of int64, shape (2 G,)
        Replicate (row of ``out_*``) of every slot, -1 for an unused slot.
    out_prompts, out_delayed : ndarray of int32, shape (replicates, n_bins)
        Where full working cells are emptied; :func:`unweave_add` adds the rest.
    row_div : int
        Bins per sinogram row; ``spilled_rows[bin // row_div]`` is set when a
        cell of that row was emptied into ``out_*``.
    totals : ndarray of int64, shape (n_parts, 2, 2 G)
        Sums of the weights of prompts and delayed events per part and slot.
    """
    count = key_ends[key_ends.shape[0] - 1] if key_ends.shape[0] > 0 else 0
    n_keys = key_ends.shape[0]
    for part in prange(n_parts):
        # Part boundaries at key boundaries: parts write disjoint bins.
        k0 = (n_keys * part) // n_parts
        k1 = (n_keys * (part + 1)) // n_parts
        start = key_ends[k0 - 1] if k0 > 0 else 0
        stop = key_ends[k1 - 1] if k1 > 0 else 0
        if stop > count:
            stop = count
        _accumulate_range(codes, rows, start, stop, keys, mode != 0, thresholds, work_prompts, work_delayed,
                          slot_stream, out_prompts, out_delayed, row_div, spilled_rows, totals[part])


@njit(cache=True, parallel=True)
def unweave_add(work, n_slots, slot_stream, row_div, spilled_rows, out):
    """Bin-major working counts ``work[bin * n_slots + s]`` -> replicate-major ``out[slot_stream[s], bin]``.

    Rows of the sinogram where a cell was emptied early (``spilled_rows``)
    are added to ``out``; the others are written (first touch of fresh
    pages with no read). A sinogram row of working counts (a few kilobytes)
    stays in cache while it is written out replicate by replicate; rows are
    shared among the threads.
    """
    n_rows = spilled_rows.shape[0]
    for k in prange(n_rows):
        b0 = k * row_div
        add = spilled_rows[k] != 0
        for s in range(n_slots):
            r = slot_stream[s]
            if r < 0:
                continue
            target = out[r]
            if add:
                for j in range(row_div):
                    target[b0 + j] += np.int32(work[(b0 + j) * n_slots + s])
            else:
                for j in range(row_div):
                    target[b0 + j] = np.int32(work[(b0 + j) * n_slots + s])
