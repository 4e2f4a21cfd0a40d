"""Benchmark: framing and resampling in one pass, and parallel reconstruction.

In one process, on the whole-body-scanner event file of ``bench_binning.py``
(generated there, or here with its generator, under ``bench/_work/``) binned
with ``--rebin ssrb``:

1. **Frames.** ``bin_events`` with one frame covering the study, and with
   30 equal frames (one pass): goal 30 frames <= 1.3 x one frame. Short
   frames come out of the pass as event codes (see ``BinningState``); the
   time to make all 30 dense, one at a time as the workers do, is timed
   too and reported with the pass (``ratio_30_frames_made_dense_vs_1``).
2. **Replicates.** ``bin_replicates`` (Poisson bootstrap) with 1 and with 20
   replicates, and the ordinary ``bin_events``: goal 20 replicates <= 3 x 1.
   A raw pyarrow decode of the same columns is the common baseline. The
   pair is timed with the default numba threads and again with one thread.
3. **Parallel reconstruction.** The same frames (bench-top scanner, fully
   3-D OSEM) corrected and reconstructed by ``map_tasks`` on a local Dask
   cluster of 1 and of 2 workers (clusters started and warmed up before the
   clock starts): goal speed-up >= 1.7 x.

Every figure is the median of ``--repeats`` runs. Prints a JSON summary and
a Markdown section for ``bench/RESULTS.md``.

Usage::

    python bench/bench_dynamic.py [--events 20000000] [--repeats 3] [--recon-frames 8]
"""

from __future__ import annotations

import argparse
import json
import os
import platform
import statistics
import sys
import time
from pathlib import Path

import numpy as np
import pyarrow.parquet as pq

HERE = Path(__file__).resolve().parent
REPO = HERE.parent
WORK = HERE / "_work"


def _median_time(func, repeats):
    times = []
    result = None
    for _ in range(repeats):
        t = time.perf_counter()
        result = func()
        times.append(time.perf_counter() - t)
    return statistics.median(times), result


def raw_decode(path, columns, batch_size=1 << 20):
    """Baseline: pyarrow iter_batches of the columns into numpy, nothing else."""
    pf = pq.ParquetFile(path, pre_buffer=False)
    n = 0
    for batch in pf.iter_batches(batch_size=batch_size, columns=columns):
        for i in range(batch.num_columns):
            batch.column(i).to_numpy(zero_copy_only=False)
        n += batch.num_rows
    return n


def bench_framing(path, repeats):
    import numba

    from twinray.binning import bin_events
    from twinray.events import open_events
    from twinray.geometry import sinogram_geometry
    from twinray.resample import bin_replicates

    source = open_events(path)
    geometry = sinogram_geometry(source.scanner, "ssrb")
    duration = float(source.duration_s)
    frames30 = [(duration * k / 30, duration * (k + 1) / 30) for k in range(30)]
    # warm-up: compile or load every kernel once
    bin_events(source, geometry, frames=[(0.0, duration)])
    bin_replicates(source, geometry, mode="bootstrap", replicates=1, seed=1)

    out = {"events": source.num_rows, "sinogram_shape": list(geometry.shape)}
    out["decode_time_s"], _ = _median_time(lambda: raw_decode(path, ["time_ns", "crystal_a", "crystal_b",
                                                                     "delayed"]), repeats)
    out["decode_no_time_s"], _ = _median_time(lambda: raw_decode(path, ["crystal_a", "crystal_b", "delayed"]),
                                              repeats)
    out["bin_no_frame_s"], _ = _median_time(lambda: bin_events(source, geometry), repeats)
    out["bin_1_frame_s"], one = _median_time(lambda: bin_events(source, geometry, frames=[(0.0, duration)]),
                                             repeats)
    out["bin_30_frames_s"], many = _median_time(lambda: bin_events(source, geometry, frames=frames30), repeats)
    out["frames_held_as_codes"] = sum(many.frame_codes(k) is not None for k in range(30))

    def dense_frames():
        # What the workers do before reconstructing: each frame made dense, one at a time.
        total = 0
        for k in range(30):
            prompts, delayed = many.frame_sinograms(k)
            total += int(prompts.sum()) + int(delayed.sum())
        return total

    out["dense_30_frames_s"], _ = _median_time(dense_frames, repeats)
    assert np.array_equal(many.prompts.sum(axis=0), one.prompts[0])
    del many, one
    out["ratio_30_frames_vs_1"] = out["bin_30_frames_s"] / out["bin_1_frame_s"]
    out["ratio_30_frames_made_dense_vs_1"] = (out["bin_30_frames_s"] + out["dense_30_frames_s"]) / out["bin_1_frame_s"]
    out["replicates_1_s"], _ = _median_time(
        lambda: bin_replicates(source, geometry, mode="bootstrap", replicates=1, seed=1), repeats)
    out["replicates_20_s"], state = _median_time(
        lambda: bin_replicates(source, geometry, mode="bootstrap", replicates=20, seed=1), repeats)
    out["replicates_20_passes"] = state.passes
    del state
    out["ratio_20_replicates_vs_1"] = out["replicates_20_s"] / out["replicates_1_s"]
    # The weighted adds and the unweave share the sinogram rows among the numba threads; the same
    # pair of timings with one thread shows what that parallelism contributes.
    out["numba_threads"] = numba.get_num_threads()
    numba.set_num_threads(1)
    try:
        out["replicates_1_one_thread_s"], _ = _median_time(
            lambda: bin_replicates(source, geometry, mode="bootstrap", replicates=1, seed=1), repeats)
        out["replicates_20_one_thread_s"], _ = _median_time(
            lambda: bin_replicates(source, geometry, mode="bootstrap", replicates=20, seed=1), repeats)
    finally:
        numba.set_num_threads(out["numba_threads"])
    out["ratio_20_replicates_vs_1_one_thread"] = out["replicates_20_one_thread_s"] / out["replicates_1_one_thread_s"]
    out["ratio_20_replicates_vs_plain_binning"] = out["replicates_20_s"] / out["bin_no_frame_s"]
    out["ratio_1_frame_vs_decode"] = out["bin_1_frame_s"] / out["decode_time_s"]
    out["ratio_20_replicates_vs_decode"] = out["replicates_20_s"] / out["decode_no_time_s"]
    return out


