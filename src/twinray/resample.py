"""Count-level noise studies by resampling list-mode events.

Two ways of making many statistically faithful copies ("replicates") of one
acquisition, all binned in one pass over the events without holding them in
memory:

* **Poisson bootstrap** (Hanley & MacGibbon 2006): every event enters each
  replicate an independent Poisson(1) number of times. A bin with ``n``
  events then has replicate counts of mean ``n`` and variance ``n``, the
  Poisson variance of the measurement, and the spread of images
  reconstructed from the replicates estimates the noise of this scan
  (Dahlbom 2002 for list-mode PET).
* **Binomial thinning**: every event is kept with probability ``P``. A
  thinned Poisson process is a Poisson process of ``P`` times the rate
  (colouring theorem; Kingman 1993), so a thinned replicate is a scan of
  ``P`` times the duration (or of a scanner ``P`` times as sensitive). It
  emulates a shorter scan, not a lower injected activity: randoms and dead
  time scale differently with activity. Thinned replicates are reconstructed
  as scans of ``P`` times the duration, so their mean image estimates the
  same concentration and only the noise changes.

Weights come from a counter-based generator keyed on ``(seed, replicate,
global row index)`` (:mod:`twinray._resample_kernels`), so a replicate is the
same whatever the batch size, the order batches are processed in, or the
number of workers.

References
----------
J. A. Hanley and B. J. MacGibbon, "Creating non-parametric bootstrap samples
using Poisson frequencies", Comput Methods Programs Biomed 83(1):57-62, 2006.
M. Dahlbom, "Estimation of image noise in PET using the bootstrap method",
IEEE Trans Nucl Sci 49(5):2062-2066, 2002.
J. F. C. Kingman, Poisson Processes, Oxford University Press, 1993
(colouring theorem).
"""

from __future__ import annotations

import dataclasses

import numpy as np

from . import _binning_kernels as binning_kernels
from . import _resample_kernels as kernels
from .accounting import Accounting
from .binning import _energy_window, empty_state, seconds_to_ns
from .errors import TwinrayInputError
from .events import DEFAULT_BATCH_SIZE, EventSource, iter_event_batches, open_events
from .geometry import SinogramGeometry, sinogram_geometry

MODES = ("bootstrap", "thin")

#: Default memory budget for the replicate sinograms held at once (bytes);
#: above it the events are read again for the next group of replicates.
DEFAULT_MEMORY_BYTES = 2 << 30


@dataclasses.dataclass(frozen=True, eq=False)
class ReplicateState:
    """Binned replicates of one acquisition.

    Attributes
    ----------
    geometry : SinogramGeometry
    frame_s : (float, float)
        The time window resampled, s from acquisition start.
    mode : str
        ``"bootstrap"`` or ``"thin"``.
    seed : int
    fractions : ndarray, shape (n_streams,)
        Thinning probability of every replicate (1 for the bootstrap).
    replicate : ndarray of int, shape (n_streams,)
        Replicate number within its fraction.
    prompts : ndarray of int32, shape (n_streams, planes, views, radial_bins)
    delayed : ndarray of int32, same shape, or None
        None when the events have no delayed channel.
    totals : ndarray of int64, shape (n_streams, 2)
        Prompts and delayed counts of every replicate.
    accounting : Accounting
        Of the original events (every row read is binned or rejected once,
        whatever the replicates do with it).
    passes : int
        Passes over the events (1 unless the replicates exceeded the memory budget).
    """

    geometry: SinogramGeometry
    frame_s: tuple
    mode: str
    seed: int
    fractions: np.ndarray
    replicate: np.ndarray
    prompts: np.ndarray
    delayed: np.ndarray | None
    totals: np.ndarray
    accounting: Accounting
    passes: int = 1

    @property
    def n_streams(self) -> int:
        return len(self.fractions)


def check_resampling(mode: str, replicates: int, fractions) -> tuple:
    """Validate the resampling options; returns the fractions as a tuple of floats."""
    if mode not in MODES:
        raise TwinrayInputError(f"resampling mode must be bootstrap or thin, got '{mode}'")
    if isinstance(replicates, bool) or int(replicates) != replicates or replicates < 2:
        raise TwinrayInputError(f"--replicates must be an integer >= 2 (a standard deviation needs two), "
                                f"got {replicates}")
    if mode == "bootstrap":
        if fractions not in (None, (), [], (1.0,), [1.0]):
            raise TwinrayInputError("--fraction applies to --mode thin only")
        return (1.0,)
    if fractions is None or len(fractions) == 0:
        raise TwinrayInputError("--mode thin needs --fraction P (0 < P <= 1), e.g. --fraction 0.5 or 0.1,0.25,0.5")
    out = []
    for p in fractions:
        p = float(p)
        if not (0.0 < p <= 1.0):
            raise TwinrayInputError(f"--fraction must lie in (0, 1], got {p:g}")
        if p in out:
            raise TwinrayInputError(f"--fraction {p:g} is given twice")
        out.append(p)
    return tuple(out)


