"""The demo's report: every step's outputs in one HTML file.

Built only from the files the steps wrote (through
:mod:`twinray.report.sections`) plus the steps' ``--json`` results (timings,
accounting), so it shows what a user running the same commands would get.
"""

from __future__ import annotations

from pathlib import Path

from .report import Report, provenance
from .report import sections


def _step(steps, name):
    return next((s for s in steps if s.name == name), None)


def build_demo_report(manifest: dict, data: Path, origin: str, out: Path, steps, size: str,
                      workers: int | None) -> Path:
    """Write ``out/report.html`` for a finished demo run; returns its path."""
    rep = Report("twinray demonstration: an invented bench-top study",
                 f"size '{size}'; data: {origin}")
    truth_image = data / (manifest["study"]["events"].removesuffix(".parquet") + "_truth_activity.nii.gz")
    regions = [(r["name"], r["sphere"]) for r in manifest.get("study_roi", [])]
    images = {"FBP": out / "fbp.nii.gz", "OSEM": out / "osem.nii.gz"}
    recovery = sections.recovery_rows(images, truth_image, regions) if truth_image.is_file() and regions else []
    calibration = _read_json(out / "calibration.json")

    rep.heading("At a glance")
    rep.key_values(_glance(steps, recovery, calibration), caption="The run in a few numbers")
    rep.heading("What was run")
    rep.paragraph(manifest.get("description", "A simulated study made by twinray's own simulator."))
    rep.paragraph("Every step below is an ordinary twinray command; the same command lines typed in a shell "
                  "give the same files. Nothing in this report comes from anywhere but those files.")
    rep.table(["step", "command", "wall time (s)"],
              [(s.name, "twinray " + " ".join(_short(a, out, data) for a in s.argv), round(s.seconds, 2))
               for s in steps], caption="Steps, in order")

    warned = warning_rows(steps)
    if warned:
        rep.table(["step", "warning", "times"], warned,
                  caption="Warnings printed by the steps (numbers that vary are shown as N)")

    study = data / manifest["study"]["events"]
    sections.add_events_sections(rep, study)
    if (out / "norm.h5").is_file():
        sections.add_normalization_sections(rep, out / "norm.h5")
    if calibration:
        rep.heading("Calibration")
        rep.key_values({k.replace("_", " "): v for k, v in calibration.items()
                        if isinstance(v, (int, float, str, bool)) and k != "source_image"},
                       caption="From the scan of a uniform cylinder of known concentration (calibration.json)")
    sections.add_sinogram_sections(rep, out / "sinogram.h5")
    sections.add_image_sections(rep, out / "osem.nii.gz", label="OSEM image")
    sections.add_comparison_sections(rep, images)
    if recovery:
        sections.add_recovery_sections(rep, images, truth_image, regions, rows=recovery)
    dynamic = data / manifest["dynamic"]["events"]
    sections.add_events_sections(rep, dynamic)
    tac = out / "tac.csv"
    truth_json = data / (manifest["dynamic"]["events"].removesuffix(".parquet") + "_truth.json")
    truth = (sections.true_curves_from_simulation(truth_json, [r["name"] for r in manifest.get("roi", [])])
             if truth_json.is_file() else None)
    sections.add_dynamic_sections(rep, out / "dynamic", tac_path=tac if tac.is_file() else None, truth=truth)
    if (out / "bootstrap").is_dir():
        sections.add_resample_sections(rep, out / "bootstrap")
    if (out / "thinning").is_dir():
        sections.add_resample_sections(rep, out / "thinning")
    inputs = [data / manifest[k]["events"] for k in ("normscan", "calibration", "study", "dynamic")]
    inputs += [data / (manifest[k]["events"].removesuffix(".parquet") + "_truth_mu.nii.gz")
               for k in ("calibration", "study")]
    rep.provenance(provenance(command=f"twinray demo -o {out} --size {size}",
                              options={"size": size, "workers": workers or "default", "data": str(data),
                                       "data origin": origin},
                              inputs=inputs))
    return rep.write(out / "report.html")


def _read_json(path: Path) -> dict:
    import json

    try:
        return json.loads(path.read_text())
    except (OSError, ValueError):
        return {}


def _glance(steps, recovery, calibration) -> dict:
    """A few headline numbers: events, counts binned, calibration, recovery, time."""
    facts = {}
    sino = _step(steps, "sinogram")
    acc = sino.result.get("accounting", {}) if sino else {}
    if acc:
        facts["static study: events read"] = acc.get("read")
        facts["static study: prompts binned in the frame"] = acc.get("prompts_binned")
    if calibration.get("bq_per_ml_per_unit") is not None:
        facts["calibration factor (Bq/mL per counts/s/mL)"] = calibration["bq_per_ml_per_unit"]
    for name, true_mean, _, measured in recovery:
        for label, (mean, ratio) in measured.items():
            if ratio is not None:
                facts[f"{label} / true, {name}"] = round(ratio, 3)
    facts["steps"] = len(steps)
    facts["wall time of the steps (s)"] = round(sum(s.seconds for s in steps), 1)
    return facts


def warning_rows(steps) -> list:
    """``(step, warning, times)``: the steps' warnings, grouped when they differ only in their numbers."""
    import re

    rows: dict = {}
    for step in steps:
        for text in step.result.get("demo_warnings", []):
            pattern = re.sub(r"\d+(\.\d+)?", "N", text)
            key = (step.name, pattern)
            rows[key] = rows.get(key, 0) + 1
    return [(name, pattern, times) for (name, pattern), times in rows.items()]


def _short(arg: str, out: Path, data: Path) -> str:
    """Paths relative to the output or data folder, so the command column stays readable."""
    for base, label in ((out, "OUT"), (data, "DATA")):
        try:
            return f"{label}/{Path(arg).relative_to(base)}"
        except ValueError:
            continue
    return arg