def _recon_tasks(n_frames):
    """Frames of a simulated-looking uniform cylinder on the bench-top scanner (Poisson counts)."""
    from twinray.corrections.apply import CorrectionOptions, prepare_corrections
    from twinray.dynamic import FrameTask
    from twinray.geometry import sinogram_geometry
    from twinray.scanner import load_scanner

    scanner = load_scanner(REPO / "configs" / "scanners" / "benchtop.toml")
    geometry = sinogram_geometry(scanner)
    rng = np.random.default_rng(3)
    s = geometry.radial_positions_mm[None, None, :]
    chord = 2 * np.sqrt(np.clip(40.0 ** 2 - s ** 2, 0, None))       # 40 mm cylinder, line integral
    mean = np.broadcast_to(chord, geometry.shape) * 0.5 + 0.2
    tasks = [FrameTask(k, rng.poisson(mean).astype(np.int32), None, 10.0 * k, 10.0, decay_factor=1.0)
             for k in range(n_frames)]
    options = CorrectionOptions(randoms="none")
    return tasks, {"geometry": geometry, "correction_options": options,
                   "correction_inputs": prepare_corrections(geometry, options)}


def _timed_frame_image(task, **shared):
    """frame_image plus the wall and CPU seconds of the task in its worker."""
    from twinray.dynamic import frame_image

    wall, cpu = time.perf_counter(), time.process_time()
    result = frame_image(task, **shared)
    return result, time.perf_counter() - wall, time.process_time() - cpu


def bench_parallel(n_frames, repeats, iterations=3, subsets=8):
    from twinray.dynamic import frame_image
    from twinray.parallel import dask_client, map_tasks
    from twinray.reconstruct.pipeline import ReconOptions

    tasks, shared = _recon_tasks(n_frames)
    shared["recon_options"] = ReconOptions(method="osem", iterations=iterations, subsets=subsets, mode="3d")
    out = {"frames": n_frames, "recon": f"OSEM 3-D {iterations} it x {subsets} subsets, bench-top scanner"}
    images = {}
    for workers in (1, 2):
        with dask_client(workers=workers) as client:
            map_tasks(frame_image, tasks[:2 * workers], shared, client=client)   # warm-up: kernels in every worker
            t, res = _median_time(lambda: map_tasks(_timed_frame_image, tasks, shared, client=client), repeats)
            out[f"workers_{workers}_s"] = t
            out[f"workers_{workers}_task_wall_s_mean"] = float(np.mean([r[1] for r in res]))
            out[f"workers_{workers}_task_cpu_s_mean"] = float(np.mean([r[2] for r in res]))
            images[workers] = [r[0]["image"] for r in res]
    out["speedup_2_workers"] = out["workers_1_s"] / out["workers_2_s"]
    out["identical_1_vs_2"] = all(a.tobytes() == b.tobytes() for a, b in zip(images[1], images[2]))
    return out


def main(argv=None):
    parser = argparse.ArgumentParser(description=__doc__.split("\n")[0])
    parser.add_argument("--events", type=int, default=20_000_000)
    parser.add_argument("--repeats", type=int, default=3)
    parser.add_argument("--recon-frames", type=int, default=8)
    parser.add_argument("--skip-binning", action="store_true")
    args = parser.parse_args(argv)

    sys.path.insert(0, str(HERE))
    import bench_binning

    WORK.mkdir(exist_ok=True)
    load_before = os.getloadavg()
    result = {"machine": platform.processor() or platform.machine(), "python": platform.python_version(),
              "date_utc": time.strftime("%Y-%m-%d %H:%M", time.gmtime()), "load_average_before": load_before}
    if not args.skip_binning:
        path = WORK / f"wholebody_{args.events // 1_000_000}M.parquet"
        bench_binning.generate(path, args.events)
        result["binning"] = bench_framing(path, args.repeats)
    result["parallel"] = bench_parallel(args.recon_frames, args.repeats)
    result["load_average_after"] = os.getloadavg()
    print(json.dumps(result, indent=2))
    (WORK / "bench_dynamic.json").write_text(json.dumps(result, indent=2))


if __name__ == "__main__":
    main()
