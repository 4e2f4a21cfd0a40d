"""``twinray simulate``: Poisson-sampled photon pairs from a phantom, with known truth."""

from __future__ import annotations

from pathlib import Path

import click

from ._common import common_options, progress
from ._report import report_option, write_report

_SWITCHES = ("attenuation", "scatter", "randoms", "delayed", "positron_range", "non_collinearity")


@click.command("simulate")
@click.argument("phantom", type=click.Path(path_type=Path), metavar="PHANTOM.toml")
@click.option("-o", "--output", required=True, type=click.Path(path_type=Path), metavar="EVENTS.parquet",
              help="Event file to write; truth files are written next to it (<stem>_truth.json, "
                   "<stem>_truth_activity.nii.gz, <stem>_truth_mu.nii.gz, <stem>_truth_labels.nii.gz).")
@click.option("--scanner", type=click.Path(path_type=Path), metavar="S.toml",
              help="Scanner TOML (overrides the phantom's 'scanner' key).")
@click.option("--duration", type=click.FloatRange(min=0, min_open=True), metavar="SEC",
              help="Acquisition length in seconds (overrides the phantom's duration_s).")
@click.option("--seed", type=click.IntRange(min=0), default=0, show_default=True,
              help="Random seed; the same seed, inputs and --chunk-s give a byte-identical event file.")
@click.option("--start", metavar="ISO", help="Acquisition start, ISO 8601 (time_ns = 0).")
@click.option("--chunk-s", type=click.FloatRange(min=0, min_open=True), default=1.0, show_default=True,
              metavar="SEC", help="Simulation step in seconds (shortened automatically at high activity).")
@click.option("--attenuation/--no-attenuation", default=None, help="Attenuate photons (default: the phantom's [physics]).")
@click.option("--scatter/--no-scatter", default=None, help="Single Compton scatter of attenuated photons.")
@click.option("--randoms/--no-randoms", default=None, help="Accidental coincidences in the prompts.")
@click.option("--delayed/--no-delayed", default=None, help="Write the delayed-window stream.")
@click.option("--positron-range/--no-positron-range", default=None, help="Displace annihilation points.")
@click.option("--non-collinearity/--no-non-collinearity", default=None, help="0.5 degree FWHM photon deviation.")
@click.option("--efficiency-spread", type=click.FloatRange(min=0), metavar="SIGMA",
              help="Log-normal sigma of the crystal efficiencies drawn with the seed (0: all equal).")
@click.option("--efficiency-file", type=click.Path(path_type=Path), metavar="FILE",
              help="Crystal efficiencies (.npy, .txt, or a normalization .h5 with crystal_efficiency).")
@click.option("--no-truth", is_flag=True, help="Write only the event file.")
@report_option
@common_options
def simulate_command(phantom, output, scanner, duration, seed, start, chunk_s, attenuation, scatter, randoms,
                     delayed, positron_range, non_collinearity, efficiency_spread, efficiency_file, no_truth,
                     report_path, run):
    """Simulate a PET acquisition of PHANTOM.toml and write an event file.

    Decays are Poisson-sampled from the phantom's shapes (or voxel images)
    with radioactive decay, then photon pairs are tracked to the scanner's
    crystals with attenuation, single Compton scatter, crystal efficiencies,
    energy and timing resolution; randoms and a delayed-window stream come
    from the singles. The physics switches default to the phantom's
    [physics] table. Truth (activity and mu images, counts by kind) is
    written next to the event file.

    Example:

    \b
        twinray simulate configs/phantoms/benchtop_inserts.toml -o scan.parquet --seed 7
        twinray simulate configs/phantoms/point_source.toml -o point.parquet --duration 2 --no-randoms
    """
    import dataclasses

    from ..errors import TwinrayInputError
    from ..scanner import load_scanner
    from ..simulate import load_phantom, simulate

    ph = load_phantom(phantom)
    changes = {name: value for name, value in zip(
        _SWITCHES, (attenuation, scatter, randoms, delayed, positron_range, non_collinearity)) if value is not None}
    if efficiency_spread is not None:
        changes["efficiency_spread"] = efficiency_spread
    if efficiency_file is not None:
        changes["efficiency_file"] = str(efficiency_file.resolve())
    physics = dataclasses.replace(ph.physics, **changes)
    sc = load_scanner(scanner) if scanner is not None else None
    if start is not None:
        from datetime import datetime

        try:
            datetime.fromisoformat(start.replace("Z", "+00:00"))
        except ValueError:
            raise TwinrayInputError(f"--start {start!r} is not an ISO 8601 date-time") from None
    total = duration if duration is not None else ph.duration_s
    with progress(run, total=total, desc="simulating", unit="s") as bar:
        result = simulate(ph, output, scanner=sc, duration_s=duration, seed=seed, acquisition_start=start,
                          chunk_s=chunk_s, physics=physics, write_truth=not no_truth, on_chunk=bar.update)
    c = result.counts
    accounting = {k: c[k] for k in ("events_written", "prompts", "trues", "scatters", "randoms", "delayed")}
    written = write_report(run, report_path, "report_for_events", result.events_path, inputs=[phantom])
    if run.as_json:
        run.finish({"outputs": [*(str(p) for p in result.outputs), *written], "accounting": accounting,
                    "counts": c,
                    "seed": result.seed, "duration_s": result.duration_s,
                    "timings_s": {"simulation": c["wall_s"]}})
        return
    run.say(f"simulated {result.duration_s:g} s of {ph.name} ({ph.isotope}), seed {result.seed}, "
            f"{result.chunks} step(s)")
    run.say(f"annihilations: {c['annihilations']}, singles: {c['singles']}")
    run.say(f"events written: {c['events_written']} = prompts {c['prompts']} "
            f"(trues {c['trues']}, scatters {c['scatters']}, randoms {c['randoms']}) + delayed {c['delayed']}")
    w = c["in_energy_window"]
    run.say(f"inside the energy window: trues {w['trues']}, scatters {w['scatters']}, randoms {w['randoms']}, "
            f"delayed {w['delayed']}")
    for path in result.outputs:
        run.say(f"wrote {path}")
