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
    # Inversion: the smallest k with u < F(k); 1.58 comparisons on average.
    k = 0
    last = cdf.shape[0] - 1
    while k < last and u >= cdf[k]:
        k += 1
    return k


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
            u = _uniform(keys[r], row)
            if mode == 0:
                out[i, r] = _poisson1(u, cdf)
            else:
                out[i, r] = 1 if u < fractions[r] else 0


@njit(cache=True, nogil=True)
def accumulate_weighted(codes, first_row, keys, mode, fractions, cdf, prompts, delayed, totals):
    """Add every binned event, with its weight per stream, to the replicate sinograms.

    Parameters
    ----------
    codes : int64 array
        Codes of :func:`twinray._binning_kernels.classify_batch` (frame 0
        only): ``flat_bin << 1 | is_delayed``, or negative when rejected.
    first_row : int
        Global row index of ``codes[0]``.
    keys : uint64 array, shape (n_streams,)
    mode : int
        0: Poisson(1) weights (bootstrap); 1: Bernoulli(fraction) (thinning).
    fractions : float64 array, shape (n_streams,)
    cdf : float64 array
        Poisson(1) CDF table.
    prompts, delayed : int32 arrays, shape (n_bins * n_streams,)
        Bin-major layout (all streams of a bin side by side), so one event
        touches one cache line whatever the number of replicates.
    totals : int64 array, shape (n_streams, 2)
        Sum of weights of prompts and delayed per stream.
    """
    n_streams = keys.shape[0]
    for i in range(codes.shape[0]):
        c = codes[i]
        if c < 0:
            continue
        row = first_row + i
        base = (c >> 1) * n_streams
        is_delayed = c & 1
        for r in range(n_streams):
            u = _uniform(keys[r], row)
            if mode == 0:
                w = _poisson1(u, cdf)
            else:
                w = 1 if u < fractions[r] else 0
            if w:
                if is_delayed:
                    delayed[base + r] += w
                else:
                    prompts[base + r] += w
                totals[r, is_delayed] += w
