"""From an event study to a sinogram file: the library under ``twinray sinogram``.

The pipeline is

1. :func:`~twinray.events.open_events` validates the study;
2. :func:`resolve_frame` checks the requested frame against the data;
3. :func:`~twinray.binning.bin_events` streams the events into prompts and
   delayed sinograms with their accounting;
4. :func:`binned_content` turns the binned arrays, geometry and frame into a
   :class:`SinogramContent` (the datasets and root attributes that will be
   written) -- the one place where further datasets (randoms, scatter,
   norm, acf, corrected) are added before writing;
5. :func:`write_sinogram_content` writes it atomically (data contract,
   section 3).
"""

from __future__ import annotations

import dataclasses
import math
import time
from pathlib import Path

import numpy as np

from .accounting import READ, Accounting
from .atomic import refuse_overwriting_inputs
from .binning import BinningState, bin_events
from .errors import TwinrayInputError
from .events import DEFAULT_BATCH_SIZE, EventSource, open_events, time_range_ns
from .geometry import SinogramGeometry, sinogram_geometry
from .sinogram_io import write_sinogram_file

#: Metadata fields of the event file copied into the sinogram's root attributes.
_CARRIED_METADATA = ("isotope", "acquisition_start", "injection_time", "injected_activity_bq", "duration_s")


@dataclasses.dataclass(frozen=True)
class SinogramContent:
    """Everything a sinogram file holds, before it is written.

    Attributes
    ----------
    arrays : dict of str to ndarray
        Datasets, each ``(plane, view, radial)``: ``prompts`` and, when the
        events have a delayed channel, ``delayed``.
    geometry : SinogramGeometry
    frame_start_s, frame_duration_s : float
    accounting : Accounting
    attrs : dict
        Further root attributes (event metadata, options, provenance).
    """

    arrays: dict
    geometry: SinogramGeometry
    frame_start_s: float
    frame_duration_s: float
    accounting: Accounting
    attrs: dict

    def with_arrays(self, **arrays) -> "SinogramContent":
        """A copy with datasets added or replaced (e.g. ``randoms=...``)."""
        return dataclasses.replace(self, arrays={**self.arrays, **arrays})

    def with_attrs(self, **attrs) -> "SinogramContent":
        """A copy with root attributes added or replaced."""
        return dataclasses.replace(self, attrs={**self.attrs, **attrs})


@dataclasses.dataclass(frozen=True)
class SinogramResult:
    """What :func:`make_sinogram` did.

    Attributes
    ----------
    output : Path
    content : SinogramContent
        What was written.
    warnings : tuple of str
    timings_s : dict
        ``open``, ``bin``, ``write`` seconds.
    source : EventSource
    """

    output: Path
    content: SinogramContent
    warnings: tuple
    timings_s: dict
    source: EventSource

    @property
    def accounting(self) -> Accounting:
        return self.content.accounting


def parse_frame(text: str) -> tuple:
    """Parse ``START:END`` (seconds from acquisition start) into a checked frame.

    Raises
    ------
    TwinrayInputError
        Not two numbers, negative start, or end not after start.
    """
    parts = str(text).split(":")
    if len(parts) != 2:
        raise TwinrayInputError(f"--frame must be START:END in seconds, got '{text}'")
    try:
        start, end = float(parts[0]), float(parts[1])
    except ValueError:
        raise TwinrayInputError(f"--frame must be START:END in seconds, got '{text}'") from None
    if not (math.isfinite(start) and math.isfinite(end)):
        raise TwinrayInputError(f"--frame times must be finite numbers of seconds, got '{text}'")
    if start < 0:
        raise TwinrayInputError(f"--frame start must be >= 0 s, got {start:g}")
    if end <= start:
        raise TwinrayInputError(f"--frame end must be after its start, got '{text}'")
    return start, end


def data_duration_s(source: EventSource) -> float | None:
    """Acquisition length: ``duration_s`` from the metadata, else just past the last event."""
    if source.duration_s is not None:
        return source.duration_s
    span = time_range_ns(source)
    if span is None:
        return None
    return (span[1] + 1) * 1e-9


