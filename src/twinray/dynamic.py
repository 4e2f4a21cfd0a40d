"""Dynamic studies: frame a study, correct and reconstruct every frame, decay-correct.

The pipeline under ``twinray dynamic``:

1. the frame schedule (:mod:`twinray.schedule`) is checked against the
   length of the data (past the end: an error unless truncated);
2. every frame is binned in ONE streaming pass over the events (the frame
   of each event is found inside the binning kernel);
3. each frame is corrected with its own prompts and delayed events and the
   shared normalization, attenuation and scatter options
   (:func:`twinray.corrections.apply.apply_corrections`), reconstructed
   (:func:`twinray.reconstruct.pipeline.reconstruct_arrays`) and multiplied
   by its decay-correction factor (:func:`twinray.decay.frame_decay_factor`),
   frames in parallel (:mod:`twinray.parallel`);
4. the frames are stacked into ``dynamic.nii.gz`` (4-D) with a BIDS PET
   sidecar.

A frame's image is the mean activity during the frame referred to the
decay reference time: ``image_k = DCF_k * (counts_k / duration_k) / ...``
with ``DCF = lambda*dt / (1 - exp(-lambda*dt)) * exp(lambda*(t0 - t_ref))``.

References
----------
DICOM PS3.3 C.8.9.4.1.5 (Frame Reference Time) for the decay factor;
BIDS specification, "Positron Emission Tomography" (sidecar keys), following
Knudsen et al., J Cereb Blood Flow Metab 40(8):1537-1546, 2020.
"""

from __future__ import annotations

import dataclasses
import datetime as _dt
import time
from pathlib import Path

import numpy as np

from .accounting import Accounting
from .errors import TwinrayInputError
from .events import DEFAULT_BATCH_SIZE, EventSource, open_events

DECAY_REFERENCES = ("start", "injection")

#: Default memory budget for the binned frames held at once (bytes).
DEFAULT_MEMORY_BYTES = 4 << 30


@dataclasses.dataclass(frozen=True)
class FrameTask:
    """One frame (or replicate) to correct and reconstruct; travels to a worker.

    Attributes
    ----------
    index : int
        Frame index (row of the singles rates, if any).
    prompts, delayed : ndarray or None
        Binned counts ``(plane, view, radial)``; delayed may be None.
        Both None when the frame comes as ``codes``.
    frame_start_s, frame_duration_s : float
        The frame as the corrections and the image units see it (a thinned
        replicate is a scan of P times the duration).
    decay_factor : float or None
        Decay-correction factor to apply; None: the one the corrections
        compute from the frame (or none when the isotope is unknown).
    """

    index: int
    prompts: np.ndarray
    delayed: np.ndarray | None
    frame_start_s: float
    frame_duration_s: float
    decay_factor: float | None = None
    codes: np.ndarray | None = None
    with_delayed: bool = False

    def sinograms(self, shape: tuple) -> tuple:
        """Dense ``(prompts, delayed)``: as given, or built from the codes here, in the worker."""
        if self.codes is None:
            return self.prompts, self.delayed
        from .binning import sinograms_from_codes
        return sinograms_from_codes(self.codes, shape, self.with_delayed)


def _frame_task(state, k: int, schedule, decay_factor) -> FrameTask:
    """Frame ``k`` of a binning state as a task: its event codes when it is held so (a few MB instead of
    the dense sinograms, made dense in the worker), else its dense arrays."""
    codes = state.frame_codes(k)
    if codes is not None:
        prompts = delayed = None
    else:
        prompts, delayed = state.frame_sinograms(k)
    return FrameTask(index=k, prompts=prompts, delayed=delayed, frame_start_s=schedule.starts_s[k],
                     frame_duration_s=schedule.durations_s[k], decay_factor=decay_factor, codes=codes,
                     with_delayed=state.with_delayed)


