"""The whole job on the shipped demonstration study, ending in one report.

``run_demo`` takes the invented bench-top study (``simulated_events/``, made
by twinray's own simulator), and runs, in order: ``inspect``, ``normalize``,
``sinogram`` with every correction, a calibration (``calibrate`` on the
scan of a cylinder of known concentration), ``reconstruct`` by FBP and by
OSEM in Bq/mL,
``dynamic`` with ``tac``, and a ``resample`` noise study (bootstrap for the
noise map, thinning for noise against counts). Each step is the real
subcommand, called in-process with ``--json`` so that its outputs and
accounting are collected; the report is then built from the files the steps
wrote.

Where the data come from (first that applies):

1. ``data_dir`` given by the caller (``twinray demo --data DIR``) or the
   environment variable ``TWINRAY_DEMO_DATA``;
2. ``simulated_events/`` of a source checkout (next to ``src/``);
3. otherwise the study is regenerated with the simulator into
   ``OUTPUT/demo-data/`` from the phantom and scanner files shipped inside
   the package (``twinray/configs/``), with the same seeds as the shipped
   files, so an installed package needs no source tree.

The manifest ``twinray/data/demo/demo.toml`` names the files, the seeds, the
frame schedules and the regions of interest.
"""

from __future__ import annotations

import contextlib
import dataclasses
import io
import json
import os
import time
import tomllib
from pathlib import Path

from .errors import TwinrayInputError


PACKAGE_DEMO_DIR = Path(__file__).resolve().parent / "data" / "demo"
MANIFEST = PACKAGE_DEMO_DIR / "demo.toml"
#: Phantoms and scanners shipped inside the package (``configs/`` of the repository links here).
PACKAGE_CONFIGS = Path(__file__).resolve().parent / "configs"
SIZES = ("small", "full")


@dataclasses.dataclass(frozen=True)
class DemoStep:
    """One subcommand of the demo and what it returned.

    Attributes
    ----------
    name : str
        Short label ("sinogram", "OSEM", ...).
    argv : tuple of str
        The subcommand line (without ``twinray`` and ``--json``).
    seconds : float
        Wall time.
    result : dict
        The command's ``--json`` object.
    """

    name: str
    argv: tuple
    seconds: float
    result: dict


@dataclasses.dataclass(frozen=True)
class DemoResult:
    """What the demo did: the report, every step, and where the data came from."""

    report: Path
    output_dir: Path
    data_dir: Path
    data_origin: str
    steps: tuple
    size: str

    @property
    def outputs(self) -> list:
        out = []
        for step in self.steps:
            out.extend(step.result.get("outputs", []))
        return [*out, str(self.report)]


def load_manifest(path=MANIFEST) -> dict:
    """Read the demo manifest (file names, seeds, schedules, regions)."""
    path = Path(path)
    try:
        return tomllib.loads(path.read_text(encoding="utf-8"))
    except FileNotFoundError:
        raise TwinrayInputError(f"demo manifest {path} is missing; the package is incomplete") from None


STUDY_KEYS = ("normscan", "calibration", "study", "dynamic")


def _study_files(manifest: dict) -> dict:
    return {key: manifest[key]["events"] for key in STUDY_KEYS}


def _mu_name(events_name: str) -> str:
    stem = events_name[: -len(".parquet")] if events_name.endswith(".parquet") else events_name
    return f"{stem}_truth_mu.nii.gz"


def _complete(folder: Path, manifest: dict) -> bool:
    names = list(_study_files(manifest).values()) + [_mu_name(manifest[k]["events"]) for k in ("calibration", "study")]
    return all((folder / n).is_file() for n in names)


def source_tree_data_dir() -> Path:
    """``simulated_events/`` of a source checkout (``src/twinray/demo.py`` -> repository root)."""
    return Path(__file__).resolve().parents[2] / "simulated_events"


def find_demo_data(manifest: dict, data_dir=None) -> tuple:
    """Where the demo study is, without regenerating anything.

    Returns
    -------
    (Path, str) or (None, None)
        The folder and how it was found.
    """
    if data_dir is not None:
        data_dir = Path(data_dir)
        if not _complete(data_dir, manifest):
            raise TwinrayInputError(f"demo data folder {data_dir} lacks some of "
                                    f"{', '.join(_study_files(manifest).values())}")
        return data_dir, "given folder"
    env = os.environ.get("TWINRAY_DEMO_DATA")
    if env:
        if not _complete(Path(env), manifest):
            raise TwinrayInputError(f"TWINRAY_DEMO_DATA={env} lacks some of the demo files")
        return Path(env), "TWINRAY_DEMO_DATA"
    tree = source_tree_data_dir()
    if _complete(tree, manifest):
        return tree, "source checkout"
    # A non-editable install run from the repository root (as the README does).
    here = Path.cwd() / "simulated_events"
    if here.resolve() != tree.resolve() and _complete(here, manifest):
        return here, "simulated_events/ in the current folder"
    return None, None


