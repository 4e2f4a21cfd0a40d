"""``twinray dynamic``: frame a study, correct, reconstruct and decay-correct every frame.

Also holds the options shared with ``twinray resample`` (the ``sinogram``
correction options, the ``reconstruct`` options and the parallel options).
"""

from __future__ import annotations

import functools
from pathlib import Path

import click

from ._common import common_options, progress
from ._report import report_option, write_report

_DEFAULT_BATCH = 1 << 20


def correction_and_recon_options(func):
    """Options of ``sinogram`` (corrections) and ``reconstruct``, plus --workers/--scheduler."""
    options = [
        click.option("--scanner", type=click.Path(path_type=Path), metavar="S.toml",
                     help="Scanner TOML; must agree with the geometry embedded in the events."),
        click.option("--rebin", type=click.Choice(["none", "ssrb"]), default="none", show_default=True,
                     help="none: 3-D planes mashed by the scanner's span; ssrb: 2*rings-1 direct and cross planes."),
        click.option("--norm", "norm_path", type=click.Path(path_type=Path), metavar="NORM.h5",
                     help="Normalization file from `twinray normalize`."),
        click.option("--mu", "mu_path", type=click.Path(path_type=Path), metavar="MU.nii.gz",
                     help="mu-map (1/cm at 511 keV, scanner frame) for attenuation correction."),
        click.option("--randoms", type=click.Choice(["none", "delayed", "singles", "auto"]), default="none",
                     show_default=True,
                     help="Randoms estimate of each frame (or replicate): its own delayed events (fan-sum "
                          "smoothed), singles, none, or auto (delayed when the events have a delayed channel)."),
        click.option("--singles", "singles_path", type=click.Path(path_type=Path), metavar="SINGLES.parquet",
                     help="Singles file (for --randoms singles and --deadtime-ns)."),
        click.option("--scatter", type=click.Choice(["none", "tail-fit"]), default="none", show_default=True,
                     help="Scatter estimate (tail-fit needs --mu)."),
        click.option("--deadtime-ns", type=click.FloatRange(min=0), default=0.0, show_default=True,
                     help="Dead time per single, ns (needs --singles); 0 = no dead-time correction."),
        click.option("--method", type=click.Choice(["fbp", "osem"]), default="osem", show_default=True,
                     help="Reconstruction method."),
        click.option("--iterations", type=click.IntRange(min=1), default=3, show_default=True,
                     help="OSEM iterations."),
        click.option("--subsets", type=click.IntRange(min=1), default=8, show_default=True,
                     help="OSEM subsets (1 = MLEM)."),
        click.option("--filter", "filter_name", type=click.Choice(["ramp", "shepp-logan", "cosine", "hamming", "hann"]),
                     default="ramp", show_default=True, help="FBP apodization window."),
        click.option("--cutoff", type=click.FloatRange(min=0, max=1, min_open=True), default=1.0, show_default=True,
                     help="FBP window cutoff, fraction of Nyquist."),
        click.option("--matrix", type=click.IntRange(min=1), default=None,
                     help="Transaxial voxels [default: cover the field of view]."),
        click.option("--voxel-mm", type=click.FloatRange(min=0, min_open=True), default=None,
                     help="Transaxial voxel size, mm."),
        click.option("--recon-mode", type=click.Choice(["3d", "2d"]), default="3d", show_default=True,
                     help="OSEM: fully 3-D on the stored planes, or 2-D per plane after SSRB (fast)."),
        click.option("--postfilter-mm", type=click.FloatRange(min=0), default=0.0, show_default=True,
                     help="Gaussian post-filter FWHM, mm (0 = none)."),
        click.option("--calibration", type=click.Path(path_type=Path), default=None, metavar="CAL.json",
                     help="Calibration file from `twinray calibrate`: images in Bq/mL."),
        click.option("--calibration-factor", type=click.FloatRange(min=0, min_open=True), default=None,
                     help="Bq/mL per counts/s/mL, given directly (instead of --calibration)."),
        click.option("--workers", type=click.IntRange(min=0), default=None,
                     help="Worker processes of the local Dask cluster (loopback only) [default: CPU cores]; "
                          "0 = no cluster, one task after the other in this process."),
        click.option("--scheduler", metavar="ADDRESS",
                     help="Use an existing Dask cluster, e.g. tcp://10.0.0.5:8786 (its workers need twinray)."),
        click.option("--batch-size", type=click.IntRange(min=1), default=_DEFAULT_BATCH, show_default=True,
                     help="Events decoded per batch."),
        click.option("--memory-gb", type=click.FloatRange(min=0, min_open=True), default=4.0, show_default=True,
                     help="Memory budget for the binned sinograms held at once, GiB."),
    ]

    @functools.wraps(func)
    def wrapper(*args, **kwargs):
        return func(*args, **kwargs)

    for option in reversed(options):
        wrapper = option(wrapper)
    return wrapper


