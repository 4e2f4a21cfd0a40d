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

Weights come from a counter-based generator: the weight of an event in a
replicate is a pure function of ``(seed, fraction, replicate, global row
index)`` (:mod:`twinray._resample_kernels`, which also states the resolution
of the draws), so a replicate is the same whatever the batch size, the order
batches are processed in, the number of replicates asked for, or the number
of workers.

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

import ctypes
import dataclasses
import math
import mmap
import sys
import threading

import numpy as np

from . import _resample_kernels as kernels
from .accounting import Accounting
from .binning import _Binner, _energy_window, empty_state
from .errors import TwinrayInputError
from .events import DEFAULT_BATCH_SIZE, EventSource, iter_event_batches, open_events
from .geometry import SinogramGeometry, sinogram_geometry

MODES = ("bootstrap", "thin")

#: Working counts of one block of sinogram rows that events are sorted by (bytes; a share of a core's L2).
_BLOCK_BYTES = 128 << 10

#: Default memory budget for the bin-major working copy of the replicates
#: (bytes); above it the events are read again for the next group of replicates.
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


def check_resampling(mode: str, replicates: int, fractions, min_replicates: int = 2) -> tuple:
    """Validate the resampling options; returns the fractions as a tuple of floats.

    ``min_replicates`` is 2 for a noise study (a standard deviation needs two)
    and 1 for binning alone.
    """
    if mode not in MODES:
        raise TwinrayInputError(f"resampling mode must be bootstrap or thin, got '{mode}'")
    if isinstance(replicates, bool) or int(replicates) != replicates or replicates < min_replicates:
        raise TwinrayInputError(f"--replicates must be an integer >= {min_replicates} (a standard deviation "
                                f"needs two), got {replicates}")
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


@dataclasses.dataclass(frozen=True)
class ReplicatePlan:
    """Which generator draws the weights of which replicate.

    Replicates ``2p`` and ``2p + 1`` of fraction number ``f`` share generator
    ``(f, p)`` (high and low 32 bits of its output); replicate ``r`` of
    fraction ``f`` is stream ``f * replicates + r``.

    Attributes
    ----------
    keys : ndarray of uint64, shape (generators,)
        Starting state of every generator.
    thresholds : ndarray of int64, shape (generators,)
        Thinning threshold of every generator (``round(P * 2**32)``; unused by the bootstrap).
    high_stream, low_stream : ndarray of int64, shape (generators,)
        Stream that takes the high and the low half; -1 for none (odd replicate counts).
    fractions : ndarray of float64, shape (streams,)
        Thinning probability of every stream (1 for the bootstrap).
    replicate : ndarray of int64, shape (streams,)
        Replicate number within its fraction.
    """

    keys: np.ndarray
    thresholds: np.ndarray
    high_stream: np.ndarray
    low_stream: np.ndarray
    fractions: np.ndarray
    replicate: np.ndarray

    @property
    def n_generators(self) -> int:
        return len(self.keys)

    @property
    def n_streams(self) -> int:
        return len(self.fractions)

    def slots(self, g0: int, g1: int) -> tuple:
        """Keys, per-slot thresholds, per-slot streams (relative to the first) and the stream range
        of generators ``g0 .. g1 - 1``: slot ``g`` is the high half of generator ``g0 + g``, slot
        ``(g1 - g0) + g`` its low half."""
        keys = np.ascontiguousarray(self.keys[g0:g1])
        thresholds = np.concatenate([self.thresholds[g0:g1], self.thresholds[g0:g1]])
        streams = np.concatenate([self.high_stream[g0:g1], self.low_stream[g0:g1]])
        s0 = int(streams[streams >= 0].min())
        s1 = int(streams.max()) + 1
        local = np.where(streams >= 0, streams - s0, -1).astype(np.int64)
        return keys, thresholds, local, s0, s1


