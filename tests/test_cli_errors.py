"""Bad input to ``twinray inspect`` and ``twinray sinogram``, and their happy paths.

Rules from the command-line contract: one line on stderr starting with
``error:``, a non-zero exit code, no Python traceback, inputs unchanged, no
output left behind.
"""

from __future__ import annotations

import hashlib
import json
import subprocess
import sys

import numpy as np
import pyarrow as pa
import pyarrow.parquet as pq
import pytest

from conftest import make_small_scanner, random_events
from twinray.cli.main import main
from twinray.sinogram_io import read_sinogram_file


def _digest(path):
    if path.is_dir():
        return {p.name: _digest(p) for p in sorted(path.iterdir())}
    return hashlib.sha256(path.read_bytes()).hexdigest() if path.exists() else None


def run(capsys, *argv):
    code = main([str(a) for a in argv])
    out, err = capsys.readouterr()
    return code, out, err


def assert_one_error_line(code, err):
    assert code != 0
    lines = err.strip().splitlines()
    assert len(lines) == 1, err
    assert lines[0].startswith("error: ")
    assert "Traceback" not in err


@pytest.fixture
def bad_inputs(tmp_path, tiny_event_file, small_scanner, write_event_file, write_scanner_toml):
    """name -> (event path, extra args) for every kind of bad input of issue 2 item 6."""
    table = pq.read_table(tiny_event_file)
    cases = {}

    def write(name, tbl):
        path = tmp_path / name
        pq.write_table(tbl, path)
        return path

    cases["missing column"] = (write("missing.parquet", table.drop_columns(["crystal_a"])), [])
    cases["wrong type"] = (write("wrongtype.parquet", table.set_column(
        2, "crystal_b", table.column("crystal_b").cast(pa.float64()))), [])
    data = tiny_event_file.read_bytes()
    truncated = tmp_path / "truncated.parquet"
    truncated.write_bytes(data[: len(data) * 2 // 3])
    cases["truncated"] = (truncated, [])
    zero = tmp_path / "zero.parquet"
    zero.write_bytes(b"")
    cases["zero bytes"] = (zero, [])
    text = tmp_path / "text.parquet"
    text.write_text("time_ns,crystal_a,crystal_b\n1,2,3\n")
    cases["text file"] = (text, [])
    cases["nonexistent"] = (tmp_path / "nowhere.parquet", [])
    other = make_small_scanner(radius_mm=55.0)
    cases["geometry mismatch"] = (tiny_event_file, ["--scanner", write_scanner_toml(other, "other.toml")])
    # These two only fail when events are binned (inspect reports them instead).
    cases["schema-only empty"] = (write("empty.parquet", table.slice(0, 0)), [])
    n = 100
    cols = random_events(small_scanner, n, np.random.default_rng(1))
    cols["crystal_a"] = np.full(n, small_scanner.n_crystals + 5, np.int32)
    cases["crystal ids out of range"] = (write_event_file(cols, small_scanner, name="badids.parquet"), [])
    return cases


BINNING_ONLY = {"schema-only empty", "crystal ids out of range"}


@pytest.mark.parametrize("case", ["missing column", "wrong type", "truncated", "zero bytes", "text file",
                                  "nonexistent", "geometry mismatch", "schema-only empty",
                                  "crystal ids out of range"])
@pytest.mark.parametrize("command", ["sinogram", "inspect"])
def test_bad_input(capsys, tmp_path, bad_inputs, case, command):
    events, extra = bad_inputs[case]
    before = _digest(events)
    out = tmp_path / "out.h5"
    argv = [command, events, *extra] + (["-o", out] if command == "sinogram" else [])
    code, stdout, err = run(capsys, *argv)
    assert _digest(events) == before
    assert not out.exists()
    assert not [p for p in tmp_path.iterdir() if ".part" in p.name]
    if command == "inspect" and case in BINNING_ONLY:
        assert code == 0 and err.startswith("warning: ")
        return
    assert_one_error_line(code, err)
    if case != "nonexistent":
        assert events.name in err


def test_more_errors(capsys, tmp_path, tiny_event_file):
    before = _digest(tiny_event_file)
    out = tmp_path / "x.h5"
    for argv, match in (
        (["sinogram", tiny_event_file, "-o", tiny_event_file], "overwrite"),
        (["sinogram", tiny_event_file, "-o", out, "--frame", "5:20"], "--truncate"),
        (["sinogram", tiny_event_file, "-o", out, "--frame", "abc"], "START:END"),
        (["sinogram", tiny_event_file, "-o", out, "--frame", "3:1"], "after its start"),
        (["sinogram", tiny_event_file, "-o", out, "--rebin", "fancy"], "fancy"),
        (["sinogram", tiny_event_file], "--output"),
        (["sinogram", tiny_event_file, "-o", out, "--no-such-option"], "no-such-option"),
        (["sinogram", tiny_event_file, "-o", tmp_path / "missing_dir" / "x.h5"], "does not exist"),
        (["inspect", tiny_event_file, "--rate-bin", "-1"], "rate-bin"),
    ):
        code, _, err = run(capsys, *argv)
        assert_one_error_line(code, err)
        assert match in err, (argv, err)
    assert _digest(tiny_event_file) == before
    assert not out.exists()


def test_sinogram_writes_contract_file(capsys, tmp_path, tiny_event_file, small_scanner):
    out = tmp_path / "sino.h5"
    code, stdout, err = run(capsys, "sinogram", tiny_event_file, "-o", out, "--frame", "1:9", "--json")
    assert code == 0, err
    result = json.loads(stdout)
    assert result["outputs"] == [str(out)]
    acc = result["accounting"]
    assert acc["read"] == 2000
    assert acc["read"] == acc["prompts_binned"] + acc["delayed_binned"] + sum(
        v for k, v in acc.items() if k.startswith("rejected_"))
    assert set(result["timings_s"]) >= {"total", "bin"}
    f = read_sinogram_file(out)
    assert set(f.arrays) == {"prompts", "delayed"}
    assert f.arrays["prompts"].sum() == acc["prompts_binned"]
    assert f.arrays["delayed"].sum() == acc["delayed_binned"]
    assert f.frame_start_s == 1.0 and f.frame_duration_s == 8.0
    assert f.accounting.to_dict() == acc
    for key in ("view_angles_rad", "radial_positions_mm", "plane_z_mm", "plane_ring_difference", "scanner",
                "accounting", "frame_start_s", "frame_duration_s"):
        assert key in f.attrs
    assert f.attrs["isotope"] == "F-18"


def test_sinogram_ssrb_truncate_and_empty_frame(capsys, tmp_path, tiny_event_file, small_scanner):
    out = tmp_path / "ssrb.h5"
    code, stdout, err = run(capsys, "sinogram", tiny_event_file, "-o", out, "--rebin", "ssrb",
                            "--frame", "8:12", "--truncate")
    assert code == 0, err
    f = read_sinogram_file(out)
    assert f.arrays["prompts"].shape[0] == 2 * small_scanner.rings - 1
    assert (f.attrs["plane_ring_difference"] == 0).all()
    assert f.frame_start_s == 8.0 and f.frame_duration_s == pytest.approx(2.0)
    # A frame with no events: zeros and a warning, not an error.
    from twinray.event_writer import write_events
    from conftest import event_metadata
    cols = random_events(small_scanner, 100, np.random.default_rng(3), duration_s=2.0)
    sparse = write_events(tmp_path / "sparse.parquet", cols, event_metadata(small_scanner, duration_s=10.0))
    out2 = tmp_path / "empty_frame.h5"
    code, stdout, err = run(capsys, "sinogram", sparse, "-o", out2, "--frame", "5:6")
    assert code == 0 and err.startswith("warning: ") and "no events" in err
    assert read_sinogram_file(out2).arrays["prompts"].sum() == 0


def test_folder_summary_names_ignored_files(capsys, tmp_path, tiny_event_file):
    """Data contract section 2: in a folder only *.parquet is read; the rest is named in the summary."""
    folder = tmp_path / "study"
    folder.mkdir()
    (folder / "a.parquet").write_bytes(tiny_event_file.read_bytes())
    (folder / "notes.txt").write_text("x")
    (folder / ".a.parquet.tmp.part.parquet").write_text("half written")
    code, stdout, err = run(capsys, "sinogram", folder, "-o", tmp_path / "s.h5")
    assert code == 0, err
    assert "notes.txt" in stdout and ".a.parquet.tmp.part.parquet" in stdout
    code, stdout, err = run(capsys, "sinogram", folder, "-o", tmp_path / "s2.h5", "--json")
    assert json.loads(stdout)["ignored"] == [".a.parquet.tmp.part.parquet", "notes.txt"]
    code, stdout, err = run(capsys, "inspect", folder)
    assert code == 0 and "notes.txt" in stdout


def test_inspect_outputs(capsys, tiny_event_file):
    code, stdout, err = run(capsys, "inspect", tiny_event_file, "--rate-bin", "2")
    assert code == 0, err
    assert "crystal_a" in stdout and "int32" in stdout and "prompts" in stdout
    code, stdout, err = run(capsys, "inspect", tiny_event_file, "--json")
    assert code == 0
    info = json.loads(stdout)  # one JSON object
    assert info["counts"]["rows"] == 2000 and info["outputs"] == []


def test_console_script_no_traceback(tmp_path):
    """The real entry point in a fresh process: one error line, exit code 1."""
    proc = subprocess.run([sys.executable, "-m", "twinray.cli.main", "sinogram", str(tmp_path / "none.parquet"),
                           "-o", str(tmp_path / "x.h5")], capture_output=True, text=True, timeout=120)
    assert proc.returncode == 1
    assert proc.stderr.startswith("error: ") and len(proc.stderr.strip().splitlines()) == 1
