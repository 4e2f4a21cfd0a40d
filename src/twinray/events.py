"""Streaming reader for coincidence event files (data contract, section 2).

A study is one Parquet file or a folder of ``*.parquet`` files read in name
order. :func:`open_events` checks everything that can be checked without
decoding the data (file type, columns and their Arrow types, the ``twinray``
metadata, agreement with a ``--scanner`` file) and returns an
:class:`EventSource`; :func:`iter_event_batches` then streams batches of
plain numpy arrays with only the columns asked for, so memory stays flat
however large the study is.
"""

from __future__ import annotations

import dataclasses
import json
import queue
import threading
from pathlib import Path

import numpy as np
import pyarrow as pa
import pyarrow.parquet as pq

from .errors import TwinrayInputError
from .event_writer import COLUMN_TYPES, METADATA_KEY, REQUIRED_COLUMNS, SCHEMA_VERSION
from .scanner import Scanner, check_same_geometry, load_scanner, merge_scanner_options, scanner_from_dict

#: Rows per decoded batch unless asked otherwise (about 17 MB of arrays).
DEFAULT_BATCH_SIZE = 1 << 20

OPTIONAL_COLUMNS = ("delayed", "tof_ps", "energy_a_kev", "energy_b_kev")
ENERGY_COLUMNS = ("energy_a_kev", "energy_b_kev")


@dataclasses.dataclass(frozen=True)
class EventSource:
    """A validated event study, ready to stream.

    Attributes
    ----------
    path : Path
        What the user named: one file or a folder.
    paths : tuple of Path
        The Parquet files read, in name order.
    scanner : Scanner
        Embedded geometry merged with the ``--scanner`` options (if any).
    metadata : dict
        The ``twinray`` metadata object of the first file (empty if none).
    columns : tuple of str
        Contract columns present in every file (extra columns are ignored).
    rows_per_file : tuple of int
    ignored : tuple of str
        Names in a folder study that are not ``*.parquet`` and were skipped.
    """

    path: Path
    paths: tuple
    scanner: Scanner
    metadata: dict
    columns: tuple
    rows_per_file: tuple
    ignored: tuple = ()

    @property
    def num_rows(self) -> int:
        """Total number of events in the study."""
        return int(sum(self.rows_per_file))

    @property
    def has_delayed(self) -> bool:
        return "delayed" in self.columns

    @property
    def has_energy(self) -> bool:
        return all(c in self.columns for c in ENERGY_COLUMNS)

    @property
    def has_tof(self) -> bool:
        return "tof_ps" in self.columns

    @property
    def duration_s(self) -> float | None:
        """Acquisition length from the metadata, seconds (None if not given)."""
        value = self.metadata.get("duration_s")
        if isinstance(value, (int, float)) and not isinstance(value, bool) and np.isfinite(value) and value >= 0:
            return float(value)
        return None


def _list_files(path: Path):
    if not path.exists():
        raise TwinrayInputError(f"event path {path} does not exist")
    if path.is_dir():
        entries = sorted(path.iterdir())
        # Hidden names (e.g. a writer's temporary ".name.part.parquet") are not read either.
        files = [p for p in entries if p.is_file() and p.suffix == ".parquet" and not p.name.startswith(".")]
        ignored = tuple(p.name for p in entries if p not in files)
        if not files:
            raise TwinrayInputError(f"event folder {path} contains no *.parquet files")
        return files, ignored
    return [path], ()


def _open_parquet(path: Path) -> pq.ParquetFile:
    try:
        size = path.stat().st_size
    except OSError as exc:
        raise TwinrayInputError(f"cannot read event file {path}: {exc.strerror}") from None
    if size == 0:
        raise TwinrayInputError(f"event file {path} is empty (0 bytes)")
    try:
        return pq.ParquetFile(path, pre_buffer=False)
    except (pa.ArrowException, OSError, ValueError):
        raise TwinrayInputError(
            f"event file {path} is not a readable Parquet file (corrupt, truncated or another format)") from None