def resolve_frame(source: EventSource, frame, truncate: bool = False):
    """Check a frame against the data's duration; return ``(start_s, end_s)``.

    Parameters
    ----------
    source : EventSource
    frame : (start_s, end_s) or None
        None: the whole acquisition ``[0, duration_s)``.
    truncate : bool
        Clip a frame that runs past ``duration_s`` instead of refusing it.

    Returns
    -------
    (float, float) or None
        The frame to bin; None when no frame was asked for and the duration
        is unknown (the file has no events).

    Raises
    ------
    TwinrayInputError
        A frame past the end of the data without ``truncate`` (data contract,
        section 6), or one that starts after it.
    """
    duration = source.duration_s
    if frame is None:
        duration = data_duration_s(source)
        return None if duration is None else (0.0, duration)
    start, end = float(frame[0]), float(frame[1])
    if duration is not None and end > duration * (1 + 1e-12):
        if not truncate:
            raise TwinrayInputError(f"frame {start:g}:{end:g} s runs past the end of {source.path} "
                                    f"(duration_s = {duration:g} s); shorten it or give --truncate")
        if start >= duration:
            raise TwinrayInputError(f"frame {start:g}:{end:g} s starts after the end of {source.path} "
                                    f"(duration_s = {duration:g} s)")
        end = duration
    return start, end


def binned_content(state: BinningState, k: int = 0, *, frame_s=None, source: EventSource | None = None,
                   attrs: dict | None = None) -> SinogramContent:
    """The datasets and attributes of frame ``k`` of a binning state.

    This is the place where a sinogram's contents are assembled before
    writing; corrections add their datasets to the returned value with
    :meth:`SinogramContent.with_arrays`.

    Parameters
    ----------
    state : BinningState
    k : int
        Frame index.
    frame_s : (start_s, end_s), optional
        Frame times to record; default the state's frame ``k`` (required when
        the state has no frames).
    source : EventSource, optional
        Its metadata (isotope, times, activity) and file names are recorded.
    attrs : dict, optional
        More root attributes.

    Returns
    -------
    SinogramContent
    """
    if frame_s is None:
        if state.frames_s is None:
            raise ValueError("frame_s is required for a state binned without frames")
        frame_s = state.frames_s[k]
    arrays = {"prompts": state.prompts[k]}
    if state.delayed is not None:
        arrays["delayed"] = state.delayed[k]
    extra = {}
    if source is not None:
        extra.update({key: source.metadata[key] for key in _CARRIED_METADATA if key in source.metadata})
        extra["event_files"] = [p.name for p in source.paths]
        if source.ignored:
            extra["ignored_files"] = list(source.ignored)
        extra["energy_window_kev"] = list(state.geometry.scanner.energy_window_kev) if source.has_energy else None
    extra["delayed_channel"] = state.delayed is not None
    extra.update(attrs or {})
    return SinogramContent(arrays=arrays, geometry=state.geometry, frame_start_s=float(frame_s[0]),
                           frame_duration_s=float(frame_s[1] - frame_s[0]), accounting=state.accounting(k),
                           attrs=extra)


def write_sinogram_content(path, content: SinogramContent) -> Path:
    """Write a :class:`SinogramContent` as an HDF5 sinogram file, atomically."""
    return write_sinogram_file(path, content.arrays, content.geometry, frame_start_s=content.frame_start_s,
                               frame_duration_s=content.frame_duration_s, accounting=content.accounting,
                               attrs=content.attrs)


def _why_nothing_binned(acc: Accounting) -> str:
    reasons = {k: v for k, v in acc.to_dict().items() if k.startswith("rejected_") and v}
    if not reasons:
        return ""
    worst = max(reasons, key=reasons.get)
    return f" ({reasons[worst]} of {acc.read} {worst.replace('_', ' ')})"


