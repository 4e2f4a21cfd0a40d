"""``twinray demo``: the whole job on the built-in demonstration study, with a report."""

from __future__ import annotations

from pathlib import Path

import click

from ._common import common_options, progress


@click.command("demo", short_help="The whole job on the built-in demonstration study, with an HTML report.")
@click.option("-o", "--output", "output_dir", type=click.Path(path_type=Path), default=Path("twinray-demo"),
              show_default=True, metavar="DIR", help="Folder for every output and DIR/report.html.")
@click.option("--size", type=click.Choice(["full", "small"]), default="full", show_default=True,
              help="full: the whole study (a few minutes on 2 cores); small: a quick check on one second of "
                   "the static scan with fewer frames, iterations and replicates (for continuous integration).")
@click.option("--workers", type=click.IntRange(min=1), default=None,
              help="Dask workers for dynamic frames and noise replicates [default: one per core].")
@click.option("--data", "data_dir", type=click.Path(path_type=Path), default=None, metavar="FOLDER",
              help="Use the demo study in FOLDER instead of the shipped one (or regenerating it).")
@common_options
def demo_command(output_dir, size, workers, data_dir, run):
    """Run the whole job on the shipped demonstration study (an invented
    bench-top phantom made by twinray's simulator): inspect, normalize,
    calibrate on a cylinder of known concentration, sinogram with every
    correction, FBP and OSEM in Bq/mL (with their recovery against the
    simulator's truth), a dynamic framing with time-activity curves, and a
    bootstrap and thinning noise study. Then write DIR/report.html, one
    self-contained file to open in a browser.

    Every step is an ordinary twinray command; the report lists the command
    lines, so each step can be repeated by hand.

    When the study is not found next to the package it is regenerated with
    the simulator from the shipped phantoms (same seeds, same files).

    Examples:

        twinray demo -o demo-out

        twinray demo -o demo-out --size small --workers 1
    """
    from ..demo import run_demo

    with progress(run, total=None, desc="demo", unit="step") as bar:
        def on_step(name, step):
            if step is None:
                bar.set_description(f"demo: {name}")
                return
            bar.update(1)
            n_warn = len(step.result.get("demo_warnings", []))
            note = f"   ({n_warn} warning{'s' if n_warn != 1 else ''}, listed in the report)" if n_warn else ""
            run.say(f"  {name:<18} {step.seconds:7.1f} s{note}")

        run.say(f"twinray demo ({size}) into {output_dir}")
        result = run_demo(output_dir, size=size, workers=workers, data_dir=data_dir, on_step=on_step)
    run.say(f"data: {result.data_dir} ({result.data_origin})")
    run.say(f"wrote {result.report}  (open it in a browser)")
    sino = next((s for s in result.steps if s.name == "sinogram"), None)
    run.finish({
        "outputs": result.outputs,
        "report": str(result.report),
        "size": size,
        "data_dir": str(result.data_dir),
        "data_origin": result.data_origin,
        "accounting": sino.result.get("accounting", {}) if sino else {},
        "steps": [{"name": s.name, "argv": list(s.argv), "seconds": round(s.seconds, 3),
                   "warnings": s.result.get("demo_warnings", [])} for s in result.steps],
        "timings_s": {s.name: round(s.seconds, 3) for s in result.steps},
    })
