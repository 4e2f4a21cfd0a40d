"""``twinray sinogram``: stream events into a sinogram file (prompts, delayed)."""

from __future__ import annotations

from pathlib import Path

import click

from ._common import common_options, progress
from ._report import report_option, write_report

_DEFAULT_BATCH = 1 << 20


@click.command("sinogram")
@click.argument("events", type=click.Path(path_type=Path))
@click.option("-o", "--output", required=True, type=click.Path(path_type=Path), metavar="SINO.h5",
              help="Sinogram file to write (HDF5; written atomically, never over an input).")
@click.option("--scanner", type=click.Path(path_type=Path), metavar="S.toml",
              help="Scanner TOML; must agree with the geometry embedded in the events, and its "
                   "[sinogram] table and windows override the embedded ones. Needed when the "
                   "events carry no twinray metadata.")
@click.option("--frame", metavar="START:END",
              help="Bin only events with START <= t < END, seconds from acquisition start. "
                   "Default: the whole acquisition.")
@click.option("--rebin", type=click.Choice(["none", "ssrb"]), default="none", show_default=True,
              help="none: 3-D planes mashed by the scanner's span; ssrb: the 2*rings-1 direct and "
                   "cross planes of single-slice rebinning.")
@click.option("--batch-size", type=click.IntRange(min=1), default=_DEFAULT_BATCH, show_default=True,
              help="Events decoded per batch; memory use grows with it, not with the file size.")
@click.option("--truncate", is_flag=True,
              help="Clip a --frame that runs past the data's duration_s instead of stopping.")
@click.option("--norm", "norm_path", type=click.Path(path_type=Path), metavar="NORM.h5",
              help="Normalization file from `twinray normalize` (made for the same scanner and --rebin).")
@click.option("--mu", "mu_path", type=click.Path(path_type=Path), metavar="MU.nii.gz",
              help="mu-map for attenuation correction: 1/cm at 511 keV, scanner frame (water 0.096).")
@click.option("--randoms", type=click.Choice(["none", "delayed", "singles", "auto"]), default="none",
              show_default=True,
              help="Randoms estimate: delayed events smoothed by a fan-sum fit, 2*tau*S_a*S_b from --singles, "
                   "none, or auto (delayed when the events have delayed coincidences, else none).")
@click.option("--singles", "singles_path", type=click.Path(path_type=Path), metavar="SINGLES.parquet",
              help="Singles file (time_ns, crystal, counts; interval_ns in its metadata) for --randoms singles "
                   "and --deadtime-ns.")
@click.option("--scatter", type=click.Choice(["none", "tail-fit"]), default="none", show_default=True,
              help="Scatter estimate: Gaussians fitted to the sinogram tails outside the object (needs --mu).")
@click.option("--deadtime-ns", type=click.FloatRange(min=0), default=0.0, show_default=True,
              help="Dead time per single event, ns, corrected from the --singles rates; 0 = none.")
@click.option("--deadtime-model", type=click.Choice(["nonparalysable", "paralysable"]), default="nonparalysable",
              show_default=True, help="Dead-time model for --deadtime-ns.")
@click.option("--decay-reference", type=click.Choice(["start", "injection"]), default="start", show_default=True,
              help="Time the stored decay_correction_factor refers to (injection needs injection_time in the "
                   "event metadata).")
@report_option
@common_options
def sinogram_command(events, output, scanner, frame, rebin, batch_size, truncate, norm_path, mu_path, randoms,
                     singles_path, scatter, deadtime_ns, deadtime_model, decay_reference, report_path, run):
    """Stream the coincidence events in EVENTS (a Parquet file or a folder of
    them, read in name order) into prompts and delayed sinograms, with the
    accounting of every event read.

    The file holds the datasets `prompts` and (when the events have a
    `delayed` column) `delayed`, ordered (plane, view, radial), plus the
    geometry, frame, scanner and accounting as root attributes. Without a
    `delayed` column there is no delayed dataset. The energy window is applied
    when the events have energy columns. TOF information is not used (the
    sinograms are non-TOF).

    With any correction option the file also holds `randoms`, `scatter`,
    `norm` (1/efficiency, times dead time), `acf` and
    `corrected = norm*acf*(prompts - randoms - scatter)`, and the frame's
    decay_correction_factor (for the images; the sinograms are not
    decay-corrected).

    Examples:

        twinray sinogram scan.parquet -o scan.h5 --frame 0:60 --rebin ssrb

        twinray sinogram scan.parquet -o scan.h5 --norm norm.h5 --mu mu.nii.gz --randoms delayed --scatter tail-fit
    """
    from ..sinogram import make_sinogram

    corrections = None
    if norm_path or mu_path or singles_path or randoms != "none" or scatter != "none" or deadtime_ns > 0:
        from ..corrections.apply import CorrectionOptions

        corrections = CorrectionOptions(randoms=randoms, scatter=scatter, deadtime_ns=deadtime_ns,
                                        deadtime_model=deadtime_model)

    with progress(run, desc="binning", unit="ev") as bar:
        def report(done, total):
            if bar.total is None:
                bar.total = total
            bar.update(done)

        result = make_sinogram(events, output, scanner=scanner, frame=frame, rebin=rebin,
                               batch_size=batch_size, truncate=truncate, progress=report,
                               corrections=corrections, norm=norm_path, mu=mu_path, singles=singles_path,
                               decay_reference=decay_reference)
    for text in result.warnings:
        run.warn(text)
    acc = result.accounting
    g = result.content.geometry
    c = result.content
    run.say(f"wrote {result.output}")
    run.say(f"  sinogram {g.planes} planes x {g.views} views x {g.radial_bins} radial bins "
            f"(rebin {g.rebin}, span {g.span}, max ring difference {g.max_ring_difference})")
    run.say(f"  frame {c.frame_start_s:g} s + {c.frame_duration_s:g} s")
    ignored = list(result.source.ignored)
    if ignored:
        run.say(f"  ignored in {result.source.path} (not *.parquet): {', '.join(ignored)}")
    run.say(f"  events read {acc.read}: prompts binned {acc.prompts_binned}, delayed binned {acc.delayed_binned}")
    for name, value in acc.to_dict().items():
        if name.startswith("rejected_") and value:
            run.say(f"  {name.replace('_', ' ')}: {value}")
    corr = c.attrs.get("corrections")
    if corr:
        run.say(f"  corrections: randoms {corr['randoms']}, scatter {corr['scatter']}, norm {corr['norm']}, "
                f"attenuation {corr['attenuation']}, dead time {corr['deadtime_model']}")
        run.say(f"  randoms fraction {c.attrs['randoms_fraction']:.3f}, scatter fraction "
                f"{c.attrs['scatter_fraction']:.3f}, decay correction factor {c.attrs['decay_correction_factor']:.5g}")
    written = write_report(run, report_path, "report_for_sinogram", result.output, events_path=events,
                           scanner=scanner, inputs=[events, norm_path, mu_path, singles_path])
    run.finish({"outputs": [str(result.output), *written], "accounting": acc.to_dict(),
                "timings_s": result.timings_s,
                "warnings": list(result.warnings), "shape": list(g.shape),
                "frame_start_s": c.frame_start_s, "frame_duration_s": c.frame_duration_s,
                "event_files": [p.name for p in result.source.paths], "ignored": ignored})