def make_sinogram(events, output, *, scanner=None, frame=None, rebin: str = "none",
                  batch_size: int = DEFAULT_BATCH_SIZE, truncate: bool = False, progress=None,
                  corrections=None, norm=None, mu=None, singles=None,
                  decay_reference: str = "start") -> SinogramResult:
    """Bin an event study into a sinogram file (prompts, delayed, accounting).

    Parameters
    ----------
    events : path-like or EventSource
        A Parquet event file or a folder of them.
    output : path-like
        The ``.h5`` file to write (atomically; never one of the inputs).
    scanner : Scanner or path-like, optional
        ``--scanner`` geometry; must agree with the embedded one.
    frame : (start_s, end_s) or str, optional
        Half-open time frame in seconds (``"START:END"`` accepted). Default:
        the whole acquisition.
    rebin : {"none", "ssrb"}
    batch_size : int
        Rows per decoded batch.
    truncate : bool
        Clip a frame that runs past the data's ``duration_s``.
    progress : callable, optional
        ``progress(rows_done_in_batch, total_rows)`` after every batch.
    corrections : CorrectionOptions, optional
        Randoms, scatter and dead-time choices
        (:class:`twinray.corrections.apply.CorrectionOptions`; its
        ``randoms`` may also be ``"auto"``: delayed when the events have a
        delayed channel, else none). When this or any of ``norm``, ``mu``,
        ``singles`` is given, the file also holds ``randoms``, ``scatter``,
        ``norm``, ``acf`` and ``corrected`` (data contract section 3) and the
        frame's ``decay_correction_factor``; otherwise only the binned data.
    norm : path-like, optional
        NORM.h5 from ``twinray normalize`` (refused if made for another geometry).
    mu : path-like, optional
        mu-map NIfTI in 1/cm at 511 keV, scanner frame.
    singles : path-like, optional
        Singles Parquet file (randoms from singles, dead time).
    decay_reference : {"start", "injection"}
        Time the decay-correction factor refers to.

    Returns
    -------
    SinogramResult

    Raises
    ------
    TwinrayInputError
        Bad input (see :func:`twinray.events.open_events`), a frame past the
        data, or a run that bins no event at all (data contract, section 6).
    """
    t0 = time.perf_counter()
    source = events if isinstance(events, EventSource) else open_events(events, scanner)
    scanner_path = scanner if scanner is not None and not hasattr(scanner, "crystals_per_ring") else None
    refuse_overwriting_inputs(output, [source.path, *source.paths, scanner_path, norm, mu, singles])
    if isinstance(frame, str):
        frame = parse_frame(frame)
    if source.num_rows == 0:
        raise TwinrayInputError(f"events {source.path} contain no events; nothing to bin")
    geometry = sinogram_geometry(source.scanner, rebin)
    frame_s = resolve_frame(source, frame, truncate)
    # Corrections are prepared before binning, so a bad norm file or mu-map stops the run early.
    want_corrections = corrections is not None or any(p is not None for p in (norm, mu, singles))
    t_prep = 0.0
    if want_corrections:
        from .corrections.apply import CorrectionOptions, prepare_corrections
        from .dynamic import decay_reference_s

        corrections = corrections or CorrectionOptions()
        if corrections.randoms == "auto":
            corrections = dataclasses.replace(corrections, randoms="delayed" if source.has_delayed else "none")
        corrections = dataclasses.replace(corrections,
                                          decay_reference_s=decay_reference_s(source.metadata, decay_reference))
        if corrections.randoms == "delayed" and not source.has_delayed:
            raise TwinrayInputError(f"--randoms delayed: events {source.path} have no delayed column; "
                                    "use --randoms singles (with --singles) or --randoms none")
        t_prep = time.perf_counter()
        correction_inputs = prepare_corrections(geometry, corrections, norm_path=norm, mu_path=mu,
                                                singles_path=singles,
                                                frames_s=None if frame_s is None else [frame_s])
        t_prep = time.perf_counter() - t_prep
    t1 = time.perf_counter()
    total = source.num_rows
    report = (lambda n: progress(n, total)) if progress is not None else None
    state = bin_events(source, geometry, frames=None if frame is None else [frame_s], batch_size=batch_size,
                       progress=report)
    t2 = time.perf_counter()
    acc = state.accounting(0)
    if acc.read != total:
        raise TwinrayInputError(f"events {source.path}: read {acc.read} rows but the files declare {total}")
    warnings = []
    in_frame = int(state.counts[0, READ])
    if acc.binned == 0:
        if frame is not None and in_frame == 0:
            warnings.append(f"frame {frame_s[0]:g}:{frame_s[1]:g} s holds no events; writing empty sinograms")
        else:
            raise TwinrayInputError(f"no event of {source.path} could be binned{_why_nothing_binned(acc)}")
    content = binned_content(state, 0, frame_s=frame_s, source=source,
                             attrs={"events": str(source.path)})
    timings = {"open": round(t1 - t0 - t_prep, 4), "bin": round(t2 - t1, 4)}
    if want_corrections:
        from .corrections.apply import apply_corrections

        t_corr = time.perf_counter()
        corrected = apply_corrections(content.arrays["prompts"], content.arrays.get("delayed"), geometry,
                                      corrections, correction_inputs, frame_index=0,
                                      frame_start_s=content.frame_start_s, frame_duration_s=content.frame_duration_s,
                                      isotope=source.metadata.get("isotope"))
        content = content.with_arrays(**corrected.datasets).with_attrs(**corrected.attrs)
        warnings.extend(corrected.notes)
        timings["corrections"] = round(t_prep + time.perf_counter() - t_corr, 4)
    t2 = time.perf_counter()
    path = write_sinogram_content(output, content)
    t3 = time.perf_counter()
    timings["write"] = round(t3 - t2, 4)
    return SinogramResult(output=Path(path), content=content, warnings=tuple(warnings),
                          timings_s=timings, source=source)
