"""Tests of ``twinray demo``: finding or regenerating the data, and a small end-to-end run.

The end-to-end run checks the report with Python's ``html.parser``, decodes
every embedded image with matplotlib's PNG reader after checking the PNG
signature (PNG specification, section 5.2), and parses the ``--json`` output
with Python's ``json``.
"""

from __future__ import annotations

import contextlib
import io
import json
from pathlib import Path

import numpy as np
import pytest

from twinray import demo
from twinray.errors import TwinrayInputError

from test_report import assert_clean, decode_images, parse_report



def test_manifest_names_the_phantoms_and_seeds_of_the_shipped_events():
    """Regeneration uses the phantom file and seed recorded in each shipped event file's truth JSON."""
    manifest = demo.load_manifest()
    data = Path(__file__).resolve().parents[1] / "simulated_events"  # the checkout's shipped data
    for key in demo.STUDY_KEYS:
        entry = manifest[key]
        assert (demo.PACKAGE_CONFIGS / entry["phantom"]).is_file(), entry
        truth_json = data / entry["events"].replace(".parquet", "_truth.json")
        assert truth_json.is_file(), truth_json
        truth = json.loads(truth_json.read_text())
        assert Path(truth["phantom_file"]).name == Path(entry["phantom"]).name
        assert truth["seed"] == entry["seed"]


def test_regions_of_interest_lie_inside_their_compartments():
    """Each TAC sphere of the manifest lies wholly in the phantom shape it is named after and in no later
    shape (later shapes replace earlier ones), checked on points filling the sphere."""
    from twinray.simulate import load_phantom

    manifest = demo.load_manifest()
    g = np.linspace(-1.0, 1.0, 11)
    u = np.stack(np.meshgrid(g, g, g, indexing="ij"), axis=-1).reshape(-1, 3)
    u = u[np.linalg.norm(u, axis=1) <= 1.0]
    for key, rois in (("dynamic", manifest["roi"]), ("study", manifest["study_roi"])):
        phantom = load_phantom(demo.PACKAGE_CONFIGS / manifest[key]["phantom"])
        names = [s.name for s in phantom.shapes]
        for roi in rois:
            x, y, z, r = roi["sphere"]
            pts = np.array([x, y, z]) + r * u
            k = names.index(roi["name"])
            assert np.all(phantom.shapes[k].contains(*pts.T)), roi
            for later in phantom.shapes[k + 1:]:
                assert not np.any(later.contains(*pts.T)), (roi, later.name)


def test_find_demo_data_order(tmp_path, monkeypatch):
    manifest = demo.load_manifest()
    names = [manifest[k]["events"] for k in demo.STUDY_KEYS]
    names += [manifest[k]["events"].replace(".parquet", "_truth_mu.nii.gz") for k in ("calibration", "study")]
    given = tmp_path / "given"
    given.mkdir()
    for n in names:
        (given / n).write_bytes(b"x")
    assert demo.find_demo_data(manifest, given) == (given, "given folder")
    (given / names[0]).unlink()
    with pytest.raises(TwinrayInputError, match="lacks"):
        demo.find_demo_data(manifest, given)
    monkeypatch.setattr(demo, "source_tree_data_dir", lambda: tmp_path / "no-tree")
    monkeypatch.delenv("TWINRAY_DEMO_DATA", raising=False)
    monkeypatch.chdir(tmp_path)
    assert demo.find_demo_data(manifest) == (None, None)
    # An installed package run from a checkout's root finds ./simulated_events.
    here = tmp_path / "simulated_events"
    here.mkdir()
    for n in names:
        (here / n).write_bytes(b"x")
    assert demo.find_demo_data(manifest)[0] == here
    (here / names[1]).unlink()
    assert demo.find_demo_data(manifest) == (None, None)
    (given / names[0]).write_bytes(b"x")
    monkeypatch.setenv("TWINRAY_DEMO_DATA", str(given))
    assert demo.find_demo_data(manifest) == (given, "TWINRAY_DEMO_DATA")