def _check_schema(path: Path, schema: pa.Schema) -> tuple:
    names = set(schema.names)
    for name in REQUIRED_COLUMNS:
        if name not in names:
            raise TwinrayInputError(f"event file {path} has no column '{name}' (required: "
                                    f"{', '.join(REQUIRED_COLUMNS)})")
    present = []
    for name, kind in COLUMN_TYPES.items():
        if name not in names:
            continue
        if schema.names.count(name) > 1:
            raise TwinrayInputError(f"event file {path} has column '{name}' more than once")
        got = schema.field(name).type
        if got != kind:
            raise TwinrayInputError(f"column '{name}' of {path} has type {got}, expected {kind}")
        present.append(name)
    energies = [c for c in ENERGY_COLUMNS if c in names]
    if len(energies) == 1:
        raise TwinrayInputError(f"event file {path} has '{energies[0]}' but not the other energy column; "
                                "the energy window needs both photons")
    return tuple(present)


def _read_metadata(path: Path, schema: pa.Schema) -> dict | None:
    raw = (schema.metadata or {}).get(METADATA_KEY)
    if raw is None:
        return None
    try:
        meta = json.loads(raw)
    except (json.JSONDecodeError, UnicodeDecodeError):
        raise TwinrayInputError(f"event file {path}: 'twinray' metadata is not valid JSON") from None
    if not isinstance(meta, dict):
        raise TwinrayInputError(f"event file {path}: 'twinray' metadata must be a JSON object")
    version = meta.get("schema_version")
    if version != SCHEMA_VERSION:
        raise TwinrayInputError(
            f"event file {path}: 'twinray' metadata schema_version is {version!r}, this reader knows {SCHEMA_VERSION}")
    if "scanner" not in meta:
        raise TwinrayInputError(f"event file {path}: 'twinray' metadata has no 'scanner' table")
    return meta


def open_events(path, scanner=None) -> EventSource:
    """Open and validate an event file or a folder of event files.

    Parameters
    ----------
    path : path-like
        A Parquet file, or a folder whose ``*.parquet`` files are read in name
        order (other names are ignored and listed in ``EventSource.ignored``).
    scanner : Scanner or path-like, optional
        A ``--scanner`` geometry. Its crystal geometry must agree with the one
        embedded in the files (relative tolerance 1e-6); its ``[sinogram]``
        table, windows and TOF resolution override the embedded ones. Files
        without ``twinray`` metadata need it.

    Returns
    -------
    EventSource

    Raises
    ------
    TwinrayInputError
        Missing path, empty or non-Parquet file, missing required column,
        wrong Arrow type, bad metadata, geometry disagreement; the message
        names the file and column.
    """
    path = Path(path)
    given = scanner
    if given is not None and not isinstance(given, Scanner):
        given = load_scanner(given)
    files, ignored = _list_files(path)
    columns = None
    rows = []
    first_meta = None
    embedded = None
    for f in files:
        pf = _open_parquet(f)
        schema = pf.schema_arrow
        present = _check_schema(f, schema)
        if columns is None:
            columns = present
        elif present != columns:
            raise TwinrayInputError(f"event file {f} has columns {', '.join(present)} but {files[0].name} has "
                                    f"{', '.join(columns)}; all files of a study need the same columns")
        meta = _read_metadata(f, schema)
        if meta is not None:
            this = scanner_from_dict(meta["scanner"], source=f"event file {f} metadata 'scanner'")
            if embedded is None:
                embedded, first_meta = this, meta
            else:
                check_same_geometry(embedded, this, f"event file {f}")
        rows.append(int(pf.metadata.num_rows))
    if embedded is None:
        if given is None:
            raise TwinrayInputError(f"event file {files[0]} has no 'twinray' metadata; give the geometry with --scanner")
        merged = given
    else:
        merged = merge_scanner_options(embedded, given, f"event file {files[0]}")
    return EventSource(path=path, paths=tuple(files), scanner=merged, metadata=dict(first_meta or {}),
                       columns=columns, rows_per_file=tuple(rows), ignored=ignored)