def frame_image(task: FrameTask, *, geometry, correction_options, correction_inputs, recon_options,
                isotope=None) -> dict:
    """Correct and reconstruct one frame (runs in a worker; a plain function of its inputs).

    Returns
    -------
    dict
        ``image`` (float32, NIfTI axes x, y, z), ``affine``, ``sidecar`` (of
        the single frame), ``decay_factor`` (applied, or None), ``notes``.
    """
    from .corrections.apply import apply_corrections
    from .reconstruct.pipeline import reconstruct_arrays

    prompts, delayed = task.sinograms(geometry.shape)
    corrected = apply_corrections(prompts, delayed, geometry, correction_options, correction_inputs,
                                  frame_index=task.index, frame_start_s=task.frame_start_s,
                                  frame_duration_s=task.frame_duration_s, isotope=isotope)
    attrs = dict(corrected.attrs)
    if task.decay_factor is not None:
        attrs["decay_correction_factor"] = float(task.decay_factor)
    elif attrs.get("half_life_s") is None:
        attrs.pop("decay_correction_factor", None)   # unknown isotope: not decay-corrected
    arrays = {"prompts": prompts, **corrected.datasets}
    if correction_inputs is None or correction_inputs.acf is None:
        arrays.pop("acf")  # all ones without a mu-map: say "no attenuation correction" in the sidecar
    result = reconstruct_arrays(arrays, geometry, task.frame_start_s, task.frame_duration_s, recon_options,
                                attrs=attrs, where=f"frame {task.index}")
    return {"image": result.nifti_data(), "affine": result.affine(), "sidecar": result.sidecar,
            "decay_factor": attrs.get("decay_correction_factor"),
            "notes": tuple(corrected.notes) + tuple(result.warnings),
            "corrections": attrs.get("corrections"), "randoms_fraction": attrs.get("randoms_fraction"),
            "scatter_fraction": attrs.get("scatter_fraction")}


def _parse_iso_time(text, what: str):
    if text is None:
        return None
    try:
        t = _dt.datetime.fromisoformat(str(text).replace("Z", "+00:00"))
    except ValueError:
        raise TwinrayInputError(f"event metadata '{what}' is not an ISO 8601 date-time: {text!r}") from None
    return t


def decay_reference_s(metadata: dict, reference: str = "start") -> float:
    """The decay-correction reference time, s from acquisition start.

    Parameters
    ----------
    metadata : dict
        The events' ``twinray`` metadata (``acquisition_start``,
        ``injection_time``).
    reference : {"start", "injection"}
        ``"start"``: the acquisition start (0). ``"injection"``: the
        injection time (negative when it came before the scan), which must
        be known.
    """
    if reference not in DECAY_REFERENCES:
        raise TwinrayInputError(f"--decay-reference must be start or injection, got '{reference}'")
    if reference == "start":
        return 0.0
    start = _parse_iso_time(metadata.get("acquisition_start"), "acquisition_start")
    injection = _parse_iso_time(metadata.get("injection_time"), "injection_time")
    if start is None or injection is None:
        raise TwinrayInputError("--decay-reference injection: the events do not give both acquisition_start and "
                                "injection_time; use --decay-reference start")
    if (start.tzinfo is None) != (injection.tzinfo is None):
        raise TwinrayInputError("event metadata: acquisition_start and injection_time must both have a time zone "
                                "or both have none")
    return (injection - start).total_seconds()