def build_options(*, randoms, has_delayed, scatter, deadtime_ns, method, iterations, subsets, filter_name, cutoff,
                  matrix, voxel_mm, recon_mode, postfilter_mm, calibration, calibration_factor,
                  decay_reference_s=0.0):
    """The library option values from the command-line ones."""
    from ..corrections.apply import CorrectionOptions
    from ..errors import TwinrayInputError
    from ..reconstruct.pipeline import ReconOptions

    calibration_source = None
    if calibration is not None and calibration_factor is not None:
        raise TwinrayInputError("give --calibration or --calibration-factor, not both")
    if calibration is not None:
        from ..reconstruct.calibration import read_calibration

        calibration_factor, calibration_source = read_calibration(calibration), str(calibration)
    elif calibration_factor is not None:
        calibration_source = "--calibration-factor"

    if randoms == "auto":
        randoms = "delayed" if has_delayed else "none"
    corrections = CorrectionOptions(randoms=randoms, scatter=scatter, deadtime_ns=deadtime_ns,
                                    decay_reference_s=decay_reference_s)
    recon = ReconOptions(method=method, iterations=iterations, subsets=subsets, filter_name=filter_name,
                         cutoff=cutoff, matrix=matrix, voxel_mm=voxel_mm, mode=recon_mode,
                         postfilter_fwhm_mm=postfilter_mm, calibration_bq_per_ml=calibration_factor,
                         calibration_source=calibration_source)
    return corrections, recon


class StageBars:
    """Progress bars of a run with stages (binning rows, reconstructing frames)."""

    def __init__(self, run):
        self.run = run
        self.bars = {}

    def __call__(self, stage, done, total):
        bar = self.bars.get(stage)
        if bar is None:
            unit = "ev" if stage.startswith("bin") else "image"
            bar = self.bars[stage] = progress(self.run, total=total, desc=stage, unit=unit)
        bar.update(done)

    def close(self):
        for bar in self.bars.values():
            bar.close()


@click.command("dynamic")
@click.argument("events", type=click.Path(path_type=Path))
@click.option("-o", "--output", "output_dir", required=True, type=click.Path(path_type=Path), metavar="DIR",
              help="Folder for dynamic.nii.gz (4-D) and dynamic.json (BIDS PET sidecar).")
@click.option("--schedule", required=True, metavar="RUNS|FILE",
              help="Frames as runs COUNTxSECONDS, e.g. 6x10,4x30,5x60, or a schedule TOML file, or the name "
                   "of a shipped schedule (fdg-60min, water-4min).")
@click.option("--truncate", is_flag=True, help="Cut a schedule that runs past the data at the data's end.")
@click.option("--decay-reference", type=click.Choice(["start", "injection"]), default="start", show_default=True,
              help="Decay-correct to the acquisition start or to the injection time (must be in the metadata).")