def _as_source(events, scanner=None) -> EventSource:
    if isinstance(events, EventSource):
        return events
    return open_events(events, scanner)


def _column_to_numpy(array: pa.Array, name: str, path: Path) -> np.ndarray:
    if array.null_count:
        raise TwinrayInputError(f"column '{name}' of {path} has {array.null_count} missing (null) values")
    out = array.to_numpy(zero_copy_only=False)
    return np.ascontiguousarray(out)


def _raw_batches(source: EventSource, columns, batch_size: int):
    first_row = 0
    for path in source.paths:
        pf = _open_parquet(path)
        try:
            for batch in pf.iter_batches(batch_size=batch_size, columns=list(columns)):
                arrays = {name: _column_to_numpy(batch.column(i), name, path) for i, name in enumerate(columns)}
                n = batch.num_rows
                yield first_row, arrays
                first_row += n
        except (pa.ArrowException, OSError) as exc:
            raise TwinrayInputError(f"event file {path} could not be decoded (corrupt data: "
                                    f"{' '.join(str(exc).split())[:120]})") from None


def _prefetch(iterator, depth: int):
    """Run ``iterator`` in a background thread, ``depth`` items ahead.

    Parquet decoding releases the GIL, so it overlaps with work done on the
    previous batch (the binning kernels are ``nogil`` too).
    """
    items = queue.Queue(maxsize=depth)
    stop = threading.Event()
    done = object()

    def produce():
        try:
            for item in iterator:
                while not stop.is_set():
                    try:
                        items.put(("item", item), timeout=0.1)
                        break
                    except queue.Full:
                        continue
                if stop.is_set():
                    return
            items.put(("done", done))
        except BaseException as exc:  # handed to the consumer, re-raised there
            items.put(("error", exc))

    thread = threading.Thread(target=produce, name="twinray-decode", daemon=True)
    thread.start()
    try:
        while True:
            kind, value = items.get()
            if kind == "item":
                yield value
            elif kind == "error":
                raise value
            else:
                return
    finally:
        stop.set()
        # Drain so that a producer blocked on put() can see the stop flag.
        while thread.is_alive():
            try:
                items.get(timeout=0.05)
            except queue.Empty:
                pass
        thread.join()


def iter_event_batches(source, columns=None, batch_size: int = DEFAULT_BATCH_SIZE, *, prefetch: int = 0):
    """Stream an event study in batches of numpy arrays.

    Parameters
    ----------
    source : EventSource or path-like
    columns : sequence of str, optional
        Contract columns to decode (column projection: only these are read).
        Default: every contract column present.
    batch_size : int
        Rows per batch (the last batch of each file may be shorter).
    prefetch : int
        When > 0, decode in a background thread this many batches ahead.

    Yields
    ------
    first_row : int
        Global index (over the whole study, files in name order) of the
        batch's first row; row ``first_row + i`` is element ``i``.
    arrays : dict of str to ndarray
        One contiguous array per requested column (int64 time_ns, int32
        crystal ids, bool delayed, float32 tof/energies).
    """
    source = _as_source(source)
    if columns is None:
        columns = source.columns
    columns = tuple(columns)
    missing = [c for c in columns if c not in source.columns]
    if missing:
        raise TwinrayInputError(f"events {source.path} have no column(s) {', '.join(missing)}")
    if int(batch_size) < 1:
        raise TwinrayInputError(f"batch size must be a positive number of rows, got {batch_size}")
    it = _raw_batches(source, columns, int(batch_size))
    if prefetch > 0:
        it = _prefetch(it, int(prefetch))
    return it


