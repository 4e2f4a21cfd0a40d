"""Benchmark of the simulator: trues generated per second, against a numpy baseline.

Run from the repository root::

    python bench/bench_simulate.py [--seconds 2] [--repeats 3]

For each analytic phantom the simulator's step (``simulate_step``: Poisson
counts, emission, photon transport, randoms and delayed; the sort and the
file writer excluded) is timed over a whole acquisition, and in the same
process a numpy baseline draws the same number
of annihilations as plain uniform points in a box plus isotropic directions
(5 uniform numbers each), the least any Monte Carlo of this kind must do. The
ratio simulator / baseline (annihilations per second) is the figure to
compare between machines. Peak memory of the whole command is measured for
two acquisition lengths (10x apart) in child processes, to show that it stays
flat. Median of ``--repeats`` runs.
"""

from __future__ import annotations

import argparse
import json
import math
import os
import platform
import subprocess
import sys
import tempfile
import time
from pathlib import Path

import numpy as np

ROOT = Path(__file__).resolve().parents[1]
sys.path.insert(0, str(ROOT / "src"))

from twinray.scanner import load_scanner  # noqa: E402
from twinray.simulate import PhysicsOptions, load_phantom  # noqa: E402
from twinray.simulate.simulator import (  # noqa: E402
    FWHM_TO_SIGMA, NONCOLLINEARITY_SIGMA_RAD, StepSettings, _prepare_source, detection_cone, simulate_step,
)
from twinray.isotopes import get_isotope, mean_positron_range_mm  # noqa: E402

POINT = """
name = "bench point"
isotope = "Na-22"
scanner = "{scanner}"
duration_s = 1.0
[[shape]]
type = "sphere"
radius_mm = 0.25
activity_bq_per_ml = {conc}
"""


def kernel_run(phantom, physics, seconds, seed=1):
    """Time the simulator's steps over ``seconds`` of acquisition; returns
    (annihilations, trues + scatters, s, detection cone)."""
    scanner = load_scanner(phantom.scanner_path)
    src = _prepare_source(phantom, scanner, physics)
    iso = get_isotope(phantom.isotope)
    prob = np.full(scanner.n_crystals, 0.9)
    range_mm = mean_positron_range_mm(iso.name) if physics.positron_range else 0.0
    nc = NONCOLLINEARITY_SIGMA_RAD if physics.non_collinearity else 0.0
    settings = StepSettings(lam=iso.decay_constant_per_s, positron_fraction=iso.positron_fraction,
                            range_mm=range_mm, noncollinearity_sigma_rad=nc,
                            energy_sigma_kev=physics.energy_resolution_fwhm * 511 * FWHM_TO_SIGMA,
                            tau_s=0.5 * scanner.coincidence_window_ns * 1e-9,
                            cone=detection_cone(src, scanner, physics, range_mm, nc))
    step = 0.25
    n_ann = n_coinc = 0
    elapsed = 0.0
    for k in range(int(round(seconds / step))):
        t0 = k * step
        start = time.perf_counter()
        parts, _, _, ctr, _ = simulate_step(src, scanner, physics, settings, prob, seed, k, t0, t0 + step)
        elapsed += time.perf_counter() - start
        n_ann += int(ctr[0])
        n_coinc += len(parts[0][0])
    return n_ann, n_coinc, elapsed, settings.cone


def numpy_baseline(n, seed=0):
    """Seconds for numpy to draw n uniform points in a box and n isotropic directions."""
    rng = np.random.default_rng(seed)
    start = time.perf_counter()
    done = 0
    while done < n:
        m = min(1_000_000, n - done)
        pts = rng.uniform(-40.0, 40.0, (m, 3))
        cos_t = rng.uniform(-1.0, 1.0, m)
        phi = rng.uniform(0.0, 2 * math.pi, m)
        sin_t = np.sqrt(1.0 - cos_t ** 2)
        dirs = np.stack([sin_t * np.cos(phi), sin_t * np.sin(phi), cos_t], axis=1)
        done += m
        del pts, dirs
    return time.perf_counter() - start


