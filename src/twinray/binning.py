"""Binning: coincidence events -> prompts and delayed sinograms + accounting.

Every event goes to exactly one (frame, plane, view, radial) bin of the
prompts or the delayed sinogram, or is rejected for the first reason of data
contract section 5 that applies. Several time frames are filled in one pass
over the data. The result, a :class:`BinningState`, can be merged: binning
two halves of a study apart and adding the states gives exactly the state of
the whole, whatever the row order, batch size or split into files.

The lookup tables come from :func:`twinray.geometry.sinogram_geometry`; the
loops over events are numba kernels in :mod:`twinray._binning_kernels`.
"""

from __future__ import annotations

import math
from decimal import Decimal

import numpy as np

from . import _binning_kernels as kernels
from .accounting import DELAYED, FIELDS, INVALID_CRYSTAL, OUTSIDE_FRAME, PROMPTS, READ, Accounting
from .errors import TwinrayInputError
from .events import DEFAULT_BATCH_SIZE, EventSource, iter_event_batches, open_events
from .geometry import SinogramGeometry, sinogram_geometry

_NO_TIME_LIMIT = np.iinfo(np.int64).max


def seconds_to_ns(seconds: float) -> int:
    """First integer nanosecond at or after ``seconds`` (exact for decimal input).

    ``START*1e9 <= time_ns`` for integer ``time_ns`` is ``time_ns >= ceil(START*1e9)``;
    going through the shortest decimal form of the float keeps 0.3 s at
    300000000 ns instead of 300000001.
    """
    if math.isinf(seconds):
        return _NO_TIME_LIMIT if seconds > 0 else -_NO_TIME_LIMIT
    value = Decimal(repr(float(seconds))) * 1_000_000_000
    return int(value.to_integral_value(rounding="ROUND_CEILING"))


def check_frames(frames) -> tuple:
    """Validate frames: sorted, non-overlapping half-open [start_s, end_s) intervals.

    Parameters
    ----------
    frames : sequence of (start_s, end_s)

    Returns
    -------
    tuple of (float, float)
    """
    out = []
    for item in frames:
        try:
            start, end = (float(v) for v in item)
        except (TypeError, ValueError):
            raise TwinrayInputError(f"a frame must be (start_s, end_s), got {item!r}") from None
        if not (math.isfinite(start) and start >= 0):
            raise TwinrayInputError(f"frame start must be a finite time >= 0 s, got {start:g}")
        if not end > start:
            raise TwinrayInputError(f"frame {start:g}:{end:g} s ends before it starts")
        if out and start < out[-1][1]:
            raise TwinrayInputError(f"frames must be in time order and must not overlap "
                                    f"({out[-1][0]:g}:{out[-1][1]:g} and {start:g}:{end:g} s)")
        out.append((start, end))
    if not out:
        raise TwinrayInputError("no frame given")
    return tuple(out)


