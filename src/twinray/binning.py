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
from .accounting import FIELDS, READ
from .errors import TwinrayInputError
from .events import DEFAULT_BATCH_SIZE, EventSource, iter_event_batches, open_events
from .binning_state import BinningState, check_frames, empty_state, sinograms_from_codes
from .geometry import SinogramGeometry, sinogram_geometry

__all__ = ["BinningState", "bin_event_arrays", "bin_events", "check_frames", "empty_state", "seconds_to_ns",
           "sinograms_from_codes"]

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


#: How events are binned: "lean" (arithmetic classification, two threads; "direct" when the
#: geometry does not allow its tables), "direct" (table classification, increments in
#: event order) or "partitioned" (the same, counting sort by plane before the increments). All give the
#: same result; bench/bench_binning.py compares them.
ACCUMULATE = "lean"

#: Smallest batch that is split between two threads.
_THREADED_BATCH = 1 << 16
_POOL = (None, None)      # (process id, executor)


def _thread_pool():
    """Two worker threads for the lean kernels (which release the GIL), made on first use.

    Made again in a forked child process, which inherits the executor but
    not its threads (work submitted to it would never run).
    """
    global _POOL
    import os

    pid, pool = _POOL
    if pool is None or pid != os.getpid():
        from concurrent.futures import ThreadPoolExecutor
        pool = ThreadPoolExecutor(max_workers=2, thread_name_prefix="twinray-bin")
        _POOL = (os.getpid(), pool)
    return pool


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
            self.accumulate = "direct"          # a geometry whose tables do not allow the lean form
        if self.lean is not None:
            self.tally_shape = (4, (state.n_frames + 1) * 16)      # 4 copies x (frame or outside) x field
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
            self.tallies = [np.zeros(self.tally_shape, np.int64) for _ in range(n_parts)]
        lists = [x[:cuts[p + 1] - cuts[p]] for p in range(n_parts) for x in self.lists[2 * p:2 * p + 2]]
        combined = self.state._combined
        n_total = 0 if combined is None else (len(combined) // (2 if self.state.with_delayed else 1))
        # The increment lists serve only dense states held in one combined array.
        listing = self.add_to_sinograms and not self.sparse and combined is not None

        def classify(p):
            lo, hi = cuts[p], cuts[p + 1]
            kernels.classify_lean(ca[lo:hi], cb[lo:hi], t[lo:hi] if self.use_time else t, self.use_time,
                                  self.starts, self.ends, d[lo:hi] if d.size else d, d.size > 0,
                                  ea[lo:hi] if self.use_energy else ea, eb[lo:hi] if self.use_energy else eb,
                                  self.use_energy, self.e_lo, self.e_hi, sc.n_crystals, multiplier,
                                  sc.crystals_per_ring, by_sum, diff_flat, plane_flat, sc.rings,
                                  self.bins_per_plane, self.n_bins, first_reason, codes[lo:hi])
            self.tallies[p][:] = 0
            return kernels.tally_and_split(codes[lo:hi], self.n_bins, n_total, self.tallies[p], listing,
                                           lists[2 * p], lists[2 * p + 1])

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
            kernels.accumulate_codes_direct(codes, self.prompts_flat, self.delayed_flat)
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
    release the GIL. Two threads each classify half of a batch (ring by
    multiplication, in-plane bin from small tables by crystal-index sum and
    difference checked to reproduce the geometry's table exactly, decisions
    by integer arithmetic), tally it and list its increments by parity of
    the target; then each thread adds one parity. Many-frame studies keep
    short frames as event codes (see :class:`BinningState`).

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
