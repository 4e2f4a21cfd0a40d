"""Benchmark: binning throughput against a raw Parquet decode, and peak memory.

Generates (once) event files for the whole-body scanner (span 3) under
``bench/_work/``: 20 million events for throughput, 100 million for the
memory check. Then, in one run and one process, it times

* the baseline: a raw pyarrow ``iter_batches`` read of the same columns into
  numpy (what any reader must pay);
* ``twinray.bin_events`` (library) on the same file, with and without a time
  frame (a frame needs ``time_ns`` decoded, the dearest column);
* the kernels alone on decoded batches (partitioned by plane, direct
  increments) against a numpy lookup-table + ``bincount`` baseline;

and reports ratios (median of ``--repeats`` runs). The command line
``twinray sinogram`` runs in subprocesses, whose wall time and peak resident
memory (``getrusage(RUSAGE_CHILDREN).ru_maxrss``, one fresh wrapper process per
measurement) are recorded for 20 M and 100 M events.

Usage::

    python bench/bench_binning.py [--events 20000000] [--memory-events 100000000] [--repeats 3]
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
import pyarrow.parquet as pq

HERE = Path(__file__).resolve().parent
REPO = HERE.parent
WORK = HERE / "_work"
SCANNER_TOML = REPO / "configs" / "scanners" / "wholebody.toml"
BATCH = 1 << 20
RATE_PER_S = 2_000_000          # events per second of acquisition
DELAYED_FRACTION = 0.08


def _true_pairs(rng, over, R, N, rings, pitch, half_len):
    """Crystal pairs of back-to-back photons from a uniform cylinder; those leaving axially are dropped."""
    r = 200.0 * np.sqrt(rng.random(over))
    a = rng.uniform(0, 2 * np.pi, over)
    x, y = r * np.cos(a), r * np.sin(a)
    z = rng.uniform(-half_len, half_len, over)
    psi = rng.uniform(0, np.pi, over)
    ux, uy = np.cos(psi), np.sin(psi)
    slope = rng.uniform(-0.2, 0.2, over)          # dz per mm travelled in-plane
    pu = x * ux + y * uy
    disc = np.sqrt(pu * pu - (x * x + y * y - R * R))
    ends = []
    ok = np.ones(over, bool)
    for t in (-pu + disc, -pu - disc):
        ang = np.arctan2(y + t * uy, x + t * ux)
        j = np.rint(ang * (N / (2 * np.pi))).astype(np.int64) % N
        ring = np.floor((z + t * slope + half_len) / pitch).astype(np.int64)
        ok &= (ring >= 0) & (ring < rings)
        ends.append(ring * N + j)
    return ends[0][ok], ends[1][ok]


def generate(path: Path, n: int, seed: int = 7, chunk: int = 2_000_000) -> Path:
    """A time-ordered study from a uniform cylinder (radius 200 mm) plus random pairs.

    True coincidences: annihilation points uniform in the cylinder, back-to-back
    photons with a uniform in-plane direction and an axial slope drawn so that
    ring differences up to about the whole axial length occur; each photon is
    detected in the nearest crystal. A fraction of rows are delayed
    coincidences between two uniformly random crystals.
    """
    from twinray.event_writer import EventWriter
    from twinray.scanner import load_scanner

    if path.exists():
        return path
    scanner = load_scanner(SCANNER_TOML)
    R, N, rings, pitch = scanner.radius_mm, scanner.crystals_per_ring, scanner.rings, scanner.axial_pitch_mm
    half_len = rings * pitch / 2
    rng = np.random.default_rng(seed)
    meta = {"scanner": scanner.to_dict(), "duration_s": float(np.ceil(n / RATE_PER_S)), "isotope": "F-18",
            "acquisition_start": "2026-01-01T09:00:00+00:00"}
    t_last = 0
    written = 0
    with EventWriter(path, meta, ["time_ns", "crystal_a", "crystal_b", "delayed"]) as w:
        while written < n:
            m = min(chunk, n - written)
            got_a, got_b, have = [], [], 0
            while have < m:
                ca, cb = _true_pairs(rng, 2 * m, R, N, rings, pitch, half_len)
                got_a.append(ca)
                got_b.append(cb)
                have += len(ca)
            ca = np.concatenate(got_a)[:m]
            cb = np.concatenate(got_b)[:m]
            delayed = rng.random(m) < DELAYED_FRACTION
            k = int(delayed.sum())
            ca[delayed] = rng.integers(0, rings * N, k)
            cb[delayed] = rng.integers(0, rings * N, k)
            gaps = rng.exponential(1e9 / RATE_PER_S, m)
            t = t_last + np.cumsum(gaps).astype(np.int64)
            t_last = int(t[-1])
            w.write({"time_ns": t, "crystal_a": ca.astype(np.int32), "crystal_b": cb.astype(np.int32),
                     "delayed": delayed})
            written += m
    return path


def raw_decode(path: Path, columns) -> tuple:
    """Wall and process-CPU seconds to decode ``columns`` of the file into numpy arrays (the baseline)."""
    c0 = time.process_time()
    t0 = time.perf_counter()
    pf = pq.ParquetFile(path, pre_buffer=False)
    rows = 0
    for batch in pf.iter_batches(batch_size=BATCH, columns=list(columns)):
        for i in range(batch.num_columns):
            batch.column(i).to_numpy(zero_copy_only=False)
        rows += batch.num_rows
    return time.perf_counter() - t0, time.process_time() - c0


def library_bin(path: Path, frames=None, prefetch=2, accumulate="lean") -> tuple:
    from twinray import binning

    saved = binning.ACCUMULATE
    binning.ACCUMULATE = accumulate
    try:
        c0 = time.process_time()
        t0 = time.perf_counter()
        state = binning.bin_events(path, frames=frames, batch_size=BATCH, prefetch=prefetch)
        dt = (time.perf_counter() - t0, time.process_time() - c0)
    finally:
        binning.ACCUMULATE = saved
    return dt, state


def kernels_alone(path: Path, n_max: int = 8_000_000) -> dict:
    """Events per second of the kernels on decoded arrays, and of a numpy baseline (thread CPU time)."""
    from twinray import _binning_kernels as k
    from twinray.binning import _Binner, empty_state
    from twinray.events import open_events
    from twinray.geometry import sinogram_geometry

    src = open_events(path)
    g = sinogram_geometry(src.scanner)
    pf = pq.ParquetFile(path)
    groups = []
    rows = 0
    for g_i in range(pf.metadata.num_row_groups):
        if rows >= n_max:
            break
        groups.append(g_i)
        rows += pf.metadata.row_group(g_i).num_rows
    table = pf.read_row_groups(groups, columns=["crystal_a", "crystal_b", "delayed"])
    ca = table.column("crystal_a").to_numpy()[:n_max]
    cb = table.column("crystal_b").to_numpy()[:n_max]
    d = table.column("delayed").to_numpy()[:n_max]
    n = len(ca)
    out = {}
    for mode in ("partitioned", "direct"):
        state = empty_state(g, None, True)
        b = _Binner(state, None)
        b.add({"crystal_a": ca[:BATCH], "crystal_b": cb[:BATCH], "delayed": d[:BATCH]})  # compile/load
        state.prompts[:] = 0
        times = []
        for _ in range(3):
            codes = np.empty(BATCH, np.int64)
            t_classify = t_acc = 0.0
            for s in range(0, n, BATCH):
                a1, b1, d1 = ca[s:s + BATCH], cb[s:s + BATCH], d[s:s + BATCH]
                c = codes[:len(a1)]
                t0 = time.thread_time()
                k.classify_batch(a1, b1, b.no_time, False, d1, True, b.no_energy, b.no_energy, False,
                                 b.e_lo, b.e_hi, b.starts, b.ends, g.scanner.n_crystals, b.ring_of, b.position_of,
                                 b.inplane_code, b.factored, b.by_sum, b.half, b.by_diff, b.plane_of_rings,
                                 b.bins_per_plane, b.n_bins, c, state.counts)
                t1 = time.thread_time()
                if mode == "partitioned":
                    k.accumulate_codes(c, b.prompts_flat, b.delayed_flat, b.bins_per_plane, b.n_keys,
                                       b.key_counts, np.empty(len(c), np.int64))
                else:
                    k.accumulate_codes_direct(c, b.prompts_flat, b.delayed_flat)
                t_classify += t1 - t0
                t_acc += time.thread_time() - t1
            times.append((t_classify, t_acc))
        tc, ta = min(times, key=sum)
        out[mode] = {"classify_Mev_s": n / tc / 1e6, "accumulate_Mev_s": n / ta / 1e6,
                     "total_Mev_s": n / (tc + ta) / 1e6}
    # numpy baseline: the same lookup tables, then bincount (one frame, prompts only).
    cpr = g.scanner.crystals_per_ring
    times = []
    for _ in range(3):
        t0 = time.thread_time()
        hist = np.zeros(g.n_bins, np.int64)
        for s in range(0, n, BATCH):
            a1 = ca[s:s + BATCH].astype(np.int64)
            b1 = cb[s:s + BATCH].astype(np.int64)
            ra, ja = np.divmod(a1, cpr)
            rb, jb = np.divmod(b1, cpr)
            inplane = g.inplane_bin[ja, jb]
            e1 = g.inplane_end1_is_a[ja, jb]
            plane = np.where(e1, g.plane_of_rings[ra, rb], g.plane_of_rings[rb, ra])
            ok = (inplane >= 0) & (plane >= 0)
            hist += np.bincount(plane[ok].astype(np.int64) * (g.views * g.radial_bins) + inplane[ok],
                                minlength=g.n_bins)
        times.append(time.thread_time() - t0)
    out["numpy_lut_bincount"] = {"total_Mev_s": n / min(times) / 1e6}
    # The lean kernels (the default path), one thread: classify, tally and list, increments.
    state = empty_state(g, None, True)
    b = _Binner(state, None, "lean")
    multiplier, by_sum, diff_flat, plane_flat, first_reason = b.lean
    tally = np.zeros((4, 32), np.int64)
    even = np.empty(BATCH, np.int64)
    odd = np.empty(BATCH, np.int64)
    combined = state._combined
    times = []
    for _ in range(3):
        codes = np.empty(BATCH, np.int64)
        t_classify = t_tally = t_acc = 0.0
        for s in range(0, n, BATCH):
            a1, b1, d1 = ca[s:s + BATCH], cb[s:s + BATCH], d[s:s + BATCH]
            c = codes[:len(a1)]
            t0 = time.thread_time()
            k.classify_lean(a1, b1, b.no_time, False, b.starts, b.ends, d1, True, b.no_energy, b.no_energy, False,
                            b.e_lo, b.e_hi, g.scanner.n_crystals, multiplier, g.scanner.crystals_per_ring, by_sum,
                            diff_flat, plane_flat, g.scanner.rings, b.bins_per_plane, b.n_bins, first_reason, c)
            t1 = time.thread_time()
            n_even, n_odd = k.tally_and_split(c, b.n_bins, b.n_bins, tally, True, even, odd)
            t2 = time.thread_time()
            k.add_listed(even, n_even, combined)
            k.add_listed(odd, n_odd, combined)
            t_classify += t1 - t0
            t_tally += t2 - t1
            t_acc += time.thread_time() - t2
        times.append((t_classify, t_tally, t_acc))
    tc, tt, ta = min(times, key=sum)
    # The floor of any single-pass binner here: only the increments (lists prepared, one parity per
    # thread, both threads at once), no decoding and no classification.
    lists = []
    for s in range(0, n, BATCH):
        c = np.empty(min(BATCH, n - s), np.int64)
        k.classify_lean(ca[s:s + BATCH], cb[s:s + BATCH], b.no_time, False, b.starts, b.ends, d[s:s + BATCH], True,
                        b.no_energy, b.no_energy, False, b.e_lo, b.e_hi, g.scanner.n_crystals, multiplier,
                        g.scanner.crystals_per_ring, by_sum, diff_flat, plane_flat, g.scanner.rings,
                        b.bins_per_plane, b.n_bins, first_reason, c)
        ev, od = np.empty(len(c), np.int64), np.empty(len(c), np.int64)
        n_even, n_odd = k.tally_and_split(c, b.n_bins, b.n_bins, tally, True, ev, od)
        lists.append(((ev, n_even), (od, n_odd)))
    from concurrent.futures import ThreadPoolExecutor

    def add(parity):
        for pair in lists:
            k.add_listed(pair[parity][0], pair[parity][1], combined)

    walls = []
    with ThreadPoolExecutor(2) as pool:
        for _ in range(3):
            t0 = time.perf_counter()
            list(pool.map(add, (0, 1)))
            walls.append(time.perf_counter() - t0)
    out["increments_alone_two_threads_Mev_s"] = n / min(walls) / 1e6
    out["lean"] = {"classify_Mev_s": n / tc / 1e6, "tally_and_list_Mev_s": n / tt / 1e6, "accumulate_Mev_s": n / ta / 1e6,
                   "total_Mev_s": n / (tc + tt + ta) / 1e6}
    out["events"] = n
    return out


def cli_run(path: Path, out: Path, extra=()) -> dict:
    """Run ``twinray sinogram`` in a wrapper process; wall time, timings and peak RSS of the command."""
    cmd = [str(Path(sys.executable).with_name("twinray")), "sinogram", str(path), "-o", str(out), "--json",
           *extra]
    wrapper = ("import resource, subprocess, sys, time, json\n"
               "t0 = time.perf_counter()\n"
               f"p = subprocess.run({cmd!r}, capture_output=True, text=True)\n"
               "wall = time.perf_counter() - t0\n"
               "rss = resource.getrusage(resource.RUSAGE_CHILDREN).ru_maxrss\n"
               "print(json.dumps({'rc': p.returncode, 'wall_s': wall, 'maxrss_kb': rss, 'stdout': p.stdout, "
               "'stderr': p.stderr}))\n")
    proc = subprocess.run([sys.executable, "-c", wrapper], capture_output=True, text=True, check=True)
    res = json.loads(proc.stdout)
    if res["rc"] != 0:
        raise RuntimeError(res["stderr"])
    res["result"] = json.loads(res.pop("stdout"))
    out.unlink(missing_ok=True)
    return res


def machine() -> dict:
    info = {"python": platform.python_version(), "platform": platform.platform(), "cores": os.cpu_count()}
    try:
        lscpu = subprocess.run(["lscpu"], capture_output=True, text=True).stdout
        for line in lscpu.splitlines():
            if line.startswith("Model name:"):
                info["cpu"] = line.split(":", 1)[1].strip()
    except OSError:
        pass
    try:
        with open("/proc/meminfo") as f:
            info["ram_gb"] = round(int(f.readline().split()[1]) / 1024 ** 2, 1)
    except OSError:
        pass
    import numba
    import pyarrow
    info.update(numpy=np.__version__, numba=numba.__version__, pyarrow=pyarrow.__version__)
    return info


def main(argv=None):
    ap = argparse.ArgumentParser(description=__doc__.split("\n")[0])
    ap.add_argument("--events", type=int, default=20_000_000)
    ap.add_argument("--memory-events", type=int, default=100_000_000)
    ap.add_argument("--repeats", type=int, default=3)
    ap.add_argument("--skip-memory", action="store_true")
    args = ap.parse_args(argv)
    WORK.mkdir(exist_ok=True)
    t0 = time.perf_counter()
    small = generate(WORK / f"wholebody_{args.events // 1_000_000}M.parquet", args.events)
    print(f"# file {small.name}: {small.stat().st_size / 1e6:.0f} MB, {small.stat().st_size / args.events:.2f} B/event "
          f"(generated or found in {time.perf_counter() - t0:.0f} s)", flush=True)
    n = args.events
    cols_nt = ["crystal_a", "crystal_b", "delayed"]
    cols_t = ["time_ns"] + cols_nt
    raw_decode(small, cols_t)                    # warm the page cache
    library_bin(small, None)                     # load compiled kernels
    library_bin(small, None, accumulate="direct")
    library_bin(small, None, accumulate="partitioned")
    library_bin(small, [(0.0, 1e6)])
    load_before = os.getloadavg()
    rows = {"raw_nt": [], "lib_nt": [], "raw_t": [], "lib_t": [], "lib_nt_noprefetch": [], "lib_nt_direct": [],
            "lib_nt_partitioned": []}
    state = None
    for _ in range(args.repeats):
        rows["raw_nt"].append(raw_decode(small, cols_nt))
        dt, state = library_bin(small, None)
        rows["lib_nt"].append(dt)
        rows["lib_nt_noprefetch"].append(library_bin(small, None, prefetch=0)[0])
        rows["lib_nt_direct"].append(library_bin(small, None, accumulate="direct")[0])
        rows["lib_nt_partitioned"].append(library_bin(small, None, accumulate="partitioned")[0])
        rows["raw_t"].append(raw_decode(small, cols_t))
        rows["lib_t"].append(library_bin(small, [(0.0, 1e6)])[0])
    med = {k: statistics.median(w for w, _ in v) for k, v in rows.items()}
    cpu = {k: statistics.median(c for _, c in v) for k, v in rows.items()}
    acc = state.accounting()
    report = {"machine": machine(), "date": time.strftime("%Y-%m-%d %H:%M UTC", time.gmtime()), "events": n,
              "seconds_median": med, "rates_Mev_s": {k: n / v / 1e6 for k, v in med.items()},
              "cpu_seconds_median": cpu,
              "cpu_ratio_lib_vs_raw_no_time": cpu["raw_nt"] / cpu["lib_nt"],
              "cpu_ratio_lib_vs_raw_with_time": cpu["raw_t"] / cpu["lib_t"],
              "ratio_lib_vs_raw_no_time": med["raw_nt"] / med["lib_nt"],
              "ratio_lib_vs_raw_with_time": med["raw_t"] / med["lib_t"],
              "ratio_lib_noprefetch_vs_raw_no_time": med["raw_nt"] / med["lib_nt_noprefetch"],
              "ratio_lib_direct_vs_raw_no_time": med["raw_nt"] / med["lib_nt_direct"],
              "ratio_lib_partitioned_vs_raw_no_time": med["raw_nt"] / med["lib_nt_partitioned"],
              "load_average_1min_before_after": [load_before[0], os.getloadavg()[0]],
              "accounting": acc.to_dict()}
    print(json.dumps(report, indent=1), flush=True)
    report["kernels_alone"] = kernels_alone(small)
    # Bound on the ratio for a binner that shares the two cores between decoding (its CPU time per
    # event, from the baseline) and increments at the two-thread rate measured alone.
    decode_cpu_per_event = cpu["raw_nt"] / n
    increment_cpu_per_event = 2 / (report["kernels_alone"]["increments_alone_two_threads_Mev_s"] * 1e6)
    bound_rate = 2 / (decode_cpu_per_event + increment_cpu_per_event)
    report["bound_ratio_free_classification"] = bound_rate / (n / med["raw_nt"])
    print(json.dumps(report["kernels_alone"], indent=1), flush=True)
    print(json.dumps({"bound_ratio_free_classification": report["bound_ratio_free_classification"]}), flush=True)
    cli = [cli_run(small, WORK / "cli_out.h5") for _ in range(args.repeats)]
    best = min(cli, key=lambda r: r["wall_s"])
    report["cli_20M"] = {"wall_s_median": statistics.median(r["wall_s"] for r in cli),
                         "timings_s": best["result"]["timings_s"], "maxrss_mb": best["maxrss_kb"] / 1024}
    report["ratio_cli_wall_vs_raw_no_time"] = med["raw_nt"] / report["cli_20M"]["wall_s_median"]
    report["ratio_cli_bin_phase_vs_raw_no_time"] = med["raw_nt"] / best["result"]["timings_s"]["bin"]
    print(json.dumps({k: report[k] for k in ("cli_20M", "ratio_cli_wall_vs_raw_no_time",
                                             "ratio_cli_bin_phase_vs_raw_no_time")}, indent=1), flush=True)
    if not args.skip_memory:
        big = generate(WORK / f"wholebody_{args.memory_events // 1_000_000}M.parquet", args.memory_events, seed=11)
        mem = {}
        for label, path in (("small", small), ("big", big)):
            r = cli_run(path, WORK / "cli_mem.h5")
            mem[label] = {"events": r["result"]["accounting"]["read"], "maxrss_mb": r["maxrss_kb"] / 1024,
                          "wall_s": r["wall_s"], "timings_s": r["result"]["timings_s"]}
        mem["ratio_big_vs_small"] = mem["big"]["maxrss_mb"] / mem["small"]["maxrss_mb"]
        report["memory"] = mem
        print(json.dumps(mem, indent=1), flush=True)
    (WORK / "bench_binning.json").write_text(json.dumps(report, indent=1))
    return report


if __name__ == "__main__":
    main()
