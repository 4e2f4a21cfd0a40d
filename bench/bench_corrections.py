"""Benchmark: cost of the corrections, relative to binning alone and to outside baselines.

Whole-body scanner (36 rings x 576 crystals, span 3, 659 planes x 288 views x
323 radial bins). Reuses (or generates) the synthetic study of
``bench/bench_binning.py`` (uniform cylinder of radius 200 mm plus 5 %
delayed coincidences) under ``bench/_work/``, a water mu-map of the same
cylinder (2 mm voxels) and a normalization file with random crystal
efficiencies. In one process it measures

* the baseline: a raw pyarrow read of the event columns into numpy;
* ``make_sinogram`` binning only, and with every correction (norm, mu-map,
  delayed randoms with fan-sum variance reduction, tail-fit scatter);
* each correction alone on the binned arrays, and the ACF of all 659 planes
  against scikit-image ``radon`` of the central mu-map slice (same views);

and, in fresh subprocesses, the wall time and peak resident memory of
``twinray normalize`` on studies of two sizes (the fan-sum pass streams, so
memory must not grow with the file; peak = ``VmHWM`` of the child).

Usage::

    python bench/bench_corrections.py [--events 4000000] [--big-events 20000000] [--repeats 3]
"""

from __future__ import annotations

import argparse
import json
import os
import platform
import statistics
import subprocess
import sys
import time
from pathlib import Path

import numpy as np

HERE = Path(__file__).resolve().parent
REPO = HERE.parent
WORK = HERE / "_work"
sys.path.insert(0, str(HERE))


def timed(fn, repeats):
    times = []
    out = None
    for _ in range(repeats):
        t = time.perf_counter()
        out = fn()
        times.append(time.perf_counter() - t)
    return statistics.median(times), out


def water_mu_map(path: Path, radius_mm=200.0, voxel_mm=2.0, n=360, nz=72):
    from twinray.images import write_image

    if path.exists():
        return path
    c = (np.arange(n) - (n - 1) / 2) * voxel_mm
    x, y = np.meshgrid(c, c, indexing="ij")
    slab = (0.096 * (x ** 2 + y ** 2 <= radius_mm ** 2)).astype(np.float32)  # NIST XCOM water, 1/cm
    mu = np.repeat(slab[:, :, None], nz, axis=2)
    aff = np.diag([voxel_mm, voxel_mm, voxel_mm, 1.0])
    aff[:3, 3] = [c[0], c[0], -(nz - 1) / 2 * voxel_mm]
    write_image(path, mu, aff)
    return path


def norm_file(path: Path, geometry, seed=3):
    from twinray.corrections.normalization import norm_from_factors
    from twinray.sinogram_io import write_sinogram_file

    if path.exists():
        return path
    eps = np.random.default_rng(seed).lognormal(0.0, 0.1, geometry.scanner.n_crystals)
    eps /= eps.mean()
    write_sinogram_file(path, {"norm": norm_from_factors(geometry, eps)}, geometry,
                        extra_arrays={"crystal_efficiency": eps.astype(np.float32)})
    return path


def raw_decode(path: Path) -> int:
    import pyarrow.parquet as pq

    pf = pq.ParquetFile(path, pre_buffer=False)
    n = 0
    for batch in pf.iter_batches(batch_size=1 << 20, columns=["crystal_a", "crystal_b", "delayed"]):
        for col in batch.columns:
            col.to_numpy(zero_copy_only=False)
        n += batch.num_rows
    return n


def normalize_subprocess(events: Path, out: Path) -> dict:
    code = (
        "import resource, sys, time\n"
        "from twinray.cli.main import main\n"
        "t = time.perf_counter()\n"
        f"rc = main(['normalize', {str(events)!r}, '-o', {str(out)!r}, '--source-shape', 'cylinder', "
        "'--source-radius-mm', '200', '--source-mu-per-cm', '0.096', '-q'])\n"
        "wall = time.perf_counter() - t\n"
        # VmHWM of the new process image (ru_maxrss would keep the forking parent's peak).
        "hwm = [l for l in open('/proc/self/status') if l.startswith('VmHWM')][0].split()[1]\n"
        "print(rc, wall, hwm)\n"
    )
    res = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, check=True)
    rc, wall, rss_kib = res.stdout.split()
    return {"exit": int(rc), "wall_s": float(wall), "peak_rss_mib": int(rss_kib) / 1024}