def parse_fractions(text: str) -> tuple:
    """``"0.1,0.25,0.5"`` -> (0.1, 0.25, 0.5)."""
    try:
        return tuple(float(v) for v in str(text).split(",") if v.strip())
    except ValueError:
        raise TwinrayInputError(f"--fraction must be numbers like 0.1,0.25,0.5, got '{text}'") from None


def stream_keys(seed: int, fractions, replicates: int) -> tuple:
    """Generator keys, fractions and replicate numbers of every stream.

    Stream ``f * 2**32 + r`` is replicate ``r`` of fraction number ``f``; its
    key depends only on the seed and these two numbers, so replicate ``r`` is
    the same whatever the total number of replicates asked for.
    """
    if isinstance(seed, bool) or int(seed) != seed or seed < 0:
        raise TwinrayInputError(f"--seed must be an integer >= 0, got {seed}")
    keys, frac, rep = [], [], []
    for f, p in enumerate(fractions):
        for r in range(int(replicates)):
            keys.append(kernels.stream_key(int(seed), (f << 32) + r))
            frac.append(p)
            rep.append(r)
    return np.array(keys, dtype=np.uint64), np.array(frac, dtype=np.float64), np.array(rep, dtype=np.int64)


def bin_replicates(events, geometry: SinogramGeometry | None = None, *, mode: str = "bootstrap",
                   replicates: int = 20, fractions=None, seed: int = 0, frame=None, rebin: str = "none",
                   scanner=None, batch_size: int = DEFAULT_BATCH_SIZE, energy_window=True,
                   memory_bytes: int = DEFAULT_MEMORY_BYTES, progress=None) -> ReplicateState:
    """Bin resampled replicates of an event study, all in one streaming pass.

    Parameters
    ----------
    events : path-like or EventSource
    geometry : SinogramGeometry, optional
        Default ``sinogram_geometry(scanner, rebin)``.
    mode : {"bootstrap", "thin"}
    replicates : int
        Replicates per fraction (>= 2).
    fractions : sequence of float, optional
        Thinning probabilities ``0 < P <= 1`` (``mode="thin"`` only).
    seed : int
        Same seed, same replicates.
    frame : (start_s, end_s), optional
        Resample only events in this half-open window (checked against the
        data by the caller); default every event.
    rebin, scanner, batch_size, energy_window
        As in :func:`twinray.binning.bin_events`.
    memory_bytes : int
        Budget for the replicate sinograms; with more replicates than fit,
        the events are read once per group of replicates.
    progress : callable, optional
        Called with the number of rows after each batch (of each pass).

    Returns
    -------
    ReplicateState
    """
    fractions = check_resampling(mode, replicates, fractions)
    source = events if isinstance(events, EventSource) else open_events(events, scanner)
    if geometry is None:
        geometry = sinogram_geometry(source.scanner, rebin)
    keys, stream_fraction, stream_replicate = stream_keys(seed, fractions, replicates)
    n_streams = len(keys)
    with_delayed = source.has_delayed
    per_stream = geometry.n_bins * 4 * (2 if with_delayed else 1)
    group = max(1, min(n_streams, int(memory_bytes // max(per_stream, 1))))

    frames = None if frame is None else [tuple(frame)]
    counting = empty_state(geometry, frames, with_delayed=False)
    window = _energy_window(energy_window, geometry.scanner, source.has_energy)
    columns = ["crystal_a", "crystal_b"]
    use_time = frames is not None
    if use_time:
        columns.insert(0, "time_ns")
    if with_delayed:
        columns.append("delayed")
    if window is not None:
        columns += ["energy_a_kev", "energy_b_kev"]
    lo, hi = window if window is not None else (0.0, 0.0)
    starts = np.array([seconds_to_ns(frame[0])] if use_time else [0], np.int64)
    ends = np.array([seconds_to_ns(frame[1])] if use_time else [np.iinfo(np.int64).max], np.int64)
    inplane = np.ascontiguousarray(geometry.inplane_bin, dtype=np.int32)
    end1 = np.ascontiguousarray(geometry.inplane_end1_is_a, dtype=np.bool_)
    rings = np.ascontiguousarray(geometry.plane_of_rings, dtype=np.int32)
    sc = geometry.scanner
    empty_i64 = np.zeros(0, np.int64)
    empty_bool = np.zeros(0, np.bool_)
    empty_f32 = np.zeros(0, np.float32)

    prompts = np.zeros((n_streams,) + geometry.shape, np.int32)
    delayed = np.zeros((n_streams,) + geometry.shape, np.int32) if with_delayed else None
    totals = np.zeros((n_streams, 2), np.int64)
    passes = 0
    for g0 in range(0, n_streams, group):
        g1 = min(n_streams, g0 + group)
        m = g1 - g0
        # Bin-major layout: all replicates of a bin side by side (one cache line per event).
        p_flat = np.zeros(geometry.n_bins * m, np.int32)
        d_flat = np.zeros(geometry.n_bins * m if with_delayed else 1, np.int32)
        group_totals = np.zeros((m, 2), np.int64)
        counts = np.zeros_like(counting.counts)
        codes = np.zeros(0, np.int64)
        for first_row, arrays in iter_event_batches(source, columns, batch_size, prefetch=2):
            n = len(arrays["crystal_a"])
            if len(codes) < n:
                codes = np.empty(n, np.int64)
            c = codes[:n]
            d = arrays["delayed"] if with_delayed else empty_bool
            binning_kernels.classify_batch(
                arrays["crystal_a"], arrays["crystal_b"], arrays["time_ns"] if use_time else empty_i64, use_time,
                d, with_delayed, arrays["energy_a_kev"] if window else empty_f32,
                arrays["energy_b_kev"] if window else empty_f32, window is not None, np.float32(lo),
                np.float32(hi), starts, ends, sc.crystals_per_ring, sc.n_crystals, inplane, end1, rings,
                geometry.views * geometry.radial_bins, geometry.n_bins, c, counts)
            kernels.accumulate_weighted(c, np.int64(first_row), keys[g0:g1], 0 if mode == "bootstrap" else 1,
                                        stream_fraction[g0:g1], kernels.POISSON1_CDF, p_flat, d_flat,
                                        group_totals)
            if progress is not None:
                progress(n)
        passes += 1
        if g0 == 0:
            counting.counts[:] = counts
        prompts[g0:g1] = p_flat.reshape(geometry.n_bins, m).T.reshape((m,) + geometry.shape)
        if with_delayed:
            delayed[g0:g1] = d_flat.reshape(geometry.n_bins, m).T.reshape((m,) + geometry.shape)
        totals[g0:g1] = group_totals
    frame_s = tuple(frame) if frame is not None else (0.0, float(source.duration_s or 0.0))
    return ReplicateState(geometry=geometry, frame_s=frame_s, mode=mode, seed=int(seed),
                          fractions=stream_fraction, replicate=stream_replicate, prompts=prompts,
                          delayed=delayed, totals=totals, accounting=counting.accounting(0), passes=passes)


def replicate_weights(seed: int, mode: str, fractions, replicates: int, first_row: int, n_rows: int) -> np.ndarray:
    """The weight of rows ``first_row ..`` in every replicate, shape (n_rows, n_streams).

    The same numbers :func:`bin_replicates` uses (for checks and inspection).
    """
    fractions = check_resampling(mode, replicates, fractions)
    keys, frac, _ = stream_keys(seed, fractions, replicates)
    out = np.zeros((int(n_rows), len(keys)), np.int64)
    kernels.event_weights(keys, np.int64(first_row), int(n_rows), 0 if mode == "bootstrap" else 1, frac,
                          kernels.POISSON1_CDF, out)
    return out


def voxel_statistics(images: np.ndarray) -> tuple:
    """Voxel-wise mean, standard deviation (ddof = 1) and coefficient of variation.

    Parameters
    ----------
    images : ndarray, shape (replicates, ...)

    Returns
    -------
    mean, std, cov : ndarray (float32), shape ``images.shape[1:]``
        ``cov = std / mean``, 0 where the mean is 0 (and where it is
        negative, where a relative noise has no meaning).
    """
    images = np.asarray(images, dtype=np.float64)
    if images.shape[0] < 2:
        raise TwinrayInputError("a standard deviation over replicates needs at least two of them")
    mean = images.mean(axis=0)
    std = images.std(axis=0, ddof=1)
    cov = np.divide(std, mean, out=np.zeros_like(mean), where=mean > 0)
    return mean.astype(np.float32), std.astype(np.float32), cov.astype(np.float32)


def expected_relative_noise(counts) -> np.ndarray:
    """``1/sqrt(counts)``: relative noise of a Poisson count (for plots of noise against counts)."""
    counts = np.asarray(counts, dtype=np.float64)
    return np.divide(1.0, np.sqrt(counts), out=np.full_like(counts, np.nan), where=counts > 0)
