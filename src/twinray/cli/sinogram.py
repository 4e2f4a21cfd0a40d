"""``twinray sinogram``: stream events into a sinogram file (prompts, delayed)."""

from __future__ import annotations

from pathlib import Path

import click

from ._common import common_options, progress

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
@common_options
def sinogram_command(events, output, scanner, frame, rebin, batch_size, truncate, run):
    """Stream the coincidence events in EVENTS (a Parquet file or a folder of
    them, read in name order) into prompts and delayed sinograms, with the
    accounting of every event read.

    The file holds the datasets `prompts` and (when the events have a
    `delayed` column) `delayed`, ordered (plane, view, radial), plus the
    geometry, frame, scanner and accounting as root attributes. Without a
    `delayed` column there is no delayed dataset. The energy window is applied
    when the events have energy columns. TOF information is not used (the
    sinograms are non-TOF).

    Example:

        twinray sinogram scan.parquet -o scan.h5 --frame 0:60 --rebin ssrb
    """
    from ..sinogram import make_sinogram

    with progress(run, desc="binning", unit="ev") as bar:
        def report(done, total):
            if bar.total is None:
                bar.total = total
            bar.update(done)

        result = make_sinogram(events, output, scanner=scanner, frame=frame, rebin=rebin,
                               batch_size=batch_size, truncate=truncate, progress=report)
    for text in result.warnings:
        run.warn(text)
    acc = result.accounting
    g = result.content.geometry
    c = result.content
    run.say(f"wrote {result.output}")
    run.say(f"  sinogram {g.planes} planes x {g.views} views x {g.radial_bins} radial bins "
            f"(rebin {g.rebin}, span {g.span}, max ring difference {g.max_ring_difference})")
    run.say(f"  frame {c.frame_start_s:g} s + {c.frame_duration_s:g} s")
    run.say(f"  events read {acc.read}: prompts binned {acc.prompts_binned}, delayed binned {acc.delayed_binned}")
    for name, value in acc.to_dict().items():
        if name.startswith("rejected_") and value:
            run.say(f"  {name.replace('_', ' ')}: {value}")
    run.finish({"outputs": [str(result.output)], "accounting": acc.to_dict(), "timings_s": result.timings_s,
                "warnings": list(result.warnings), "shape": list(g.shape),
                "frame_start_s": c.frame_start_s, "frame_duration_s": c.frame_duration_s})
