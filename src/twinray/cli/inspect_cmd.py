"""``twinray inspect``: schema, metadata, counts by kind and count rate of an event study."""

from __future__ import annotations

import json
from pathlib import Path

import click

from ._common import common_options, progress
from ._report import report_option, write_report

_BARS = " ▁▂▃▄▅▆▇█"


def sparkline(values) -> str:
    """One character per value, scaled to the largest value."""
    values = [float(v) for v in values]
    top = max(values, default=0.0)
    if top <= 0:
        return _BARS[0] * len(values)
    return "".join(_BARS[min(len(_BARS) - 1, int(round(v / top * (len(_BARS) - 1))))] for v in values)


def _fmt_time(seconds) -> str:
    return "-" if seconds is None else f"{seconds:.6g} s"


@click.command("inspect")
@click.argument("events", type=click.Path(path_type=Path))
@click.option("--scanner", type=click.Path(path_type=Path), metavar="S.toml",
              help="Scanner TOML (needed when the events carry no twinray metadata; must agree with "
                   "the embedded geometry otherwise).")
@click.option("--rate-bin", type=click.FloatRange(min=0, min_open=True), metavar="SEC",
              help="Width of the count-rate bins in seconds (default: about 30 bins).")
@click.option("--batch-size", type=click.IntRange(min=1), default=1 << 20, show_default=True,
              help="Events decoded per batch.")
@report_option
@common_options
def inspect_command(events, scanner, rate_bin, batch_size, report_path, run):
    """Show what is in EVENTS (a Parquet file or a folder of them): the columns
    and their types, the embedded metadata, the events by kind (prompts,
    delayed), events with crystal ids outside the scanner, and the count rate
    over time. Nothing is written.

    Example:

        twinray inspect scan.parquet --rate-bin 10
    """
    from ..events import inspect_events

    with progress(run, desc="reading", unit="ev") as bar:
        def report(done, total):
            if bar.total is None:
                bar.total = total
            bar.update(done)

        info = inspect_events(events, scanner=scanner, rate_bin_s=rate_bin, batch_size=batch_size,
                              progress=report)
    counts = info["counts"]
    if counts["rows"] == 0:
        run.warn(f"{events} contains no events")
    if counts["invalid_crystal"]:
        run.warn(f"{counts['invalid_crystal']} events have crystal ids outside the scanner")
    written = write_report(run, report_path, "report_for_events", events, scanner=scanner, inputs=[events])
    if run.as_json:
        run.finish({"outputs": written, **info})
        return
    run.say(f"events: {info['events']}")
    for f in info["files"]:
        run.say(f"  {f['name']}: {f['rows']} rows")
    if info["ignored"]:
        run.say(f"  ignored (not *.parquet): {', '.join(info['ignored'])}")
    run.say("columns:")
    for col in info["schema"]:
        run.say(f"  {col['name']:<14} {col['type']}")
    s = info["scanner"]
    run.say(f"scanner: {s['name']}: {s['rings']} rings x {s['crystals_per_ring']} crystals, "
            f"radius {s['radius_mm']:g} mm, axial pitch {s['axial_pitch_mm']:g} mm")
    meta = {k: v for k, v in info["metadata"].items() if k != "scanner"}
    if meta:
        run.say("metadata:")
        for key in sorted(meta):
            run.say(f"  {key}: {json.dumps(meta[key]) if isinstance(meta[key], (dict, list)) else meta[key]}")
    else:
        run.say("metadata: none (geometry from --scanner)")
    run.say(f"events: {counts['rows']} = {counts['prompts']} prompts + {counts['delayed']} delayed"
            + (f"; {counts['invalid_crystal']} with invalid crystal ids" if counts["invalid_crystal"] else ""))
    t = info["time"]
    run.say(f"time: first {_fmt_time(t['first_event_s'])}, last {_fmt_time(t['last_event_s'])}, "
            f"duration_s {t['duration_s'] if t['duration_s'] is not None else 'not given'}")
    if info["energy_kev"]:
        e = info["energy_kev"]
        run.say(f"energy: {e['min']:.1f} .. {e['max']:.1f} keV, mean {e['mean']:.1f} keV")
    rate = info["count_rate"]
    width = rate["bin_s"]
    prompts, delayed = rate["prompts_per_s"], rate["delayed_per_s"]
    if prompts:
        run.say(f"count rate per second, bins of {width:g} s from 0 to {len(prompts) * width:g} s:")
        run.say(f"  prompts |{sparkline(prompts)}| max {max(prompts):.4g}/s")
        if any(delayed):
            run.say(f"  delayed |{sparkline(delayed)}| max {max(delayed):.4g}/s")
        if len(prompts) <= 30:
            run.say(f"  {'start_s':>10} {'prompts/s':>12} {'delayed/s':>12}")
            for start, p, d in zip(rate["start_s"], prompts, delayed):
                run.say(f"  {start:>10.4g} {p:>12.6g} {d:>12.6g}")