def regenerate_demo_data(manifest: dict, target: Path, on_step=None) -> Path:
    """Simulate the demo study into ``target`` from the phantoms shipped in the package."""
    target.mkdir(parents=True, exist_ok=True)
    for key in STUDY_KEYS:
        entry = manifest[key]
        events = target / entry["events"]
        if events.is_file() and (target / _mu_name(entry["events"])).is_file():
            continue
        phantom = PACKAGE_CONFIGS / entry["phantom"]
        argv = ["simulate", str(phantom), "-o", str(events), "--seed", str(int(entry["seed"]))]
        if "duration_s" in entry:  # shorter studies, for tests of this path
            argv += ["--duration", str(float(entry["duration_s"]))]
        _run_step(f"simulate {key}", argv, on_step)
    return target


def _run_json(argv: list) -> dict:
    """Run a subcommand in-process with ``--json``; its JSON object (exceptions propagate)."""
    import click

    from .cli.main import cli

    buf, err = io.StringIO(), io.StringIO()
    try:
        # The steps' warnings are collected for the report instead of scrolling past.
        with contextlib.redirect_stdout(buf), contextlib.redirect_stderr(err):
            cli.main(args=[*argv, "--json"], prog_name="twinray", standalone_mode=False)
    except click.ClickException as exc:
        raise TwinrayInputError(f"demo step 'twinray {' '.join(argv[:1])}': {exc.format_message()}") from None
    except TwinrayInputError as exc:
        raise TwinrayInputError(f"demo step 'twinray {' '.join(argv[:1])}': {exc}") from exc
    warnings = [line[len("warning:"):].strip() for line in err.getvalue().splitlines()
                if line.startswith("warning:")]
    lines = [line for line in buf.getvalue().splitlines() if line.strip()]
    result = {}
    if lines:
        try:
            result = json.loads(lines[-1])
        except json.JSONDecodeError:
            result = {"stdout": buf.getvalue()}
    result["demo_warnings"] = warnings
    return result


def _run_step(name: str, argv: list, on_step=None, steps: list | None = None) -> DemoStep:
    if on_step is not None:
        on_step(name, None)
    t0 = time.perf_counter()
    result = _run_json([str(a) for a in argv])
    step = DemoStep(name=name, argv=tuple(str(a) for a in argv), seconds=time.perf_counter() - t0, result=result)
    if steps is not None:
        steps.append(step)
    if on_step is not None:
        on_step(name, step)
    return step


def _roi_args(manifest: dict) -> list:
    args = []
    for roi in manifest.get("roi", []):
        x, y, z, r = (float(v) for v in roi["sphere"])
        args += ["--roi", f"{roi['name']}=sphere:{x:g},{y:g},{z:g},{r:g}"]
    return args