class BinningState:
    """Binned sinograms and accounting of some events; mergeable.

    Each frame's sinograms are held either densely or, for studies of many
    frames, as the list of binned event codes of that frame until it holds
    more events than half its number of bins (then it is made dense). A
    whole-body frame of a few seconds is thus a few megabytes instead of
    hundreds, and the binning pass never touches the memory of thirty dense
    frames; :attr:`prompts` and :meth:`frame_sinograms` give dense arrays
    whatever the storage.

    Attributes
    ----------
    geometry : SinogramGeometry
    frames_s : tuple of (float, float) or None
        Half-open frames ``[start_s, end_s)``; None means one frame holding
        every event whatever its time.
    counts : ndarray of int64, shape (n_frames + 1, len(FIELDS))
        Accounting counters per frame (rows whose time lies in the frame);
        the last row counts the events outside every frame.
    with_delayed : bool
        Whether there is a delayed sinogram (the events have a ``delayed`` column).
    """

    def __init__(self, geometry: SinogramGeometry, frames_s, prompts, delayed, counts, *, frame_stores=None):
        self.geometry = geometry
        self.frames_s = frames_s
        self.counts = counts
        self._combined = None    # prompts and delayed as one flat array (see empty_state), when they are
        if frame_stores is None:
            self._prompts, self._delayed = prompts, delayed
            self._stores = None
            self.with_delayed = delayed is not None
        else:
            self._prompts = self._delayed = None
            self._stores = list(frame_stores)
            self.with_delayed = bool(frame_stores[0].with_delayed)

    # -- dense views -------------------------------------------------------------------------------------------

    @property
    def prompts(self) -> np.ndarray:
        """int32 array (n_frames, planes, views, radial_bins); made dense (once) if frames are held as codes."""
        self._make_dense()
        return self._prompts

    @property
    def delayed(self) -> np.ndarray | None:
        """int32 array of the same shape as :attr:`prompts`, or None without a ``delayed`` column."""
        self._make_dense()
        return self._delayed

    @property
    def is_dense(self) -> bool:
        """True when every frame is held as dense arrays (no code lists)."""
        return self._stores is None

    def _make_dense(self) -> None:
        if self._stores is None:
            return
        shape = (len(self._stores),) + self.geometry.shape
        prompts = np.zeros(shape, np.int32)
        delayed = np.zeros(shape, np.int32) if self.with_delayed else None
        for k, store in enumerate(self._stores):
            store.add_into(prompts[k], None if delayed is None else delayed[k])
        self._prompts, self._delayed, self._stores = prompts, delayed, None

    def frame_sinograms(self, k: int) -> tuple:
        """``(prompts, delayed)`` of frame ``k`` as dense int32 arrays (planes, views, radial_bins).

        Views of the dense arrays when the state is dense; otherwise new
        arrays built from the frame's codes (the state is left as it is, so
        frames can be handed out one at a time).
        """
        if self._stores is None:
            return self._prompts[k], None if self._delayed is None else self._delayed[k]
        return self._stores[k].dense(self.geometry.shape)

    def frame_codes(self, k: int) -> np.ndarray | None:
        """The binned codes of frame ``k`` (uint32, ``flat_bin << 1 | is_delayed``), or None if it is dense.

        A compact form of a short frame for shipping to a worker;
        :func:`sinograms_from_codes` makes the dense arrays.
        """
        if self._stores is None or self._stores[k].is_dense:
            return None
        return self._stores[k].codes()

    # -- accounting --------------------------------------------------------------------------------------------

    @property
    def n_frames(self) -> int:
        return self.counts.shape[0] - 1

    @property
    def rows_read(self) -> int:
        """Every event seen, whatever happened to it."""
        return int(self.counts[:, READ].sum())

    def frame_accounting(self, k: int) -> Accounting:
        """Counters of the events whose time lies in frame ``k`` only."""
        return Accounting.from_counts(self.counts[k])

    @property
    def outside_accounting(self) -> Accounting:
        """Counters of the events outside every frame (all rejected)."""
        return Accounting.from_counts(self.counts[-1])

    def accounting(self, k: int = 0) -> Accounting:
        """The accounting of frame ``k`` as a single-frame run would report it.

        ``read`` is every event seen; events of other frames and outside all
        frames count as ``rejected_outside_frame``, except those with an
        invalid crystal id, which come first in the order of reasons. It
        balances, and equals binning frame ``k`` alone.
        """
        counts = self.counts[k].copy()
        others = np.delete(self.counts, k, axis=0)
        counts[READ] = self.rows_read
        counts[INVALID_CRYSTAL] = int(self.counts[:, INVALID_CRYSTAL].sum())
        counts[OUTSIDE_FRAME] = int(others[:, READ].sum() - others[:, INVALID_CRYSTAL].sum())
        return Accounting.from_counts(counts)

    def frame(self, k: int) -> "BinningState":
        """A dense single-frame state for frame ``k``; the other frames count as outside it."""
        others = np.delete(self.counts, k, axis=0)
        counts = np.zeros((2, len(FIELDS)), np.int64)
        counts[0] = self.counts[k]
        counts[1, READ] = others[:, READ].sum()
        counts[1, INVALID_CRYSTAL] = others[:, INVALID_CRYSTAL].sum()
        counts[1, OUTSIDE_FRAME] = counts[1, READ] - counts[1, INVALID_CRYSTAL]
        frames = None if self.frames_s is None else (self.frames_s[k],)
        prompts, delayed = self.frame_sinograms(k)
        return BinningState(self.geometry, frames, prompts[None], None if delayed is None else delayed[None],
                            counts)

    def merge(self, other: "BinningState") -> "BinningState":
        """Sum of two states of the same geometry and frames (e.g. two halves of a study); dense."""
        if not self.geometry.same_layout(other.geometry):
            raise TwinrayInputError("cannot merge binning states of different sinogram geometries")
        if self.frames_s != other.frames_s:
            raise TwinrayInputError("cannot merge binning states with different frames")
        if self.with_delayed != other.with_delayed:
            raise TwinrayInputError("cannot merge a binning state with delayed events and one without")
        delayed = None if self.delayed is None else self.delayed + other.delayed
        return BinningState(self.geometry, self.frames_s, self.prompts + other.prompts, delayed,
                            self.counts + other.counts)

    __add__ = merge