def check_frames_fit_memory(geometry, n_frames: int, with_delayed: bool, memory_bytes: int,
                            n_events: int | None = None) -> None:
    """Refuse a one-pass binning whose frames could outgrow the memory budget.

    A frame is held as 4-byte event codes until it has half as many events
    as bins, then densely (see :class:`twinray.binning.BinningState`); with
    ``n_events`` in the study at most ``2 * n_events / n_bins`` frames can
    become dense, so the bound is that many dense frames plus 4 bytes per
    event (never more than every frame dense).
    """
    dense_frame = geometry.n_bins * 4 * (2 if with_delayed else 1)
    need = dense_frame * n_frames
    if n_events is not None and n_frames > 1:
        need = min(need, dense_frame * min(n_frames, 2 * int(n_events) // geometry.n_bins) + 4 * int(n_events))
    if need > memory_bytes:
        raise TwinrayInputError(
            f"{n_frames} frames of a {'x'.join(map(str, geometry.shape))} sinogram may need {need / 2**30:.1f} GiB "
            f"(budget {memory_bytes / 2**30:.1f} GiB); use --rebin ssrb, fewer frames or a larger --memory-gb")


def bin_schedule(source, geometry, schedule, *, batch_size: int = DEFAULT_BATCH_SIZE, progress=None):
    """Bin every frame of a schedule in one streaming pass.

    Parameters
    ----------
    source : EventSource or path-like
    geometry : SinogramGeometry
    schedule : FrameSchedule
    batch_size : int
    progress : callable, optional
        Called with the rows of each batch.

    Returns
    -------
    BinningState
        ``prompts``/``delayed`` of shape (frames, planes, views, radial);
        per-frame accounting in ``counts`` (last row: events outside every frame).
    """
    from .binning import bin_events

    source = source if isinstance(source, EventSource) else open_events(source)
    state = bin_events(source, geometry, frames=schedule.frames(), batch_size=batch_size, progress=progress)
    if state.rows_read != source.num_rows:
        raise TwinrayInputError(f"events {source.path}: read {state.rows_read} rows but the files declare "
                                f"{source.num_rows}")
    return state


@dataclasses.dataclass(frozen=True)
class DynamicResult:
    """What :func:`make_dynamic` did.

    Attributes
    ----------
    outputs : list of Path
    schedule : FrameSchedule
        The schedule binned (after any truncation).
    accounting : Accounting
        Of the whole run (every event read: in a frame and binned, or rejected).
    frame_accounting : list of Accounting
        Events whose time lies in each frame.
    decay_factors : ndarray
    sidecar : dict
    warnings : tuple of str
    timings_s : dict
    """

    outputs: list
    schedule: object
    accounting: Accounting
    frame_accounting: list
    decay_factors: np.ndarray
    sidecar: dict
    warnings: tuple
    timings_s: dict


def make_dynamic(events, output_dir, *, schedule, truncate: bool = False, scanner=None, rebin: str = "none",
                 correction_options=None, norm_path=None, mu_path=None, singles_path=None, recon_options=None,
                 decay_reference: str = "start", workers: int | None = None, scheduler: str | None = None,
                 batch_size: int = DEFAULT_BATCH_SIZE, memory_bytes: int = DEFAULT_MEMORY_BYTES,
                 progress=None) -> DynamicResult:
    """Frame, correct, reconstruct and decay-correct a dynamic study.

    Parameters
    ----------
    events : path-like or EventSource
    output_dir : path-like
        Folder for ``dynamic.nii.gz`` and ``dynamic.json`` (created if needed).
    schedule : FrameSchedule or str
        Frames, or text / file for :func:`twinray.schedule.load_schedule`.
    truncate : bool
        Cut a schedule that runs past the data at its end instead of refusing it.
    scanner, rebin
        As for ``twinray sinogram``.
    correction_options : CorrectionOptions, optional
    norm_path, mu_path, singles_path : path-like, optional
        Correction inputs, loaded once for all frames.
    recon_options : ReconOptions, optional
    decay_reference : {"start", "injection"}
    workers : int, optional
        Local Dask worker processes (0: in this process, no Dask).
    scheduler : str, optional
        Address of an existing Dask scheduler.
    batch_size : int
    memory_bytes : int
        Budget for the binned frames.
    progress : callable, optional
        ``progress(stage, done, total)`` with stage ``"bin"`` (rows) or
        ``"reconstruct"`` (frames).

    Returns
    -------
    DynamicResult
    """
    from .atomic import refuse_overwriting_inputs
    from .corrections.apply import CorrectionOptions, prepare_corrections
    from .decay import frame_decay_factor
    from .geometry import sinogram_geometry
    from .images import write_image
    from .isotopes import get_isotope
    from .parallel import map_tasks
    from .reconstruct.pipeline import ReconOptions
    from .schedule import FrameSchedule, fit_schedule_to_data, load_schedule
    from .sinogram import data_duration_s

    t0 = time.perf_counter()
    correction_options = correction_options or CorrectionOptions()
    recon_options = recon_options or ReconOptions()
    source = events if isinstance(events, EventSource) else open_events(events, scanner)
    if source.num_rows == 0:
        raise TwinrayInputError(f"events {source.path} contain no events; nothing to frame")
    if not isinstance(schedule, FrameSchedule):
        schedule = load_schedule(schedule)
    schedule = fit_schedule_to_data(schedule, data_duration_s(source), truncate)
    output_dir = Path(output_dir)
    image_path = output_dir / "dynamic.nii.gz"
    scanner_path = scanner if scanner is not None and not hasattr(scanner, "crystals_per_ring") else None
    refuse_overwriting_inputs(image_path, [source.path, *source.paths, scanner_path, norm_path, mu_path,
                                           singles_path])
    refuse_overwriting_inputs(output_dir / "dynamic.json", [source.path, *source.paths])
    reference_s = decay_reference_s(source.metadata, decay_reference)
    geometry = sinogram_geometry(source.scanner, rebin)
    check_frames_fit_memory(geometry, schedule.n_frames, source.has_delayed, memory_bytes, source.num_rows)
    warnings = []

    # Decay factors per frame (the isotope comes from the event metadata).
    isotope_name = source.metadata.get("isotope")
    iso = None
    if isotope_name:
        iso = get_isotope(str(isotope_name), f"events {source.path} metadata 'isotope'")
        factors = np.asarray(frame_decay_factor(iso.half_life_s, np.asarray(schedule.starts_s),
                                                np.asarray(schedule.durations_s), reference_s), dtype=np.float64)
    else:
        warnings.append("the events name no isotope: frames are not decay-corrected")
        factors = np.ones(schedule.n_frames)

    # Correction inputs shared by every frame (ACF ray-traced once).
    inputs = prepare_corrections(geometry, correction_options, norm_path=norm_path, mu_path=mu_path,
                                 singles_path=singles_path, frames_s=schedule.frames())
    t1 = time.perf_counter()

    # One pass over the events for every frame.
    total = source.num_rows
    report = (lambda n: progress("bin", n, total)) if progress is not None else None
    state = bin_schedule(source, geometry, schedule, batch_size=batch_size, progress=report)
    t2 = time.perf_counter()
    frame_acc = [state.frame_accounting(k) for k in range(schedule.n_frames)]
    whole = Accounting.from_counts(state.counts.sum(axis=0))
    if whole.binned == 0:
        raise TwinrayInputError(f"no event of {source.path} could be binned in any frame of the schedule")
    for k, acc in enumerate(frame_acc):
        if acc.read == 0:
            warnings.append(f"frame {k} ({schedule.starts_s[k]:g} s + {schedule.durations_s[k]:g} s) "
                            "holds no events; its image is zero")

    tasks = [_frame_task(state, k, schedule, float(factors[k]) if iso is not None else None)
             for k in range(schedule.n_frames)]
    done = [0]

    def one_done():
        done[0] += 1
        if progress is not None:
            progress("reconstruct", 1, schedule.n_frames)

    results = map_tasks(frame_image, tasks,
                        {"geometry": geometry, "correction_options": correction_options,
                         "correction_inputs": inputs, "recon_options": recon_options,
                         "isotope": iso.name if iso is not None else None},
                        workers=workers, scheduler=scheduler, on_done=one_done)
    t3 = time.perf_counter()
    for r in results:
        for note in r["notes"]:
            if note not in warnings:
                warnings.append(note)

    image = np.stack([r["image"] for r in results], axis=-1).astype(np.float32)
    sidecar = dynamic_sidecar(results, schedule, factors if iso is not None else None, reference_s, iso,
                              source, frame_acc, whole, decay_reference, geometry)
    output_dir.mkdir(parents=True, exist_ok=True)
    written = write_image(image_path, image, results[0]["affine"], sidecar)
    t4 = time.perf_counter()
    return DynamicResult(outputs=written, schedule=schedule, accounting=whole, frame_accounting=frame_acc,
                         decay_factors=factors, sidecar=sidecar, warnings=tuple(warnings),
                         timings_s={"prepare": round(t1 - t0, 4), "bin": round(t2 - t1, 4),
                                    "reconstruct": round(t3 - t2, 4), "write": round(t4 - t3, 4)})


def dynamic_sidecar(results, schedule, factors, reference_s, iso, source, frame_acc, whole, decay_reference,
                    geometry) -> dict:
    """The BIDS PET sidecar of the 4-D image (frame times relative to the acquisition start)."""
    first = results[0]["sidecar"]
    sidecar = {key: first[key] for key in ("Units", "ReconMethodName", "ReconMethodParameterLabels",
                                            "ReconMethodParameterUnits", "ReconMethodParameterValues",
                                            "ReconFilterType", "ReconFilterSize", "AttenuationCorrection")
               if key in first}
    start = _parse_iso_time(source.metadata.get("acquisition_start"), "acquisition_start")
    sidecar.update({
        "AcquisitionMode": "list mode",
        "FrameTimesStart": [float(s) for s in schedule.starts_s],
        "FrameDuration": [float(d) for d in schedule.durations_s],
        "ImageDecayCorrected": factors is not None,
        "ScanStart": 0.0,
    })
    if start is not None:
        sidecar["TimeZero"] = start.strftime("%H:%M:%S")
    if "injection_time" in source.metadata and start is not None:
        try:
            sidecar["InjectionStart"] = decay_reference_s(source.metadata, "injection")
        except TwinrayInputError:
            pass
    if source.metadata.get("injected_activity_bq") is not None:
        sidecar["InjectedRadioactivity"] = float(source.metadata["injected_activity_bq"]) / 1e6
        sidecar["InjectedRadioactivityUnits"] = "MBq"
    if factors is not None:
        sidecar["DecayCorrectionFactor"] = [float(f) for f in factors]
        sidecar["ImageDecayCorrectionTime"] = float(reference_s)
        sidecar["TracerRadionuclide"] = iso.name
    sidecar["twinray"] = {
        "schedule": schedule.describe(),
        "schedule_source": schedule.source,
        "decay_reference": decay_reference,
        "half_life_s": iso.half_life_s if iso is not None else None,
        "half_life_source": iso.half_life_source if iso is not None else None,
        "accounting": whole.to_dict(),
        "frame_accounting": [a.to_dict() for a in frame_acc],
        "events": str(source.path),
        "acquisition_start": source.metadata.get("acquisition_start"),
        "sinogram_shape": list(geometry.shape),
        "rebin": geometry.rebin,
        "corrections": results[0].get("corrections"),
        "randoms_fraction": [r.get("randoms_fraction") for r in results],
        "scatter_fraction": [r.get("scatter_fraction") for r in results],
        "recon": first.get("twinray", {}),
    }
    return sidecar