def peak_memory_mb(phantom_path, duration):
    """Peak resident memory (MB) of a whole `twinray simulate` run in a child process."""
    code = (
        "import resource, sys\n"
        "from twinray.cli.main import main\n"
        "rc = main(sys.argv[1:])\n"
        "print(resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024.0)\n"
        "sys.exit(rc)\n"
    )
    with tempfile.TemporaryDirectory() as tmp:
        out = Path(tmp) / "ev.parquet"
        proc = subprocess.run([sys.executable, "-c", code, "simulate", str(phantom_path), "-o", str(out), "--duration",
                               str(duration), "--quiet", "--no-truth"], capture_output=True, text=True,
                              env={**os.environ, "PYTHONPATH": str(ROOT / "src")})
        if proc.returncode != 0:
            raise RuntimeError(proc.stderr)
        return float(proc.stdout.strip().splitlines()[-1]), out.stat().st_size if out.exists() else 0


def main():
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--seconds", type=float, default=2.0, help="acquisition seconds per run")
    parser.add_argument("--repeats", type=int, default=3)
    parser.add_argument("--no-memory", action="store_true")
    args = parser.parse_args()

    scanner_path = ROOT / "configs" / "scanners" / "benchtop.toml"
    with tempfile.TemporaryDirectory() as tmp:
        point_path = Path(tmp) / "point.toml"
        volume_ml = 4 / 3 * math.pi * 0.25 ** 3 / 1000
        point_path.write_text(POINT.format(scanner=scanner_path, conc=2.0e6 / volume_ml))
        cases = [
            ("point source in air, 2 MBq, geometry only", load_phantom(point_path),
             PhysicsOptions(attenuation=False, scatter=False, non_collinearity=False, positron_range=False)),
            ("point source in air, 2 MBq, all physics", load_phantom(point_path), PhysicsOptions()),
            ("benchtop_inserts (5 shapes, water), all physics",
             load_phantom(ROOT / "configs" / "phantoms" / "benchtop_inserts.toml"), PhysicsOptions()),
        ]
        load_before = os.getloadavg()
        kernel_run(cases[0][1], cases[0][2], 0.25)   # compile / load the cache outside the timing
        kernel_run(cases[2][1], cases[2][2], 0.25)
        rows = []
        for label, phantom, physics in cases:
            runs = []
            for r in range(args.repeats):
                n_ann, n_coinc, sim_s, cone = kernel_run(phantom, physics, args.seconds, seed=100 * r + 1)
                base_s = numpy_baseline(n_ann, seed=r)
                runs.append((n_ann, n_coinc, sim_s, base_s))
            n_ann, n_coinc, sim_s, base_s = sorted(runs, key=lambda x: x[2] / x[3])[len(runs) // 2]
            rows.append({
                "case": label,
                "detection_cone": cone,
                "annihilations": n_ann,
                "coincidences": n_coinc,
                "simulator_annihilations_per_s": n_ann / sim_s,
                "coincidences_per_s": n_coinc / sim_s,
                "numpy_baseline_annihilations_per_s": n_ann / base_s,
                "ratio_simulator_to_numpy": base_s / sim_s,
            })
    print(f"machine: {platform.machine()} {platform.processor() or ''} {os.cpu_count()} cpu(s), "
          f"Python {platform.python_version()}, numpy {np.__version__}, {time.strftime('%Y-%m-%d %H:%M UTC', time.gmtime())}")
    print(f"load average before the runs: {load_before}, after: {os.getloadavg()}")
    print("| case | cone | annihilations | coincidences/s (trues+scatters) | simulator annihilations/s | "
          "numpy baseline annihilations/s | ratio |")
    print("|---|---|---|---|---|---|---|")
    for row in rows:
        print(f"| {row['case']} | {row['detection_cone']:.3f} | {row['annihilations']:,} | "
              f"{row['coincidences_per_s'] / 1e6:.3f} M | "
              f"{row['simulator_annihilations_per_s'] / 1e6:.2f} M | "
              f"{row['numpy_baseline_annihilations_per_s'] / 1e6:.2f} M | {row['ratio_simulator_to_numpy']:.2f} |")
    sys.stdout.flush()
    memory = []
    if not args.no_memory:
        phantom_path = ROOT / "configs" / "phantoms" / "calibration_cylinder.toml"
        for duration in (1.0, 10.0):
            mb, size = peak_memory_mb(phantom_path, duration)
            memory.append({"duration_s": duration, "peak_rss_mb": round(mb, 1), "file_mb": round(size / 1e6, 2)})
            print(f"memory: calibration_cylinder {duration:g} s -> peak RSS {mb:.1f} MB, "
                  f"file {size / 1e6:.2f} MB", flush=True)
    print(json.dumps({"rows": rows, "memory": memory}))


if __name__ == "__main__":
    main()