class _FrameStore:
    """One frame of a many-frame state: a list of uint32 event codes, or dense arrays once it is full.

    ``limit`` is the number of codes above which the frame is made dense
    (half its bins: the codes then use a quarter of the memory of the dense
    prompts + delayed pair, so the memory of a study stays bounded by that of
    its dense frames however many events it has).
    """

    def __init__(self, shape: tuple, with_delayed: bool, limit: int):
        self.shape = shape
        self.with_delayed = with_delayed
        self.limit = limit
        self.chunks: list = []
        self.n_codes = 0
        self.prompts = self.delayed = None

    @property
    def is_dense(self) -> bool:
        return self.prompts is not None

    def add(self, codes: np.ndarray) -> None:
        """Add binned codes (uint32) of this frame."""
        if self.prompts is None and self.n_codes + len(codes) <= self.limit:
            self.chunks.append(codes.copy())
            self.n_codes += len(codes)
            return
        if self.prompts is None:
            self.prompts, self.delayed = sinograms_from_codes(self.codes(), self.shape, self.with_delayed)
            self.chunks, self.n_codes = [], 0
        kernels.accumulate_codes_direct(codes, self.prompts.reshape(-1), self._delayed_flat())

    def _delayed_flat(self) -> np.ndarray:
        return self.delayed.reshape(-1) if self.delayed is not None else np.zeros(1, np.int32)

    def codes(self) -> np.ndarray:
        """All codes so far, as one array."""
        if len(self.chunks) != 1:
            self.chunks = [np.concatenate(self.chunks) if self.chunks else np.zeros(0, np.uint32)]
        return self.chunks[0]

    def add_into(self, prompts: np.ndarray, delayed: np.ndarray | None) -> None:
        """Add this frame to dense arrays of its shape."""
        if self.prompts is not None:
            prompts += self.prompts
            if delayed is not None:
                delayed += self.delayed
            return
        d_flat = delayed.reshape(-1) if delayed is not None else np.zeros(1, np.int32)
        for chunk in self.chunks:
            kernels.accumulate_codes_direct(chunk, prompts.reshape(-1), d_flat)

    def dense(self, shape: tuple) -> tuple:
        """Dense ``(prompts, delayed)`` of this frame: its own arrays if it is dense (not to be modified), else new ones."""
        if self.prompts is not None:
            return self.prompts, self.delayed
        return sinograms_from_codes(self.codes(), shape, self.with_delayed)


def sinograms_from_codes(codes: np.ndarray, shape: tuple, with_delayed: bool) -> tuple:
    """Dense ``(prompts, delayed)`` int32 sinograms of ``shape`` from binned codes (see :meth:`BinningState.frame_codes`)."""
    prompts = np.zeros(shape, np.int32)
    delayed = np.zeros(shape, np.int32) if with_delayed else None
    kernels.accumulate_codes_direct(np.asarray(codes), prompts.reshape(-1),
                                    delayed.reshape(-1) if delayed is not None else np.zeros(1, np.int32))
    return prompts, delayed


def empty_state(geometry: SinogramGeometry, frames=None, with_delayed: bool = True,
                sparse: bool | None = None) -> BinningState:
    """A state with no events binned yet.

    Parameters
    ----------
    geometry : SinogramGeometry
    frames : sequence of (start_s, end_s), optional
        Default: one frame holding every event.
    with_delayed : bool
        Keep a delayed sinogram.
    sparse : bool, optional
        Hold each frame as a list of event codes until it is half full (see
        :class:`BinningState`). Default: when there is more than one frame.
    """
    frames_s = None if frames is None else check_frames(frames)
    n_frames = 1 if frames_s is None else len(frames_s)
    counts = np.zeros((n_frames + 1, len(FIELDS)), np.int64)
    if sparse is None:
        sparse = n_frames > 1
    if sparse:
        limit = geometry.n_bins // 2
        stores = [_FrameStore(geometry.shape, with_delayed, limit) for _ in range(n_frames)]
        return BinningState(geometry, frames_s, None, None, counts, frame_stores=stores)
    shape = (n_frames,) + geometry.shape
    # One array, prompts then delayed, so that the lean kernels address both with one index.
    n_total = n_frames * geometry.n_bins
    combined = np.zeros(n_total * (2 if with_delayed else 1), np.int32)
    prompts = combined[:n_total].reshape(shape)
    delayed = combined[n_total:].reshape(shape) if with_delayed else None
    state = BinningState(geometry, frames_s, prompts, delayed, counts)
    state._combined = combined
    return state