@correction_and_recon_options
@report_option
@common_options
def dynamic_command(events, output_dir, schedule, truncate, decay_reference, scanner, rebin, norm_path, mu_path,
                    randoms, singles_path, scatter, deadtime_ns, method, iterations, subsets, filter_name, cutoff,
                    matrix, voxel_mm, recon_mode, postfilter_mm, calibration, calibration_factor, workers, scheduler,
                    batch_size, memory_gb, report_path, run):
    """Frame the events of EVENTS into a dynamic series: bin every frame of the
    schedule in one pass, correct each frame (its own delayed events, norm,
    attenuation, scatter), reconstruct the frames in parallel, and
    decay-correct each to the acquisition start (or the injection time).

    Writes DIR/dynamic.nii.gz (x, y, z, frame) and DIR/dynamic.json with
    FrameTimesStart, FrameDuration (s from acquisition start),
    DecayCorrectionFactor = lambda*dt/(1-exp(-lambda*dt))*exp(lambda*(t0-t_ref)),
    ImageDecayCorrected, ImageDecayCorrectionTime, TracerRadionuclide, Units and
    the accounting of every frame.

    Examples:

    \b
        twinray dynamic study.parquet -o study_dyn --schedule 6x10,4x30,5x60 --workers 2
        twinray dynamic study.parquet -o study_dyn --schedule fdg-60min --randoms delayed --mu mu.nii.gz
    """
    from ..dynamic import decay_reference_s, make_dynamic
    from ..events import open_events
    from ..schedule import load_schedule

    source = open_events(events, scanner)
    frames = load_schedule(schedule)
    corrections, recon = build_options(
        randoms=randoms, has_delayed=source.has_delayed, scatter=scatter, deadtime_ns=deadtime_ns, method=method,
        iterations=iterations, subsets=subsets, filter_name=filter_name, cutoff=cutoff, matrix=matrix,
        voxel_mm=voxel_mm, recon_mode=recon_mode, postfilter_mm=postfilter_mm,
        calibration=calibration, calibration_factor=calibration_factor,
        decay_reference_s=decay_reference_s(source.metadata, decay_reference))
    bars = StageBars(run)
    try:
        result = make_dynamic(source, output_dir, schedule=frames, truncate=truncate, scanner=scanner, rebin=rebin,
                              correction_options=corrections, norm_path=norm_path, mu_path=mu_path,
                              singles_path=singles_path, recon_options=recon, decay_reference=decay_reference,
                              workers=workers, scheduler=scheduler, batch_size=batch_size,
                              memory_bytes=int(memory_gb * 2 ** 30), progress=bars)
    finally:
        bars.close()
    for text in result.warnings:
        run.warn(text)
    s = result.schedule
    acc = result.accounting
    run.say(f"wrote {result.outputs[0]} ({s.n_frames} frames, {s.describe()}, {s.end_s:g} s)")
    run.say(f"  events read {acc.read}: prompts binned {acc.prompts_binned}, delayed binned {acc.delayed_binned}, "
            f"rejected {acc.rejected}")
    side = result.sidecar
    if side.get("ImageDecayCorrected"):
        run.say(f"  decay-corrected ({side['TracerRadionuclide']}) to t = {side['ImageDecayCorrectionTime']:g} s: "
                f"factors {min(result.decay_factors):.4f} .. {max(result.decay_factors):.4f}")
    run.say(f"  units {side.get('Units')}; {side.get('ReconMethodName')}")
    written = write_report(run, report_path, "report_for_dynamic", output_dir, events_path=events,
                           scanner=scanner, inputs=[events, norm_path, mu_path, singles_path, calibration])
    run.finish({"outputs": [*(str(p) for p in result.outputs), *written], "accounting": acc.to_dict(),
                "frame_accounting": [a.to_dict() for a in result.frame_accounting],
                "timings_s": result.timings_s, "warnings": list(result.warnings),
                "frames": s.n_frames, "schedule": s.describe(),
                "decay_correction_factors": [float(f) for f in result.decay_factors]})