def replicate_plan(seed: int, fractions, replicates: int) -> ReplicatePlan:
    """Generator keys and the replicate each half of their output goes to.

    The key of generator ``(f, p)`` depends only on the seed, the fraction
    number and ``p``, so replicate ``r`` is the same whatever the total
    number of replicates asked for.
    """
    if isinstance(seed, bool) or int(seed) != seed or seed < 0:
        raise TwinrayInputError(f"--seed must be an integer >= 0, got {seed}")
    replicates = int(replicates)
    keys, thresholds, high, low, frac, rep = [], [], [], [], [], []
    for f, p in enumerate(fractions):
        for pair in range((replicates + 1) // 2):
            keys.append(kernels.stream_key(int(seed), (f << 32) + pair))
            thresholds.append(kernels.thin_threshold(p))
            high.append(f * replicates + 2 * pair)
            low.append(f * replicates + 2 * pair + 1 if 2 * pair + 1 < replicates else -1)
        frac += [p] * replicates
        rep += list(range(replicates))
    return ReplicatePlan(keys=np.array(keys, dtype=np.uint64), thresholds=np.array(thresholds, dtype=np.int64),
                         high_stream=np.array(high, dtype=np.int64), low_stream=np.array(low, dtype=np.int64),
                         fractions=np.array(frac, dtype=np.float64), replicate=np.array(rep, dtype=np.int64))


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
        Replicates per fraction (>= 1).
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
        Budget for the bin-major working counts (one byte per replicate and
        bin, prompts and delayed; the returned int32 sinograms take four
        times as much); with more replicates than fit, the events are read
        once per group of replicate pairs.
    progress : callable, optional
        Called with the number of rows after each batch (of each pass).

    Returns
    -------
    ReplicateState

    Notes
    -----
    Working counts are one byte per (bin, replicate), all replicates of a
    bin side by side; a cell close to overflowing is emptied into the int32
    output, and what remains is added at the end. Events are sorted by
    blocks of sinogram rows before their weights are added, and the blocks
    are shared among the numba threads.
    """
    import numba

    fractions = check_resampling(mode, replicates, fractions, min_replicates=1)
    source = events if isinstance(events, EventSource) else open_events(events, scanner)
    if geometry is None:
        geometry = sinogram_geometry(source.scanner, rebin)
    plan = replicate_plan(seed, fractions, replicates)
    n_streams = plan.n_streams
    with_delayed = source.has_delayed
    per_generator = geometry.n_bins * 2 * (2 if with_delayed else 1)
    group = max(1, min(plan.n_generators, int(memory_bytes // max(per_generator, 1))))
    thin = 0 if mode == "bootstrap" else 1

    frames = None if frame is None else [tuple(frame)]
    counting = empty_state(geometry, frames, with_delayed=with_delayed)
    window = _energy_window(energy_window, geometry.scanner, source.has_energy)
    columns = ["crystal_a", "crystal_b"]
    if frames is not None:
        columns.insert(0, "time_ns")
    if with_delayed:
        columns.append("delayed")
    if window is not None:
        columns += ["energy_a_kev", "energy_b_kev"]

    prompts = np.zeros((n_streams,) + geometry.shape, np.int32)
    delayed = np.zeros((n_streams,) + geometry.shape, np.int32) if with_delayed else None
    totals = np.zeros((n_streams, 2), np.int64)
    n_rows = geometry.planes * geometry.views          # sinogram rows (plane, view)
    n_parts = max(1, numba.get_num_threads())
    passes = 0
    for g0 in range(0, plan.n_generators, group):
        g1 = min(plan.n_generators, g0 + group)
        keys, thresholds, slot_stream, s0, s1 = plan.slots(g0, g1)
        m = s1 - s0
        n_slots = len(slot_stream)
        out_p = prompts[s0:s1].reshape(m, geometry.n_bins)
        out_d = delayed[s0:s1].reshape(m, geometry.n_bins) if with_delayed else np.zeros((m, 1), np.int32)
        work_p = np.zeros(geometry.n_bins * n_slots, np.uint8)
        work_d = np.zeros(geometry.n_bins * n_slots if with_delayed else 1, np.uint8)
        # Fresh pages cost a fault each on first touch (0.3-1 s per GB, erratic); populating them
        # on another thread overlaps that with the event pass, which is mostly single-threaded.
        populating = threading.Thread(target=populate_pages, args=([work_p, work_d, out_p, out_d],),
                                      name="twinray-populate", daemon=True)
        populating.start()
        spilled_rows = np.zeros(n_rows, np.uint8)
        part_totals = np.zeros((n_parts, 2, n_slots), np.int64)
        # The ordinary binner classifies (same lookup tables, same accounting) without adding the
        # events to its own sinograms; only the accumulation differs.
        classifier = _Binner(empty_state(geometry, frames, with_delayed=with_delayed), window,
                             add_to_sinograms=False)
        # Events are sorted by blocks of sinogram rows whose working counts fit a core's cache
        # (fewer blocks make the sort cheaper; within a block the adds stay in cache).
        rows_per_block = int(max(1, min(16, _BLOCK_BYTES // (geometry.radial_bins * n_slots))))
        block_bins = rows_per_block * geometry.radial_bins
        n_blocks = -(-geometry.n_bins // block_bins)
        key_counts = np.zeros(n_blocks + 1, np.int64)
        sorted_codes = np.zeros(0, np.int64)
        sorted_rows = np.zeros(0, np.int64)
        for first_row, arrays in iter_event_batches(source, columns, batch_size, prefetch=2):
            codes = _classify(classifier, arrays)
            if len(sorted_codes) < len(codes):
                sorted_codes = np.empty(len(codes), np.int64)
                sorted_rows = np.empty(len(codes), np.int64)
            kernels.partition_codes(codes, np.int64(first_row), block_bins, n_blocks, key_counts,
                                    sorted_codes, sorted_rows)
            kernels.accumulate_replicates(sorted_codes, sorted_rows, key_counts[:n_blocks], n_parts, keys, thin,
                                          thresholds, work_p, work_d, slot_stream, out_p, out_d,
                                          geometry.radial_bins, spilled_rows, part_totals)
            if progress is not None:
                progress(len(codes))
        passes += 1
        populating.join()
        if g0 == 0:
            counting.counts[:] = classifier.state.counts
        kernels.unweave_add(work_p, n_slots, slot_stream, geometry.radial_bins, spilled_rows, out_p)
        if with_delayed:
            kernels.unweave_add(work_d, n_slots, slot_stream, geometry.radial_bins, spilled_rows, out_d)
        slot_totals = part_totals.sum(axis=0)
        for s, stream in enumerate(slot_stream):
            if stream >= 0:
                totals[s0 + stream] = slot_totals[:, s]
        del work_p, work_d
    frame_s = tuple(frame) if frame is not None else (0.0, float(source.duration_s or 0.0))
    return ReplicateState(geometry=geometry, frame_s=frame_s, mode=mode, seed=int(seed),
                          fractions=plan.fractions, replicate=plan.replicate, prompts=prompts,
                          delayed=delayed, totals=totals, accounting=counting.accounting(0), passes=passes)


#: madvise advice that faults pages in writable without writing them (Linux >= 5.14, <sys/mman.h>).
_MADV_POPULATE_WRITE = 23


def populate_pages(arrays, chunk_bytes: int = 64 << 20) -> bool:
    """Fault in the memory pages of arrays for writing, without changing their contents.

    Uses ``madvise(MADV_POPULATE_WRITE)`` (Linux >= 5.14), which leaves the
    data as it is, so it may run on another thread while the arrays are
    being written. Returns False (and does nothing more) where the call is
    not available; the pages are then faulted in on first touch as usual.
    """
    if not sys.platform.startswith("linux"):
        return False
    try:
        madvise = ctypes.CDLL(None, use_errno=True).madvise
    except (OSError, AttributeError):
        return False
    madvise.argtypes = [ctypes.c_void_p, ctypes.c_size_t, ctypes.c_int]
    madvise.restype = ctypes.c_int
    page = mmap.PAGESIZE
    for a in arrays:
        start = -(-a.ctypes.data // page) * page            # whole pages inside the array only
        end = (a.ctypes.data + a.nbytes) // page * page
        for lo in range(start, end, chunk_bytes):
            if madvise(lo, min(chunk_bytes, end - lo), _MADV_POPULATE_WRITE) != 0:
                return False
    return True


def _classify(binner, arrays: dict) -> np.ndarray:
    """Codes of one batch (``flat_bin << 1 | delayed``, or negative when rejected).

    The ordinary binner (made with ``add_to_sinograms=False``) classifies
    and counts the batch and leaves the codes in ``binner.codes``; so the
    lookup-table logic and the accounting live only in
    :mod:`twinray.binning` and its kernels, whatever their internals.
    """
    binner.add(arrays)
    return binner.codes[:len(arrays["crystal_a"])]


def replicate_weights(seed: int, mode: str, fractions, replicates: int, first_row: int, n_rows: int) -> np.ndarray:
    """The weight of rows ``first_row ..`` in every replicate, shape (n_rows, n_streams).

    The same numbers :func:`bin_replicates` uses (for checks and inspection).
    """
    fractions = check_resampling(mode, replicates, fractions, min_replicates=1)
    plan = replicate_plan(seed, fractions, replicates)
    keys, thresholds, slot_stream, s0, s1 = plan.slots(0, plan.n_generators)
    by_slot = np.zeros((int(n_rows), len(slot_stream)), np.int64)
    kernels.event_weights(keys, np.int64(first_row), int(n_rows), 0 if mode == "bootstrap" else 1, thresholds,
                          by_slot)
    out = np.zeros((int(n_rows), plan.n_streams), np.int64)
    used = slot_stream >= 0
    out[:, slot_stream[used] + s0] = by_slot[:, used]
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


def _smoothed(image: np.ndarray, sigma_voxels: float = 1.5) -> np.ndarray:
    """Gaussian-smoothed copy of an image (transaxially, and along z when it has several slices)."""
    from scipy.ndimage import gaussian_filter

    sigma = [sigma_voxels, sigma_voxels] + [sigma_voxels if image.shape[2] > 1 else 0.0] * (image.ndim - 2)
    return gaussian_filter(np.asarray(image, dtype=np.float64), sigma=sigma, mode="constant")


def _region_masks(regions, shape, affine, mean_image):
    """Named boolean masks: the given spheres, or one "object" region from the mean image."""
    from .tac import region_mask

    if regions:
        masks = {}
        for region in regions:
            mask = region_mask(shape, affine, region)
            if not mask.any():
                raise TwinrayInputError(f"region {region.describe()} contains no voxel centre of the image")
            masks[region.name] = mask
        return masks, [{"name": r.name, "definition": r.describe(), "voxels": int(masks[r.name].sum())}
                       for r in regions]
    # Without regions: the voxels above a quarter of the 99th percentile of the mean image
    # (the object, robust to a few hot voxels).
    level = 0.25 * float(np.percentile(mean_image, 99)) if mean_image.size else 0.0
    mask = mean_image > level if level > 0 else np.zeros(mean_image.shape, bool)
    if not mask.any():
        raise TwinrayInputError("the mean image is zero everywhere; no region to measure noise in")
    return {"object": mask}, [{"name": "object", "definition": "smoothed mean image of the largest fraction > 0.25 x its 99th percentile",
                               "voxels": int(mask.sum())}]


def region_noise(images: np.ndarray, mask: np.ndarray, fraction: float = 1.0, mode: str = "bootstrap") -> dict:
    """Noise statistics of one region over replicates.

    Parameters
    ----------
    images : ndarray, shape (replicates, x, y, z)
    mask : ndarray of bool, shape (x, y, z)
    fraction : float
        Thinning probability of these replicates (1 for the bootstrap).
    mode : {"bootstrap", "thin"}

    Returns
    -------
    dict
        ``mean`` (regional mean of the mean image); ``voxel_std`` (regional
        mean of the voxel-wise std, ddof = 1); ``voxel_cov`` =
        ``voxel_std / mean``; ``roi_mean_std`` and ``roi_mean_cov`` (spread
        over replicates of the regional mean: the noise of a region
        measurement); and, for thinning, ``scan_voxel_cov`` and
        ``scan_roi_mean_cov``: the same divided by ``sqrt(1 - P)``.

    Notes
    -----
    Thinned replicates of one scan share its events: a bin with ``n``
    counts varies across them with the binomial variance ``n P (1 - P)``,
    whereas an independent scan of ``P`` times the duration has the Poisson
    variance ``n P``. The ``scan_*`` values undo that factor, which is exact
    for a linear reconstruction (FBP) and a first-order estimate for OSEM;
    they are what to compare across count levels (undefined for P = 1).
    """
    values = images[:, mask].astype(np.float64)          # (replicates, voxels)
    std_v = values.std(axis=0, ddof=1)
    roi = values.mean(axis=1)
    m = float(values.mean())
    voxel_std = float(std_v.mean())
    out = {
        "mean": m,
        "voxel_std": voxel_std,
        "voxel_cov": voxel_std / m if m > 0 else 0.0,
        "roi_mean_std": float(roi.std(ddof=1)),
        "roi_mean_cov": float(roi.std(ddof=1) / m) if m > 0 else 0.0,
    }
    if mode == "thin":
        scale = 1.0 / math.sqrt(1.0 - fraction) if fraction < 1.0 else None
        out["scan_voxel_cov"] = out["voxel_cov"] * scale if scale else None
        out["scan_roi_mean_cov"] = out["roi_mean_cov"] * scale if scale else None
    return out


def noise_slope(counts, noise) -> float | None:
    """Log-log slope of noise against counts (-0.5 for Poisson-limited noise); None with < 2 levels."""
    counts = np.asarray(counts, dtype=np.float64)
    noise = np.asarray(noise, dtype=np.float64)
    ok = (counts > 0) & (noise > 0)
    if ok.sum() < 2:
        return None
    return float(np.polyfit(np.log(counts[ok]), np.log(noise[ok]), 1)[0])


def plot_noise_against_counts(path, levels: list, region_names: list, title: str = "",
                              mode: str = "bootstrap") -> None:
    """PNG of regional noise (voxel CoV and CoV of the regional mean) against counts, log-log.

    For thinning the scan-equivalent values (``scan_*``, see :func:`region_noise`)
    are plotted; levels with P = 1 have none and are left out.
    """
    import matplotlib

    matplotlib.use("Agg")
    import matplotlib.pyplot as plt

    from .atomic import atomic_path
    from .tac import OKABE_ITO

    key = "scan_" if mode == "thin" else ""
    fig, ax = plt.subplots(figsize=(7, 4.5), dpi=110)
    drawn_reference = False
    for r, name in enumerate(region_names):
        colour = OKABE_ITO[r % len(OKABE_ITO)]
        rows = [(lv["mean_prompts"], lv["regions"][name][key + "voxel_cov"], lv["regions"][name][key + "roi_mean_cov"])
                for lv in levels if lv["regions"][name].get(key + "voxel_cov")]
        if not rows:
            continue
        counts, voxel, roi = (np.array(v, dtype=np.float64) for v in zip(*rows))
        ax.plot(counts, voxel * 100, "o-", color=colour, label=f"{name}: voxel CoV")
        ax.plot(counts, roi * 100, "s--", color=colour, label=f"{name}: CoV of regional mean",
                markerfacecolor="none")
        top = np.argmax(counts)
        ref = voxel[top] * 100 * np.sqrt(counts[top] / counts)
        ax.plot(counts, ref, ":", color="0.4", linewidth=1,
                label=None if drawn_reference else "1/sqrt(counts) (Poisson)")
        drawn_reference = True
    ax.set_xscale("log")
    ax.set_yscale("log")
    ax.set_xlabel("prompts per replicate (counts)")
    ax.set_ylabel("coefficient of variation (%)" + (" of a scan of P x duration" if mode == "thin" else ""))
    ax.set_title(title or "image noise against counts")
    ax.grid(True, which="both", alpha=0.3)
    if drawn_reference:
        ax.legend(frameon=False, fontsize=8)
    fig.tight_layout()
    try:
        with atomic_path(path, suffix=".png") as tmp:
            fig.savefig(tmp, format="png")
    finally:
        plt.close(fig)


@dataclasses.dataclass(frozen=True)
class ResampleResult:
    """What :func:`make_resample` did.

    Attributes
    ----------
    outputs : list of Path
    summary : dict
        The content of ``summary.json``.
    accounting : Accounting
    warnings : tuple of str
    timings_s : dict
    """

    outputs: list
    summary: dict
    accounting: Accounting
    warnings: tuple
    timings_s: dict


def make_resample(events, output_dir, *, mode: str = "bootstrap", replicates: int = 20, fractions=None,
                  seed: int = 0, frame=None, truncate: bool = False, scanner=None, rebin: str = "none",
                  correction_options=None, norm_path=None, mu_path=None, singles_path=None, recon_options=None,
                  regions=(), workers: int | None = None, scheduler: str | None = None,
                  batch_size: int = DEFAULT_BATCH_SIZE, memory_bytes: int = DEFAULT_MEMORY_BYTES,
                  progress=None) -> ResampleResult:
    """Count-level noise study: resample, correct and reconstruct every replicate, summarise.

    Parameters
    ----------
    events : path-like or EventSource
    output_dir : path-like
        Folder for ``mean.nii.gz``, ``std.nii.gz``, ``cov.nii.gz`` (each with
        a sidecar), ``summary.json`` and ``noise_vs_counts.png``. With several
        fractions the images are 4-D, one volume per fraction in the order given.
    mode : {"bootstrap", "thin"}
    replicates : int
        Per fraction, >= 2.
    fractions : sequence of float, optional
        Thinning probabilities (``mode="thin"``).
    seed : int
    frame : (start_s, end_s) or str, optional
        Time window (default the whole acquisition); checked against the data.
    truncate : bool
        Clip a frame past the data's end.
    scanner, rebin, correction_options, norm_path, mu_path, singles_path, recon_options
        As for ``twinray sinogram`` and ``twinray reconstruct``; the same for
        every replicate.
    regions : sequence of SphereRegion
        Where to measure noise; default one "object" region from the mean image.
    workers, scheduler
        Parallel reconstruction (see :func:`twinray.parallel.map_tasks`).
    batch_size, memory_bytes
    progress : callable, optional
        ``progress(stage, done, total)``.

    Returns
    -------
    ResampleResult

    Notes
    -----
    A thinned replicate is reconstructed as a scan of ``P`` times the frame
    duration; its decay-correction factor is that of the real frame, so the
    mean image estimates the same concentration as the full scan.
    """
    import json
    import time
    from pathlib import Path

    from .atomic import atomic_path, refuse_overwriting_inputs
    from .corrections.apply import CorrectionOptions, prepare_corrections
    from .decay import frame_decay_factor
    from .dynamic import FrameTask, frame_image
    from .images import write_image
    from .isotopes import get_isotope
    from .parallel import map_tasks
    from .reconstruct.pipeline import ReconOptions
    from .sinogram import parse_frame, resolve_frame

    t0 = time.perf_counter()
    fractions = check_resampling(mode, replicates, fractions)
    correction_options = correction_options or CorrectionOptions()
    recon_options = recon_options or ReconOptions()
    source = events if isinstance(events, EventSource) else open_events(events, scanner)
    if source.num_rows == 0:
        raise TwinrayInputError(f"events {source.path} contain no events; nothing to resample")
    if isinstance(frame, str):
        frame = parse_frame(frame)
    frame_s = resolve_frame(source, frame, truncate)
    output_dir = Path(output_dir)
    names = ("mean.nii.gz", "std.nii.gz", "cov.nii.gz", "summary.json", "noise_vs_counts.png")
    scanner_path = scanner if scanner is not None and not hasattr(scanner, "crystals_per_ring") else None
    for name in names:
        refuse_overwriting_inputs(output_dir / name, [source.path, *source.paths, scanner_path, norm_path, mu_path,
                                                      singles_path])
    geometry = sinogram_geometry(source.scanner, rebin)
    inputs = prepare_corrections(geometry, correction_options, norm_path=norm_path, mu_path=mu_path,
                                 singles_path=singles_path, frames_s=[frame_s])
    warnings = []
    iso = None
    if source.metadata.get("isotope"):
        iso = get_isotope(str(source.metadata["isotope"]), f"events {source.path} metadata 'isotope'")
    start_s, end_s = frame_s
    duration = end_s - start_s
    dcf = (float(frame_decay_factor(iso.half_life_s, start_s, duration, correction_options.decay_reference_s))
           if iso is not None else None)
    if iso is None:
        warnings.append("the events name no isotope: images are not decay-corrected")
    t1 = time.perf_counter()

    total = source.num_rows
    report = (lambda n: progress("bin", n, total)) if progress is not None else None
    state = bin_replicates(source, geometry, mode=mode, replicates=replicates, fractions=fractions, seed=seed,
                           frame=None if frame is None else frame_s, batch_size=batch_size,
                           memory_bytes=memory_bytes, progress=report)
    if state.passes > 1:
        warnings.append(f"the replicates did not fit the memory budget together; the events were read "
                        f"{state.passes} times")
    acc = state.accounting
    if acc.read != total:
        raise TwinrayInputError(f"events {source.path}: read {acc.read} rows but the files declare {total}")
    if acc.binned == 0:
        raise TwinrayInputError(f"no event of {source.path} could be binned in {start_s:g}:{end_s:g} s")
    t2 = time.perf_counter()

    tasks = [FrameTask(index=0, prompts=state.prompts[i],
                       delayed=None if state.delayed is None else state.delayed[i],
                       frame_start_s=start_s, frame_duration_s=duration * float(state.fractions[i]),
                       decay_factor=dcf)
             for i in range(state.n_streams)]
    results = map_tasks(frame_image, tasks,
                        {"geometry": geometry, "correction_options": correction_options,
                         "correction_inputs": inputs, "recon_options": recon_options,
                         "isotope": iso.name if iso is not None else None},
                        workers=workers, scheduler=scheduler,
                        on_done=(lambda: progress("reconstruct", 1, len(tasks))) if progress is not None else None)
    t3 = time.perf_counter()
    for r in results:
        for note in r["notes"]:
            if note not in warnings:
                warnings.append(note)
    images = np.stack([r["image"] for r in results])       # (streams, x, y, z)
    affine = results[0]["affine"]
    first_side = results[0]["sidecar"]
    units = first_side.get("Units", "")

    means, stds, covs, levels = [], [], [], []
    for p in fractions:
        mean, std, cov = voxel_statistics(images[state.fractions == p])
        means.append(mean)
        stds.append(std)
        covs.append(cov)
    # The object region comes from the least noisy mean image (the largest fraction), smoothed:
    # a threshold on a noisy image selects voxels that happen to be high and biases their mean up.
    support = _smoothed(means[int(np.argmax(fractions))])
    masks, region_info = _region_masks(list(regions), support.shape, affine, support)
    for p in fractions:
        sel = state.fractions == p
        totals = state.totals[sel]
        levels.append({
            "fraction": p,
            "effective_duration_s": duration * p,
            "mean_prompts": float(totals[:, 0].mean()),
            "mean_delayed": float(totals[:, 1].mean()) if state.delayed is not None else None,
            "prompts_per_replicate": [int(v) for v in totals[:, 0]],
            "regions": {name: region_noise(images[sel], mask, p, mode) for name, mask in masks.items()},
        })
    noise_key = "scan_" if mode == "thin" else ""
    counts = [lv["mean_prompts"] for lv in levels]
    slopes = {name: {key: noise_slope(counts, [lv["regions"][name][noise_key + key] or 0.0 for lv in levels])
                     for key in ("voxel_cov", "roi_mean_cov")}
              for name in masks}

    def stack(volumes):
        return volumes[0] if len(volumes) == 1 else np.stack(volumes, axis=-1)

    common = {"mode": mode, "replicates": int(replicates), "fractions": list(fractions), "seed": int(seed),
              "frame_s": [start_s, end_s], "events": str(source.path), "accounting": acc.to_dict(),
              "volume_axis": "fraction" if len(fractions) > 1 else None, "recon": first_side.get("twinray", {})}
    base = {k: first_side[k] for k in ("ReconMethodName", "ReconMethodParameterLabels", "ReconMethodParameterUnits",
                                       "ReconMethodParameterValues", "ReconFilterType", "ReconFilterSize",
                                       "AttenuationCorrection", "ImageDecayCorrected", "ImageDecayCorrectionTime",
                                       "DecayCorrectionFactor", "TracerRadionuclide") if k in first_side}
    base.update({"FrameTimesStart": [start_s], "FrameDuration": [duration], "AcquisitionMode": "list mode"})
    output_dir.mkdir(parents=True, exist_ok=True)
    written = []
    for name, volumes, unit, what in (("mean.nii.gz", means, units, "voxel-wise mean over replicates"),
                                      ("std.nii.gz", stds, units, "voxel-wise standard deviation over replicates "
                                                                  "(ddof = 1)"),
                                      ("cov.nii.gz", covs, "1", "coefficient of variation std/mean "
                                                                "(0 where the mean is <= 0)")):
        side = {**base, "Units": unit, "twinray": {**common, "statistic": what}}
        written += write_image(output_dir / name, stack(volumes), affine, side)
    summary = {**common, "units": units, "effective_duration_s": [duration * p for p in fractions],
               "regions": region_info, "levels": levels,
               "noise_vs_counts_slope": slopes if len(fractions) > 1 else None,
               "noise_vs_counts_slope_of": (noise_key + "voxel_cov / " + noise_key + "roi_mean_cov"),
               "notes": ["voxel_cov: regional mean of the voxel-wise std (ddof 1) over the regional mean",
                         "roi_mean_cov: standard deviation over replicates of the regional mean, over the mean",
                         "thinned replicates are reconstructed as scans of P times the duration",
                         "thin: replicates of one scan vary with the binomial variance nP(1-P); scan_* = "
                         "value / sqrt(1-P) estimates the noise of an independent scan of P times the duration "
                         "(Poisson variance nP; exact for FBP, first order for OSEM)"],
               "warnings": warnings}
    plot_path = output_dir / "noise_vs_counts.png"
    plot_noise_against_counts(plot_path, levels, list(masks),
                              title=f"{mode}: noise against counts ({replicates} replicates per level)", mode=mode)
    summary_path = output_dir / "summary.json"
    summary["outputs"] = [str(p) for p in written] + [str(plot_path), str(summary_path)]
    with atomic_path(summary_path, suffix=".json") as tmp:
        tmp.write_text(json.dumps(summary, indent=2, sort_keys=True) + "\n")
    t4 = time.perf_counter()
    return ResampleResult(outputs=written + [plot_path, summary_path], summary=summary, accounting=acc,
                          warnings=tuple(warnings),
                          timings_s={"prepare": round(t1 - t0, 4), "bin": round(t2 - t1, 4),
                                     "reconstruct": round(t3 - t2, 4), "write": round(t4 - t3, 4)})
