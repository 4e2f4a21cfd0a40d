"""``twinray resample``: count-level noise study by bootstrap or thinning of the events."""

from __future__ import annotations

from pathlib import Path

import click

from ._common import common_options
from ._report import report_option, write_report
from .dynamic import StageBars, build_options, correction_and_recon_options


@click.command("resample")
@click.argument("events", type=click.Path(path_type=Path))
@click.option("-o", "--output", "output_dir", required=True, type=click.Path(path_type=Path), metavar="DIR",
              help="Folder for mean.nii.gz, std.nii.gz, cov.nii.gz, summary.json and noise_vs_counts.png.")
@click.option("--replicates", type=click.IntRange(min=2), required=True,
              help="Replicates (per fraction with --mode thin); at least 2.")
@click.option("--mode", type=click.Choice(["bootstrap", "thin"]), required=True,
              help="bootstrap: every event enters each replicate a Poisson(1) number of times (noise of this "
                   "scan); thin: every event is kept with probability P (a scan P times as long).")
@click.option("--fraction", "fraction_text", metavar="P[,P...]", default=None,
              help="Thinning probabilities, e.g. 0.5 or 0.1,0.25,0.5 (several: noise against counts; the "
                   "images are then 4-D, one volume per fraction).")
@click.option("--seed", type=click.IntRange(min=0), default=0, show_default=True,
              help="Same seed, same replicates (whatever the batch size or number of workers).")
@click.option("--frame", metavar="START:END", default=None,
              help="Resample only events with START <= t < END, s from acquisition start.")
@click.option("--truncate", is_flag=True, help="Clip a --frame that runs past the data's end.")
@click.option("--decay-reference", type=click.Choice(["start", "injection"]), default="start", show_default=True,
              help="Decay-correct the images to the acquisition start or to the injection time.")
@click.option("--roi", "rois", multiple=True, metavar="NAME=sphere:X,Y,Z,R",
              help="Region for the noise statistics (mm, scanner frame); repeat for more. Default: the object "
                   "(voxels above a quarter of the mean image's 99th percentile).")
@correction_and_recon_options
@report_option
@common_options
def resample_command(events, output_dir, replicates, mode, fraction_text, seed, frame, truncate, decay_reference,
                     rois, scanner, rebin,
                     norm_path, mu_path, randoms, singles_path, scatter, deadtime_ns, method, iterations, subsets,
                     filter_name, cutoff, matrix, voxel_mm, recon_mode, postfilter_mm, calibration,
                     calibration_factor, workers, scheduler, batch_size, memory_gb, report_path, run):
    """Count-level noise study of the events in EVENTS: make resampled
    replicates in one streaming pass, correct and reconstruct every replicate
    with the same options (in parallel), and summarise the voxel-wise mean,
    standard deviation (ddof 1) and coefficient of variation.

    Thinned replicates are reconstructed as scans of P times the duration, so
    their mean image estimates the same concentration as the full scan and
    only the noise changes. Thinning emulates a shorter scan, not a lower
    injected activity (randoms and dead time scale differently with activity).
    Thinned replicates of one scan vary binomially (n P (1-P) per bin); the
    summary also gives the noise of an independent scan of P times the
    duration (scan_*: divided by sqrt(1-P)), which is what the plot shows.

    Examples:

    \b
        twinray resample scan.parquet -o noise --mode bootstrap --replicates 20 --seed 1
        twinray resample scan.parquet -o levels --mode thin --fraction 0.1,0.25,0.5 --replicates 10 --rebin ssrb
    """
    from ..dynamic import decay_reference_s
    from ..events import open_events
    from ..resample import make_resample, parse_fractions
    from ..tac import parse_region

    fractions = parse_fractions(fraction_text) if fraction_text is not None else None
    regions = [parse_region(text) for text in rois]
    source = open_events(events, scanner)
    corrections, recon = build_options(
        randoms=randoms, has_delayed=source.has_delayed, scatter=scatter, deadtime_ns=deadtime_ns, method=method,
        iterations=iterations, subsets=subsets, filter_name=filter_name, cutoff=cutoff, matrix=matrix,
        voxel_mm=voxel_mm, recon_mode=recon_mode, postfilter_mm=postfilter_mm, calibration=calibration,
        calibration_factor=calibration_factor,
        decay_reference_s=decay_reference_s(source.metadata, decay_reference))
    bars = StageBars(run)
    try:
        result = make_resample(source, output_dir, mode=mode, replicates=replicates, fractions=fractions, seed=seed,
                               frame=frame, truncate=truncate, scanner=scanner, rebin=rebin,
                               correction_options=corrections, norm_path=norm_path, mu_path=mu_path,
                               singles_path=singles_path, recon_options=recon, regions=regions, workers=workers,
                               scheduler=scheduler, batch_size=batch_size, memory_bytes=int(memory_gb * 2 ** 30),
                               progress=bars)
    finally:
        bars.close()
    for text in result.warnings:
        run.warn(text)
    s = result.summary
    acc = result.accounting
    run.say(f"wrote {output_dir}/mean.nii.gz, std.nii.gz, cov.nii.gz, summary.json, noise_vs_counts.png")
    run.say(f"  {mode}: {replicates} replicates x {len(s['fractions'])} level(s), seed {seed}, "
            f"frame {s['frame_s'][0]:g}:{s['frame_s'][1]:g} s")
    run.say(f"  events read {acc.read}: prompts binned {acc.prompts_binned}, delayed binned {acc.delayed_binned}, "
            f"rejected {acc.rejected}")
    for level in s["levels"]:
        parts = ", ".join(f"{name} voxel CoV {stats['voxel_cov'] * 100:.1f} %, regional-mean CoV "
                          f"{stats['roi_mean_cov'] * 100:.2f} %" for name, stats in level["regions"].items())
        run.say(f"  P = {level['fraction']:g}: {level['mean_prompts']:.0f} prompts per replicate; {parts}")
    written = write_report(run, report_path, "report_for_resample", output_dir,
                           inputs=[events, norm_path, mu_path, singles_path, calibration])
    run.finish({"outputs": [*(str(p) for p in result.outputs), *written], "accounting": acc.to_dict(),
                "timings_s": result.timings_s, "warnings": list(result.warnings),
                "levels": [{"fraction": lv["fraction"], "mean_prompts": lv["mean_prompts"], "regions": lv["regions"]}
                           for lv in s["levels"]]})