def demo_plan(manifest: dict, data: Path, out: Path, size: str, workers: int | None) -> list:
    """The steps of the demo as ``(name, argv)``, at the given size."""
    if size not in SIZES:
        raise TwinrayInputError(f"demo size must be one of {', '.join(SIZES)}, got {size!r}")
    s = manifest["size"][size]
    study = data / manifest["study"]["events"]
    dynamic = data / manifest["dynamic"]["events"]
    normscan = data / manifest["normscan"]["events"]
    mu = data / _mu_name(manifest["study"]["events"])
    dyn_mu = data / _mu_name(manifest["dynamic"]["events"])
    calib = data / manifest["calibration"]["events"]
    calib_mu = data / _mu_name(manifest["calibration"]["events"])
    cal = ["--calibration", str(out / "calibration.json")]
    corrections = ["--randoms", "delayed", "--scatter", "tail-fit"]
    frame = ["--frame", s["frame"]] if s.get("frame") else []
    rebin = ["--rebin", s.get("rebin", "ssrb")]
    image = ["--matrix", str(s["matrix"]), "--voxel-mm", str(s["voxel_mm"])]
    osem = ["--method", "osem", "--iterations", str(s["iterations"]), "--subsets", str(s["subsets"])]
    par = ["--workers", str(workers)] if workers else []
    dyn_corr = ["--norm", str(out / "norm.h5"), "--randoms", manifest["dynamic"].get("randoms", "delayed"),
                "--scatter", "tail-fit"]
    if dyn_mu.is_file():
        dyn_corr += ["--mu", str(dyn_mu)]
    plan = [
        ("inspect", ["inspect", study]),
        ("normalize", ["normalize", normscan, "-o", out / "norm.h5", *rebin]),
        ("calibration scan", ["sinogram", calib, "-o", out / "calibration" / "sinogram.h5", "--norm",
                              out / "norm.h5", "--mu", calib_mu, *corrections, *frame, *rebin]),
        ("calibration image", ["reconstruct", out / "calibration" / "sinogram.h5", "-o",
                               out / "calibration" / "osem.nii.gz", *osem, *image]),
        ("calibrate", ["calibrate", out / "calibration" / "osem.nii.gz", "-o", out / "calibration.json",
                       "--concentration", str(float(manifest["calibration"]["concentration_bq_per_ml"]))]),
        ("sinogram", ["sinogram", study, "-o", out / "sinogram.h5", "--norm", out / "norm.h5", "--mu", mu,
                      *corrections, *frame, *rebin]),
        ("FBP", ["reconstruct", out / "sinogram.h5", "-o", out / "fbp.nii.gz", "--method", "fbp",
                 "--filter", s.get("filter", "hann"), *image, *cal]),
        ("OSEM", ["reconstruct", out / "sinogram.h5", "-o", out / "osem.nii.gz", *osem, *image, *cal]),
        ("dynamic", ["dynamic", dynamic, "-o", out / "dynamic", "--schedule", s["schedule"], *dyn_corr, *rebin,
                     *osem, *image, *cal, *par]),
        ("TAC", ["tac", out / "dynamic" / "dynamic.nii.gz", "-o", out / "tac.csv", *_roi_args(manifest)]),
        ("bootstrap", ["resample", study, "-o", out / "bootstrap", "--mode", "bootstrap",
                       "--replicates", str(s["replicates"]), "--seed", "11", "--norm", out / "norm.h5", "--mu", mu,
                       *corrections, *frame, *rebin, *osem, *image, *cal, *par]),
        ("thinning", ["resample", study, "-o", out / "thinning", "--mode", "thin",
                      "--fraction", ",".join(f"{f:g}" for f in s["fractions"]),
                      "--replicates", str(s["thin_replicates"]), "--seed", "12", "--norm", out / "norm.h5",
                      "--mu", mu, *corrections, *frame, *rebin, *osem, *image, *cal, *par]),
    ]
    return [(name, [str(a) for a in argv]) for name, argv in plan]


def run_demo(output_dir, size: str = "full", workers: int | None = None, data_dir=None, on_step=None) -> DemoResult:
    """Run the whole job on the demonstration study and write ``OUTPUT/report.html``.

    Parameters
    ----------
    output_dir : path-like
        Folder for every output (created if needed).
    size : {"full", "small"}
        "full" uses the whole study; "small" (a quick check, for continuous
        integration) bins one second of the static scan and uses fewer
        iterations, frames and replicates.
    workers : int, optional
        Dask workers for the dynamic frames and the replicates.
    data_dir : path-like, optional
        A folder holding the demo study (default: see the module notes).
    on_step : callable, optional
        ``on_step(name, None)`` before and ``on_step(name, DemoStep)`` after
        every step (progress).

    Returns
    -------
    DemoResult
    """
    manifest = load_manifest()
    out = Path(output_dir)
    out.mkdir(parents=True, exist_ok=True)
    data, origin = find_demo_data(manifest, data_dir)
    steps: list = []
    if data is None:
        data = regenerate_demo_data(manifest, out / "demo-data", on_step)
        origin = "regenerated by the simulator from the shipped phantoms"
    if (out.resolve() == data.resolve()):
        raise TwinrayInputError(f"output folder {out} is the demo data folder; choose another")
    (out / "calibration").mkdir(exist_ok=True)
    for name, argv in demo_plan(manifest, data, out, size, workers):
        _run_step(name, argv, on_step, steps)
    from .demo_report import build_demo_report

    report = build_demo_report(manifest, data, origin, out, steps, size, workers)
    return DemoResult(report=report, output_dir=out, data_dir=data, data_origin=origin, steps=tuple(steps),
                      size=size)