#: How events are binned: "lean" (arithmetic classification, two threads; "direct" when the
#: geometry does not allow its tables), "direct" (table classification, increments in
#: event order) or "partitioned" (the same, counting sort by plane before the increments). All give the
#: same result; bench/bench_binning.py compares them.
ACCUMULATE = "lean"

#: Smallest batch that is split between two threads.
_THREADED_BATCH = 1 << 16
_POOL = None


def _thread_pool():
    """Two worker threads for the lean kernels (which release the GIL), made on first use."""
    global _POOL
    if _POOL is None:
        from concurrent.futures import ThreadPoolExecutor
        _POOL = ThreadPoolExecutor(max_workers=2, thread_name_prefix="twinray-bin")
    return _POOL


def _usable_cores() -> int:
    import os
    try:
        return len(os.sched_getaffinity(0))
    except AttributeError:          # not on Linux
        return os.cpu_count() or 1


class _Binner:
    """Holds the kernel arguments and scratch buffers for one binning run."""

    def __init__(self, state: BinningState, energy_window, accumulate: str | None = None,
                 add_to_sinograms: bool = True):
        # add_to_sinograms=False: classify and count only (callers that weight the events themselves).
        self.add_to_sinograms = add_to_sinograms
        g = state.geometry
        self.accumulate = accumulate or ACCUMULATE
        if self.accumulate not in ("lean", "direct", "partitioned"):
            raise ValueError(f"unknown accumulate mode {self.accumulate!r}")
        self.state = state
        self.g = g
        self.use_energy = energy_window is not None
        lo, hi = energy_window if energy_window is not None else (0.0, 0.0)
        self.e_lo, self.e_hi = np.float32(lo), np.float32(hi)
        if state.frames_s is None:
            self.use_time = False
            self.starts = np.zeros(1, np.int64)
            self.ends = np.full(1, _NO_TIME_LIMIT, np.int64)
        else:
            self.use_time = True
            self.starts = np.array([seconds_to_ns(a) for a, _ in state.frames_s], np.int64)
            self.ends = np.array([seconds_to_ns(b) for _, b in state.frames_s], np.int64)
        self.bins_per_plane = g.views * g.radial_bins
        self.n_bins = g.n_bins
        self.n_keys = state.n_frames * g.planes
        # Many-frame states keep codes per frame (see BinningState); touch no dense array then.
        self.sparse = not state.is_dense
        if self.sparse:
            self.frame_offsets = np.zeros(state.n_frames + 1, np.int64)
            self.split_codes = np.zeros(0, np.uint32)
            self.prompts_flat = self.delayed_flat = np.zeros(1, np.int32)
        else:
            self.prompts_flat = state.prompts.reshape(-1)
            self.delayed_flat = state.delayed.reshape(-1) if state.delayed is not None else np.zeros(1, np.int32)
        self.key_counts = np.zeros(self.n_keys + 1, np.int64)
        self.codes = np.zeros(0, np.int64)
        self.sorted_codes = np.zeros(0, np.int64)
        self.inplane_code, factors = _inplane_tables(g)
        self.factored = factors is not None
        self.by_sum, self.half, self.by_diff = factors if factors is not None else (
            np.zeros(1, np.int32), np.zeros(1, np.int32), np.zeros((2, 1), np.int32))
        self.ring_of, self.position_of = kernels.crystal_tables(g.scanner.rings, g.scanner.crystals_per_ring)
        self.plane_of_rings = np.ascontiguousarray(g.plane_of_rings, dtype=np.int32)
        self.no_time = np.zeros(0, np.int64)
        self.no_flag = np.zeros(0, np.bool_)
        self.no_energy = np.zeros(0, np.float32)
        self.lean = None
        if self.accumulate == "lean":
            self.lean = kernels.lean_tables(self.ring_of, self.position_of, g.scanner.crystals_per_ring,
                                            self.by_sum, self.half, self.by_diff,
                                            self.plane_of_rings) if self.factored else None
        if self.lean is None and self.accumulate == "lean":
            self.accumulate = "direct"          # many frames, or a geometry the lean tables do not fit
        if self.lean is not None:
            self.tally = np.zeros((4, (state.n_frames + 1) * 16), np.int64)
            self.tallies: list = []
            self.lists: list = []
            self.n_threads = 2 if _usable_cores() >= 2 else 1

    def add(self, arrays: dict) -> None:
        ca = _column(arrays, "crystal_a", np.int32)
        cb = _column(arrays, "crystal_b", np.int32)
        n = len(ca)
        if len(cb) != n:
            raise TwinrayInputError("crystal_a and crystal_b have different lengths")
        if n == 0:
            return
        t = _column(arrays, "time_ns", np.int64) if self.use_time else self.no_time
        d = _column(arrays, "delayed", np.bool_) if "delayed" in arrays else self.no_flag
        if "delayed" in arrays and not self.state.with_delayed:
            raise TwinrayInputError("events have a delayed column but the binning state has no delayed sinogram")
        if self.use_energy:
            ea = _column(arrays, "energy_a_kev", np.float32)
            eb = _column(arrays, "energy_b_kev", np.float32)
        else:
            ea = eb = self.no_energy
        for name, arr in (("time_ns", t), ("delayed", d), ("energy_a_kev", ea), ("energy_b_kev", eb)):
            if arr.size and len(arr) != n:
                raise TwinrayInputError(f"column {name} has {len(arr)} rows, crystal_a has {n}")
        if len(self.codes) < n:
            self.codes = np.empty(n, np.int64)
            if self.accumulate == "partitioned":
                self.sorted_codes = np.empty(n, np.int64)
        codes = self.codes[:n]
        sc = self.g.scanner
        if self.lean is not None:
            self._add_lean(ca, cb, t, d, ea, eb, codes)
            return
        kernels.classify_batch(ca, cb, t, self.use_time, d, d.size > 0, ea, eb, self.use_energy,
                               self.e_lo, self.e_hi, self.starts, self.ends, sc.n_crystals, self.ring_of,
                               self.position_of, self.inplane_code, self.factored, self.by_sum, self.half,
                               self.by_diff, self.plane_of_rings, self.bins_per_plane, self.n_bins, codes,
                               self.state.counts)
        if not self.add_to_sinograms:
            pass
        elif self.sparse:
            self._add_to_stores(codes)
        elif self.accumulate == "direct":
            kernels.accumulate_codes_direct(codes, self.prompts_flat, self.delayed_flat)
        else:
            kernels.accumulate_codes(codes, self.prompts_flat, self.delayed_flat, self.bins_per_plane,
                                     self.n_keys, self.key_counts, self.sorted_codes)


    def _add_lean(self, ca, cb, t, d, ea, eb, codes) -> None:
        """Lean kernels, on two threads for large batches.

        Each thread classifies half the batch, tallies it and lists its
        increments by parity of the target element; then each thread makes
        the increments of one parity from both halves (no element has two
        writers). Many-frame states hand the codes to the frames' stores.
        """
        n = len(ca)
        multiplier, by_sum, diff_flat, plane_flat, first_reason = self.lean
        sc = self.g.scanner
        threaded = self.n_threads > 1 and n >= _THREADED_BATCH
        cuts = [0, n // 2, n] if threaded else [0, n]
        n_parts = len(cuts) - 1
        if len(self.lists) < 2 * n_parts or len(self.lists[0]) < n:
            self.lists = [np.empty(n, np.int64) for _ in range(2 * n_parts)]
            self.tallies = [np.zeros_like(self.tally) for _ in range(n_parts)]
        lists = [x[:cuts[p + 1] - cuts[p]] for p in range(n_parts) for x in self.lists[2 * p:2 * p + 2]]
        combined = self.state._combined
        n_total = 0 if combined is None else (len(combined) // (2 if self.state.with_delayed else 1))

        def classify(p):
            lo, hi = cuts[p], cuts[p + 1]
            kernels.classify_lean(ca[lo:hi], cb[lo:hi], t[lo:hi] if self.use_time else t, self.use_time,
                                  self.starts, self.ends, d[lo:hi] if d.size else d, d.size > 0,
                                  ea[lo:hi] if self.use_energy else ea, eb[lo:hi] if self.use_energy else eb,
                                  self.use_energy, self.e_lo, self.e_hi, sc.n_crystals, multiplier,
                                  sc.crystals_per_ring, by_sum, diff_flat, plane_flat, sc.rings,
                                  self.bins_per_plane, self.n_bins, first_reason, codes[lo:hi])
            self.tallies[p][:] = 0
            return kernels.tally_and_split(codes[lo:hi], self.n_bins, n_total, self.tallies[p], lists[2 * p],
                                           lists[2 * p + 1])

        if threaded:
            pool = _thread_pool()
            lengths = [f.result() for f in [pool.submit(classify, p) for p in range(n_parts)]]
        else:
            lengths = [classify(0)]
        if not self.add_to_sinograms:
            pass
        elif self.sparse:
            self._add_to_stores(codes)
        elif combined is None:
            kernels.accumulate_share(codes, self.prompts_flat, self.delayed_flat, 0, 1)
        elif threaded:
            def add(parity):
                for p in range(n_parts):
                    kernels.add_listed(lists[2 * p + parity], lengths[p][parity], combined)
            for f in [_thread_pool().submit(add, parity) for parity in (0, 1)]:
                f.result()
        else:
            for parity in (0, 1):
                kernels.add_listed(lists[parity], lengths[0][parity], combined)
        total = sum(x.sum(axis=0) for x in self.tallies[:n_parts])
        batch = total.reshape(-1, 16)[:, :len(FIELDS)]
        batch[:, READ] = batch.sum(axis=1)
        self.state.counts += batch

    def _add_to_stores(self, codes) -> None:
        """Hand the binned codes of a batch to the stores of their frames (many-frame states)."""
        n = len(codes)
        if len(self.split_codes) < n:
            self.split_codes = np.empty(n, np.uint32)
        kernels.split_by_frame(codes, self.n_bins, self.frame_offsets, self.split_codes)
        for k in np.flatnonzero(np.diff(self.frame_offsets)):
            self.state._stores[k].add(self.split_codes[self.frame_offsets[k]:self.frame_offsets[k + 1]])


_TABLES_CACHE: dict = {}


def _inplane_tables(geometry: SinogramGeometry):
    """``(inplane_code, factors or None)`` of a geometry, built once per layout.

    The factors (:func:`twinray._binning_kernels.inplane_factors`) are checked
    to reproduce the full table exactly; without them the full table is used.
    """
    key = (geometry.scanner.to_json(), geometry.rebin)
    if key not in _TABLES_CACHE:
        code = kernels.inplane_codes(geometry.inplane_bin, geometry.inplane_end1_is_a)
        code.setflags(write=False)
        _TABLES_CACHE[key] = (code, kernels.inplane_factors(code, geometry.radial_bins))
    return _TABLES_CACHE[key]


def _column(arrays: dict, name: str, dtype) -> np.ndarray:
    if name not in arrays:
        raise TwinrayInputError(f"events have no column '{name}'")
    arr = np.asarray(arrays[name])
    if arr.ndim != 1:
        raise TwinrayInputError(f"column '{name}' must be one-dimensional")
    if arr.dtype != dtype:
        if name.startswith("crystal") and arr.dtype.kind in "iu":
            # Out-of-range ids must stay out of range after the cast.
            arr = np.clip(arr, -1, np.iinfo(np.int32).max)
        arr = arr.astype(dtype)
    return np.ascontiguousarray(arr)


def _energy_window(energy_window, scanner, has_energy: bool):
    if energy_window is False or energy_window is None or not has_energy:
        return None
    if energy_window is True:
        return tuple(float(v) for v in scanner.energy_window_kev)
    lo, hi = (float(v) for v in energy_window)
    if not (0 <= lo < hi):
        raise TwinrayInputError(f"energy window must satisfy 0 <= lo < hi keV, got [{lo:g}, {hi:g}]")
    return lo, hi


def bin_event_arrays(columns: dict, geometry: SinogramGeometry, *, frames=None, energy_window=True,
                     state: BinningState | None = None, accumulate: str | None = None) -> BinningState:
    """Bin events held in memory.

    Parameters
    ----------
    columns : dict of str to ndarray
        ``crystal_a``, ``crystal_b`` (int), and where present ``time_ns``
        (needed when ``frames`` is given), ``delayed`` (bool),
        ``energy_a_kev`` and ``energy_b_kev`` (keV).
    geometry : SinogramGeometry
    frames : sequence of (start_s, end_s), optional
        Half-open time frames, seconds; default one frame for every event.
    energy_window : bool or (lo, hi)
        True: the scanner's window, applied when energy columns are present;
        False: no energy selection; or an explicit window in keV (inclusive).
    state : BinningState, optional
        Add to this state (in place) instead of a new one.
    accumulate : {"direct", "partitioned"}, optional
        Kernel used to add events to the sinograms (same result; default
        :data:`ACCUMULATE`).

    Returns
    -------
    BinningState
    """
    has_delayed = "delayed" in columns
    if state is None:
        state = empty_state(geometry, frames, with_delayed=has_delayed)
    if state.frames_s is not None and "time_ns" not in columns:
        raise TwinrayInputError("binning into time frames needs the time_ns column")
    has_energy = "energy_a_kev" in columns and "energy_b_kev" in columns
    binner = _Binner(state, _energy_window(energy_window, geometry.scanner, has_energy), accumulate)
    binner.add(columns)
    return state


def bin_events(events, geometry: SinogramGeometry | None = None, *, frames=None, rebin: str = "none",
               scanner=None, batch_size: int = DEFAULT_BATCH_SIZE, energy_window=True, progress=None,
               prefetch: int = 2) -> BinningState:
    """Stream an event study into prompts and delayed sinograms.

    Parameters
    ----------
    events : path-like or EventSource
        One Parquet file or a folder of them (see :func:`twinray.events.open_events`).
    geometry : SinogramGeometry, optional
        Default: ``sinogram_geometry(events.scanner, rebin)``.
    frames : sequence of (start_s, end_s), optional
        Sorted, non-overlapping half-open frames ``START*1e9 <= time_ns <
        END*1e9``, all filled in one pass. Default: one frame holding every
        event (``time_ns`` is then not even decoded).
    rebin : {"none", "ssrb"}
        Used when ``geometry`` is not given.
    scanner : Scanner or path-like, optional
        ``--scanner`` geometry, when ``events`` is a path.
    batch_size : int
        Rows decoded per batch; memory use is proportional to it, not to the
        size of the study.
    energy_window : bool or (lo, hi)
        See :func:`bin_event_arrays`. Applied only when the files have
        energy columns.
    progress : callable, optional
        Called with the number of rows done after every batch.
    prefetch : int
        Batches decoded ahead in a background thread (0: no thread).

    Returns
    -------
    BinningState

    Notes
    -----
    Decoding (pyarrow, in a thread) overlaps with the numba kernels, which
    release the GIL. The kernels first look up the in-plane bin of a whole
    batch in one tight loop, from small tables by crystal-index sum and
    difference that are checked to reproduce the geometry's table exactly,
    then decide bins and rejections with branch-free selects, then add the
    events.

    References
    ----------
    M. E. Daube-Witherspoon and G. Muehllehner, "Treatment of axial data in
    three-dimensional PET", J Nucl Med 28(11):1717-1724, 1987 (SSRB).
    F. H. Fahey, "Data acquisition in PET imaging", J Nucl Med Technol
    30(2):39-49, 2002 (michelogram, span, maximum ring difference).
    """
    source = events if isinstance(events, EventSource) else open_events(events, scanner)
    if geometry is None:
        geometry = sinogram_geometry(source.scanner, rebin)
    else:
        from .scanner import check_same_geometry
        check_same_geometry(source.scanner, geometry.scanner, f"events {source.path}")
    state = empty_state(geometry, frames, with_delayed=source.has_delayed)
    window = _energy_window(energy_window, geometry.scanner, source.has_energy)
    columns = ["crystal_a", "crystal_b"]
    if state.frames_s is not None:
        columns.insert(0, "time_ns")
    if source.has_delayed:
        columns.append("delayed")
    if window is not None:
        columns += ["energy_a_kev", "energy_b_kev"]
    binner = _Binner(state, window)
    for _, arrays in iter_event_batches(source, columns, batch_size, prefetch=prefetch):
        binner.add(arrays)
        if progress is not None:
            progress(len(arrays["crystal_a"]))
    return state