def read_events(path, scanner=None, columns=None) -> dict:
    """Read a whole (small) event study into memory.

    Parameters
    ----------
    path : path-like or EventSource
    scanner : Scanner or path-like, optional
        As in :func:`open_events`.
    columns : sequence of str, optional
        Default: every contract column present.

    Returns
    -------
    dict of str to ndarray
        One array per column, all rows of the study in file order.
    """
    source = _as_source(path, scanner)
    cols = tuple(columns) if columns is not None else source.columns
    parts = {c: [] for c in cols}
    for _, arrays in iter_event_batches(source, cols):
        for c in cols:
            parts[c].append(arrays[c])
    return {c: (np.concatenate(parts[c]) if parts[c] else np.zeros(0, dtype=COLUMN_TYPES[c].to_pandas_dtype()))
            for c in cols}


def time_range_ns(source: EventSource) -> tuple | None:
    """Earliest and latest ``time_ns`` of a study, or None when it has no rows.

    Uses the Parquet column statistics when every row group has them (no
    decoding); otherwise streams the ``time_ns`` column once.
    """
    source = _as_source(source)
    if source.num_rows == 0:
        return None
    lo, hi = None, None
    for path in source.paths:
        meta = _open_parquet(path).metadata
        col = meta.schema.names.index("time_ns")
        for g in range(meta.num_row_groups):
            rg = meta.row_group(g)
            if rg.num_rows == 0:
                continue
            stats = rg.column(col).statistics
            if stats is None or not stats.has_min_max:
                lo = None
                break
            lo = stats.min if lo is None else min(lo, stats.min)
            hi = stats.max if hi is None else max(hi, stats.max)
        else:
            continue
        break
    if lo is not None:
        return int(lo), int(hi)
    lo, hi = None, None
    for _, arrays in iter_event_batches(source, ("time_ns",)):
        t = arrays["time_ns"]
        if t.size:
            lo = int(t.min()) if lo is None else min(lo, int(t.min()))
            hi = int(t.max()) if hi is None else max(hi, int(t.max()))
    return (lo, hi) if lo is not None else None


@dataclasses.dataclass(frozen=True)
class EventStatistics:
    """What ``twinray inspect`` reports about a study.

    Attributes
    ----------
    rows : int
        Events read.
    prompts, delayed : int
        Events by kind (all rows are prompts when there is no ``delayed`` column).
    invalid_crystal : int
        Rows with a crystal id outside the scanner.
    time_min_ns, time_max_ns : int or None
    rate_bin_s : float
        Width of the count-rate bins, seconds.
    prompts_per_bin, delayed_per_bin : ndarray of int64
        Counts per bin ``[k*rate_bin_s, (k+1)*rate_bin_s)`` from time 0.
    before_start : int
        Rows with negative ``time_ns`` (not in any rate bin).
    energy_kev : dict or None
        ``{"min", "max", "mean"}`` over both photons, when energy columns exist.
    """

    rows: int
    prompts: int
    delayed: int
    invalid_crystal: int
    time_min_ns: int | None
    time_max_ns: int | None
    rate_bin_s: float
    prompts_per_bin: np.ndarray
    delayed_per_bin: np.ndarray
    before_start: int
    energy_kev: dict | None


def _nice_bin_s(duration_s: float) -> float:
    """A round bin width giving about 20-50 bins over ``duration_s``."""
    if not duration_s or duration_s <= 0:
        return 1.0
    target = duration_s / 30.0
    for step in (0.001, 0.002, 0.005, 0.01, 0.02, 0.05, 0.1, 0.2, 0.5, 1, 2, 5, 10, 15, 30, 60, 120, 300, 600,
                 900, 1800, 3600):
        if step >= target:
            return float(step)
    return 3600.0 * np.ceil(target / 3600.0)


MAX_RATE_BINS = 1_000_000