def test_unknown_size_is_refused(tmp_path):
    manifest = demo.load_manifest()
    with pytest.raises(TwinrayInputError, match="size"):
        demo.demo_plan(manifest, tmp_path, tmp_path, "huge", None)


def test_regenerates_missing_data_from_packaged_phantoms(tmp_path):
    """Without shipped data the study is simulated from the packaged phantoms (short durations here)."""
    manifest = demo.load_manifest()
    for key in demo.STUDY_KEYS:
        manifest[key] = {**manifest[key], "duration_s": 0.02}
    seen = []
    target = demo.regenerate_demo_data(manifest, tmp_path / "data", on_step=lambda name, step: seen.append(name))
    assert demo._complete(target, manifest)
    assert {f"simulate {k}" for k in demo.STUDY_KEYS} <= set(seen)
    # A second call finds everything and simulates nothing.
    seen.clear()
    demo.regenerate_demo_data(manifest, target, on_step=lambda name, step: seen.append(name))
    assert seen == []


def _run_cli(argv):
    from twinray.cli.main import main

    out, err = io.StringIO(), io.StringIO()
    with contextlib.redirect_stdout(out), contextlib.redirect_stderr(err):
        code = main(argv)
    return code, out.getvalue(), err.getvalue()


def test_demo_bad_input_is_one_error_line(tmp_path):
    """A missing data folder, an unknown size, an output that is the data folder: one `error:` line each."""
    manifest = demo.load_manifest()
    data = tmp_path / "data"
    data.mkdir()
    for n in manifest["study"]["events"], "x.txt":
        (data / n).write_bytes(b"")
    for argv in (["demo", "-o", str(tmp_path / "o"), "--data", str(tmp_path / "missing")],
                 ["demo", "-o", str(tmp_path / "o"), "--data", str(data)],
                 ["demo", "-o", str(tmp_path / "o"), "--size", "huge"]):
        code, stdout, stderr = _run_cli(argv)
        assert code != 0
        lines = stderr.strip().splitlines()
        assert len(lines) == 1 and lines[0].startswith("error:"), stderr
        assert "Traceback" not in stderr
    # Every file present but not Parquet: the first step names itself in the error.
    for key in demo.STUDY_KEYS:
        (data / manifest[key]["events"]).write_text("not parquet")
        (data / manifest[key]["events"].replace(".parquet", "_truth_mu.nii.gz")).write_text("not nifti")
    code, _, stderr = _run_cli(["demo", "-o", str(tmp_path / "o"), "--data", str(data)])
    assert code == 1 and stderr.startswith("error: demo step 'twinray inspect'") and stderr.count("\n") == 1


def test_demo_small_end_to_end(tmp_path):
    """`twinray demo --size small --json`: JSON parses, the report parses, images decode, no NaN."""
    out_dir = tmp_path / "demo"
    code, stdout, stderr = _run_cli(["demo", "-o", str(out_dir), "--size", "small", "--workers", "1", "--json"])
    assert code == 0, stderr
    result = json.loads(stdout)
    report = Path(result["report"])
    assert report == out_dir / "report.html" and report.is_file()
    assert [s["name"] for s in result["steps"]] == [
        "inspect", "normalize", "calibration scan", "calibration image", "calibrate", "sinogram", "FBP", "OSEM",
        "dynamic", "TAC", "bootstrap", "thinning"]
    acc = result["accounting"]
    assert acc["read"] == acc["prompts_binned"] + acc["delayed_binned"] + sum(
        v for k, v in acc.items() if k.startswith("rejected_"))
    for path in result["outputs"]:
        assert Path(path).exists(), path
    text = report.read_text()
    assert_clean(text)
    parser = parse_report(text)
    images = decode_images(parser)
    assert len(images) >= 10
    headings = " | ".join(parser.headings)
    for expected in ("Events", "Normalization", "Sinogram", "OSEM image", "FBP and OSEM", "Recovery", "Dynamic study",
                     "Time-activity curves", "Noise study", "Provenance"):
        assert expected in headings, (expected, headings)
