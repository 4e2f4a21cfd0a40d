"""The result of binning: sinograms per frame and the accounting, mergeable.

:class:`BinningState` is what :func:`twinray.binning.bin_events` returns:
counters per frame and, per frame, either dense prompts/delayed sinograms or
(for studies of many short frames) the list of binned event codes, made
dense on demand. :func:`empty_state` makes one to bin into.
"""

from __future__ import annotations

import math

import numpy as np

from . import _binning_kernels as kernels
from .accounting import FIELDS, INVALID_CRYSTAL, OUTSIDE_FRAME, READ, Accounting
from .errors import TwinrayInputError
from .geometry import SinogramGeometry


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