def event_statistics(source, rate_bin_s: float | None = None, batch_size: int = DEFAULT_BATCH_SIZE,
                     progress=None) -> EventStatistics:
    """Count events by kind and over time, streaming once through the study.

    Parameters
    ----------
    source : EventSource or path-like
    rate_bin_s : float, optional
        Width of the count-rate bins, seconds. Default: a round value giving
        about 30 bins over the acquisition.
    batch_size : int
    progress : callable, optional
        Called with the number of rows of each batch done.

    Returns
    -------
    EventStatistics
    """
    source = _as_source(source)
    if rate_bin_s is None:
        duration = source.duration_s
        if duration is None:
            span = time_range_ns(source)
            duration = (span[1] + 1) * 1e-9 if span else 0.0
        rate_bin_s = _nice_bin_s(duration)
    rate_bin_s = float(rate_bin_s)
    if not np.isfinite(rate_bin_s) or rate_bin_s <= 0:
        raise TwinrayInputError(f"count-rate bin must be a positive number of seconds, got {rate_bin_s}")
    bin_ns = rate_bin_s * 1e9
    cols = ["time_ns", "crystal_a", "crystal_b"]
    if source.has_delayed:
        cols.append("delayed")
    if source.has_energy:
        cols += list(ENERGY_COLUMNS)
    n_crystals = source.scanner.n_crystals
    prompts_hist = np.zeros(0, np.int64)
    delayed_hist = np.zeros(0, np.int64)
    rows = n_delayed = invalid = before = 0
    t_lo = t_hi = None
    e_min, e_max, e_sum, e_n = np.inf, -np.inf, 0.0, 0
    for _, a in iter_event_batches(source, cols, batch_size, prefetch=2):
        t = a["time_ns"]
        n = len(t)
        if n == 0:
            continue
        rows += n
        t_lo = int(t.min()) if t_lo is None else min(t_lo, int(t.min()))
        t_hi = int(t.max()) if t_hi is None else max(t_hi, int(t.max()))
        ca, cb = a["crystal_a"], a["crystal_b"]
        invalid += int(np.count_nonzero((ca < 0) | (ca >= n_crystals) | (cb < 0) | (cb >= n_crystals)))
        d = a["delayed"] if "delayed" in a else np.zeros(n, bool)
        n_delayed += int(np.count_nonzero(d))
        ok = t >= 0
        before += int(n - np.count_nonzero(ok))
        k = (t[ok] // bin_ns).astype(np.int64) if bin_ns != int(bin_ns) else t[ok] // int(bin_ns)
        if k.size:
            need = int(k.max()) + 1
            if need > MAX_RATE_BINS:
                raise TwinrayInputError(f"count-rate bin of {rate_bin_s:g} s gives more than {MAX_RATE_BINS} bins "
                                        f"for {source.path}; choose a wider --rate-bin")
            if need > len(prompts_hist):
                prompts_hist = np.pad(prompts_hist, (0, need - len(prompts_hist)))
                delayed_hist = np.pad(delayed_hist, (0, need - len(delayed_hist)))
            dk = d[ok]
            prompts_hist += np.bincount(k[~dk], minlength=len(prompts_hist))
            delayed_hist += np.bincount(k[dk], minlength=len(delayed_hist))
        if source.has_energy:
            for e in (a["energy_a_kev"], a["energy_b_kev"]):
                finite = e[np.isfinite(e)]
                if finite.size:
                    e_min = min(e_min, float(finite.min()))
                    e_max = max(e_max, float(finite.max()))
                    e_sum += float(finite.sum(dtype=np.float64))
                    e_n += finite.size
        if progress is not None:
            progress(n)
    # Show the whole acquisition even where the tail has no events.
    duration = source.duration_s
    if duration is not None:
        want = int(np.ceil(duration * 1e9 / bin_ns - 1e-9))
        if 0 < want <= MAX_RATE_BINS and want > len(prompts_hist):
            prompts_hist = np.pad(prompts_hist, (0, want - len(prompts_hist)))
            delayed_hist = np.pad(delayed_hist, (0, want - len(delayed_hist)))
    energy = None
    if source.has_energy and e_n:
        energy = {"min": e_min, "max": e_max, "mean": e_sum / e_n}
    return EventStatistics(rows=rows, prompts=rows - n_delayed, delayed=n_delayed, invalid_crystal=invalid,
                           time_min_ns=t_lo, time_max_ns=t_hi, rate_bin_s=rate_bin_s,
                           prompts_per_bin=prompts_hist, delayed_per_bin=delayed_hist, before_start=before,
                           energy_kev=energy)


def inspect_events(path, scanner=None, rate_bin_s: float | None = None, batch_size: int = DEFAULT_BATCH_SIZE,
                   progress=None) -> dict:
    """Everything ``twinray inspect`` shows, as one JSON-ready dict.

    Parameters
    ----------
    path : path-like or EventSource
    scanner : Scanner or path-like, optional
    rate_bin_s : float, optional
        Count-rate bin width, seconds (default: about 30 bins).
    batch_size : int
    progress : callable, optional
        ``progress(rows_done_in_batch, total_rows)``.

    Returns
    -------
    dict
        ``files`` (name, rows), ``ignored``, ``schema`` (column, Arrow type,
        nullable), ``metadata`` (the ``twinray`` object), ``scanner`` (after
        ``--scanner``), ``counts`` (rows, prompts, delayed, invalid crystal),
        ``time`` (first/last event, s), ``count_rate`` (bin width, bin starts,
        prompts and delayed per second), ``energy_kev`` and an ``accounting``
        object: inspect counts events by kind, it bins nothing, so
        ``prompts_binned``/``delayed_binned`` count the rows of each kind with
        valid crystal ids and the rest are ``rejected_invalid_crystal``.
    """
    source = _as_source(path, scanner)
    schema = _open_parquet(source.paths[0]).schema_arrow
    total = source.num_rows
    report = (lambda n: progress(n, total)) if progress is not None else None
    stats = event_statistics(source, rate_bin_s, batch_size, progress=report)
    width = stats.rate_bin_s
    n_bins = len(stats.prompts_per_bin)
    # Split the invalid rows by kind so the accounting balances.
    counts_valid = stats.rows - stats.invalid_crystal
    delayed_valid = stats.delayed
    if stats.invalid_crystal:
        delayed_valid = _count_valid_delayed(source, batch_size) if source.has_delayed else 0
    accounting = {name: 0 for name in ("read", "prompts_binned", "delayed_binned", "rejected_invalid_crystal",
                                       "rejected_outside_frame", "rejected_energy_window", "rejected_no_lor",
                                       "rejected_ring_difference", "rejected_radial_fov")}
    accounting.update(read=stats.rows, prompts_binned=counts_valid - delayed_valid, delayed_binned=delayed_valid,
                      rejected_invalid_crystal=stats.invalid_crystal)
    return {
        "events": str(source.path),
        "files": [{"name": p.name, "rows": r} for p, r in zip(source.paths, source.rows_per_file)],
        "ignored": list(source.ignored),
        "schema": [{"name": f.name, "type": str(f.type), "nullable": bool(f.nullable)} for f in schema],
        "metadata": source.metadata,
        "scanner": source.scanner.to_dict(),
        "counts": {"rows": stats.rows, "prompts": stats.prompts, "delayed": stats.delayed,
                   "invalid_crystal": stats.invalid_crystal, "negative_time": stats.before_start},
        "time": {"first_event_s": None if stats.time_min_ns is None else stats.time_min_ns * 1e-9,
                 "last_event_s": None if stats.time_max_ns is None else stats.time_max_ns * 1e-9,
                 "duration_s": source.duration_s},
        "count_rate": {"bin_s": width, "start_s": (np.arange(n_bins) * width).tolist(),
                       "prompts_per_s": (stats.prompts_per_bin / width).tolist(),
                       "delayed_per_s": (stats.delayed_per_bin / width).tolist()},
        "energy_kev": stats.energy_kev,
        "accounting": accounting,
    }


def _count_valid_delayed(source: EventSource, batch_size: int) -> int:
    n_crystals = source.scanner.n_crystals
    total = 0
    for _, a in iter_event_batches(source, ("crystal_a", "crystal_b", "delayed"), batch_size):
        ca, cb = a["crystal_a"], a["crystal_b"]
        ok = (ca >= 0) & (ca < n_crystals) & (cb >= 0) & (cb < n_crystals)
        total += int(np.count_nonzero(a["delayed"] & ok))
    return total
