"""numba kernels of list-mode resampling: per-event weights and their histograms.

The Python function that validates inputs and calls these is
:func:`twinray.resample.bin_replicates`. Events are first classified by
:func:`twinray._binning_kernels.classify_batch` (the same lookup-table logic
as ordinary binning); these kernels only draw weights and add them up.

Random numbers are counter-based: the weight of event ``row`` (its global
row index in the study) in resampling stream ``key`` is a pure function of
``(key, row)``, namely output number ``row`` of a SplitMix64 generator whose
state starts at ``key``. No state is carried from one event or batch to the
next, so the replicates do not depend on the batch size, on the order in
which batches are processed, or on how many workers share the job.

References
----------
G. L. Steele, D. Lea and C. H. Flood, "Fast splittable pseudorandom number
generators", OOPSLA 2014 (SplitMix64; the constants are those of the
published generator).
J. A. Hanley and B. J. MacGibbon, "Creating non-parametric bootstrap samples
using Poisson frequencies", Comput Methods Programs Biomed 83(1):57-62, 2006.
"""

from __future__ import annotations

import math

import numpy as np
from numba import njit

GOLDEN_GAMMA = 0x9E3779B97F4A7C15
_MASK = (1 << 64) - 1

MODE_BOOTSTRAP = 0
MODE_THIN = 1

#: Poisson(1) CDF up to k = 20 (P(K > 20) is about 4e-20, below the 2^-53 resolution of a uniform).
POISSON1_CDF = np.cumsum([math.exp(-1.0) / math.factorial(k) for k in range(21)])
POISSON1_CDF[-1] = 1.0


def mix64(z: int) -> int:
    """SplitMix64 output function on a Python int (reference implementation)."""
    z &= _MASK
    z = ((z ^ (z >> 30)) * 0xBF58476D1CE4E5B9) & _MASK
    z = ((z ^ (z >> 27)) * 0x94D049BB133111EB) & _MASK
    return z ^ (z >> 31)


def stream_key(seed: int, stream: int) -> int:
    """Starting state of one resampling stream (replicate), from the user's seed.

    Both numbers go through the SplitMix64 output function, so neighbouring
    seeds and streams give unrelated states.
    """
    return mix64(mix64(int(seed) & _MASK) ^ mix64((int(stream) + 1) * GOLDEN_GAMMA))


def draw_uniform(key: int, row: int) -> float:
    """Uniform in [0, 1) of event ``row`` in stream ``key`` (pure-Python twin of the kernel)."""
    return (mix64(key + (int(row) + 1) * GOLDEN_GAMMA) >> 11) * 2.0 ** -53


@njit(cache=True, nogil=True, inline="always")
def _mix64(z):
    z = (z ^ (z >> np.uint64(30))) * np.uint64(0xBF58476D1CE4E5B9)
    z = (z ^ (z >> np.uint64(27))) * np.uint64(0x94D049BB133111EB)
    return z ^ (z >> np.uint64(31))


@njit(cache=True, nogil=True, inline="always")
def _uniform(key, row):
    z = _mix64(key + (np.uint64(row) + np.uint64(1)) * np.uint64(GOLDEN_GAMMA))
    return np.float64(z >> np.uint64(11)) * (1.0 / 9007199254740992.0)


@njit(cache=True, nogil=True, inline="always")
def _poisson1(u, cdf):
    # Inversion: the smallest k with u < F(k). The first six comparisons are summed
    # without branches (a Poisson(1) draw exceeds 5 with probability 6e-4), so the
    # unpredictable outcome costs no mispredicted jumps; the rare tail is walked.
    k = ((u >= cdf[0]) + (u >= cdf[1]) + (u >= cdf[2]) + (u >= cdf[3]) + (u >= cdf[4])
         + (u >= cdf[5]))
    if k == 6:
        last = cdf.shape[0] - 1
        while k < last and u >= cdf[k]:
            k += 1
    return k


@njit(cache=True, nogil=True, inline="always")
def _weight(key, row, thin, fraction, cdf):
    """Weight of event ``row`` in one stream: Bernoulli(fraction) when thinning, else Poisson(1)."""
    u = _uniform(key, row)
    if thin:
        return np.int32(u < fraction)
    return np.int32(_poisson1(u, cdf))


@njit(cache=True, nogil=True)
def event_weights(keys, first_row, n_rows, mode, fractions, cdf, out):
    """Weights of rows ``first_row .. first_row + n_rows - 1`` in every stream.

    ``out`` has shape (n_rows, n_streams). Used by the tests and for
    inspection; the binning kernel below draws the same numbers inline.
    """
    n_streams = keys.shape[0]
    for i in range(n_rows):
        row = first_row + i
        for r in range(n_streams):
            out[i, r] = _weight(keys[r], row, mode != 0, fractions[r], cdf)


@njit(cache=True, nogil=True)
def partition_codes(codes, first_row, key_div, n_keys, key_counts, sorted_codes, sorted_rows):
    """Counting sort of the binned codes (with their global rows) by ``(code >> 1) // key_div``.

    With ``key_div`` = radial bins, a key is one (plane, view) row of the
    sinogram, so that the replicate increments that follow sweep a few tens
    of kilobytes at a time instead of jumping over the whole bin-major array
    (random access is what limits binning). Returns how many codes were kept.
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


@njit(cache=True, nogil=True)
def accumulate_weighted_rows(codes, rows, count, keys, mode, fractions, cdf, prompts, delayed, totals):
    """Add partitioned binned codes, each with its global row index, with their weight per stream.

    ``codes``/``rows`` come from :func:`partition_codes` (``count`` of them);
    ``prompts``/``delayed`` are int32 arrays of shape (n_bins * n_streams,),
    bin-major (all streams of a bin side by side, so one event touches one
    cache line whatever the number of replicates); ``totals`` (n_streams, 2)
    collects the sums of weights of prompts and delayed; ``mode`` 0 draws
    Poisson(1) weights (bootstrap), 1 Bernoulli(fraction) (thinning).
    """
    n_streams = keys.shape[0]
    thin = mode != 0
    for i in range(count):
        c = codes[i]
        row = rows[i]
        base = (c >> 1) * n_streams
        is_delayed = c & 1
        target = delayed if is_delayed else prompts
        # No branch on the weight itself: zero weights are added like any other.
        for r in range(n_streams):
            w = _weight(keys[r], row, thin, fractions[r], cdf)
            target[base + r] += w
            totals[r, is_delayed] += w


@njit(cache=True, nogil=True)
def unweave(flat, n_streams, out):
    """Bin-major ``flat[bin * n_streams + r]`` -> stream-major ``out[r, bin]``.

    One sequential read and ``n_streams`` sequential write streams (memory
    bandwidth bound, unlike a strided numpy transpose of a tall array).
    """
    n_bins = out.shape[1]
    for b in range(n_bins):
        base = b * n_streams
        for r in range(n_streams):
            out[r, b] = flat[base + r]