def main(argv=None):
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--events", type=int, default=4_000_000)
    parser.add_argument("--big-events", type=int, default=20_000_000)
    parser.add_argument("--repeats", type=int, default=3)
    parser.add_argument("--only-normalize", action="store_true",
                        help="Run only the normalize memory measurement.")
    args = parser.parse_args(argv)

    from bench_binning import generate

    from twinray.corrections.apply import CorrectionOptions, prepare_corrections
    from twinray.corrections.attenuation import attenuation_factors_from_file
    from twinray.corrections.normalization import norm_from_factors
    from twinray.corrections.randoms import randoms_from_delayed
    from twinray.corrections.scatter import tail_fit_scatter
    from twinray.geometry import sinogram_geometry
    from twinray.scanner import load_scanner
    from twinray.sinogram import make_sinogram

    WORK.mkdir(exist_ok=True)
    scanner = load_scanner(REPO / "configs" / "scanners" / "wholebody.toml")
    geometry = sinogram_geometry(scanner)
    events = generate(WORK / f"wholebody_{args.events // 1_000_000}M.parquet", args.events)
    big = generate(WORK / f"wholebody_{args.big_events // 1_000_000}M.parquet", args.big_events)
    mu = water_mu_map(WORK / "wholebody_water_mu.nii.gz")
    norm = norm_file(WORK / "wholebody_norm.h5", geometry)
    out = WORK / "corrections_bench.h5"
    if args.only_normalize:
        print(json.dumps({f"{n}": normalize_subprocess(p, WORK / f"norm_{n}.h5")
                          for n, p in ((args.events, events), (args.big_events, big))}, indent=2))
        return
    result = {"machine": {"python": platform.python_version(), "platform": platform.platform(),
                          "cpus": os.cpu_count(), "load_before": os.getloadavg()},
              "date_utc": time.strftime("%Y-%m-%d %H:%M", time.gmtime()), "events": args.events,
              "shape": list(geometry.shape)}

    # Warm-up: compile / load every kernel once (not timed).
    make_sinogram(events, out, corrections=CorrectionOptions(randoms="delayed", scatter="tail-fit"),
                  norm=norm, mu=mu)

    t_decode, _ = timed(lambda: raw_decode(events), args.repeats)
    t_bin, _ = timed(lambda: make_sinogram(events, out), args.repeats)
    full_options = CorrectionOptions(randoms="delayed", scatter="tail-fit")
    t_full, res = timed(lambda: make_sinogram(events, out, corrections=full_options, norm=norm, mu=mu),
                        max(1, args.repeats - 2))
    result["sinogram"] = {"decode_s": t_decode, "binning_only_s": t_bin, "all_corrections_s": t_full,
                          "all_over_binning": t_full / t_bin, "binning_over_decode": t_bin / t_decode,
                          "timings_s_of_corrected_run": res.timings_s}

    # Each correction alone on the binned arrays.
    prompts = res.content.arrays["prompts"]
    delayed = res.content.arrays["delayed"]
    t_acf, acf = timed(lambda: attenuation_factors_from_file(mu, geometry), 1)
    t_norm_pairs, nf = timed(lambda: norm_from_factors(geometry), 1)
    t_randoms, randoms = timed(lambda: randoms_from_delayed(delayed, geometry), 1)
    t_scatter, _ = timed(lambda: tail_fit_scatter(prompts - randoms, nf, acf, geometry), 1)
    t_read_norm, _ = timed(lambda: prepare_corrections(geometry, CorrectionOptions(), norm_path=norm), 1)

    # Outside baseline for the ACF: scikit-image radon of the central mu-map slice, same number of views.
    import nibabel as nib
    from skimage.transform import radon

    mid = np.asarray(nib.load(str(mu)).dataobj)[:, :, 36].astype(np.float64)
    angles = np.degrees(geometry.view_angles_rad)
    t_radon, _ = timed(lambda: radon(mid, theta=angles, circle=False), 1)
    result["components_s"] = {"acf_659_planes": t_acf, "radon_one_slice_skimage": t_radon,
                              "acf_over_radon_per_plane": t_acf / (t_radon * geometry.planes),
                              "lors": int(np.prod(geometry.shape)),
                              "acf_ns_per_lor": t_acf / np.prod(geometry.shape) * 1e9,
                              "pairs_per_bin_norm": t_norm_pairs, "randoms_delayed_fansum": t_randoms,
                              "scatter_tail_fit": t_scatter, "read_norm_file": t_read_norm}

    # Streaming: normalize on two study sizes in fresh processes.
    result["normalize_memory"] = {
        f"{args.events}": normalize_subprocess(events, WORK / "norm_small.h5"),
        f"{args.big_events}": normalize_subprocess(big, WORK / "norm_big.h5"),
    }
    result["machine"]["load_after"] = os.getloadavg()
    text = json.dumps(result, indent=2, default=float)
    (WORK / "bench_corrections.json").write_text(text + "\n")
    print(text)


if __name__ == "__main__":
    main()
