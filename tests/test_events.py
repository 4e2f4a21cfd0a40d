"""Event reader: validation, folders, column projection, batches, statistics.

Outside sources: pyarrow's own reader (``pyarrow.parquet.read_table``) as the
reference for what is in a file; ``numpy.histogram`` as the reference count
rate; the data contract (section 2) for the validation rules.
"""

from __future__ import annotations

import dataclasses
import json

import numpy as np
import pyarrow as pa
import pyarrow.parquet as pq
import pytest

from conftest import event_metadata, make_small_scanner, random_events
from twinray.errors import TwinrayInputError
from twinray.events import (event_statistics, inspect_events, iter_event_batches, open_events, read_events,
                            time_range_ns)


def test_open_single_file(tiny_event_file, small_scanner):
    src = open_events(tiny_event_file)
    assert src.paths == (tiny_event_file,)
    assert src.num_rows == 2000
    assert src.columns == ("time_ns", "crystal_a", "crystal_b", "delayed", "energy_a_kev", "energy_b_kev")
    assert src.has_delayed and src.has_energy and not src.has_tof
    assert src.scanner == small_scanner
    assert src.duration_s == 10.0 and src.metadata["isotope"] == "F-18"


def test_read_events_equals_pyarrow(tiny_event_file):
    """Every column equals pyarrow's own read of the file."""
    table = pq.read_table(tiny_event_file)
    ours = read_events(tiny_event_file)
    for name in ours:
        np.testing.assert_array_equal(ours[name], table.column(name).to_numpy())
        assert ours[name].dtype == table.column(name).to_numpy().dtype


def test_folder_in_name_order_with_global_rows(write_event_file, small_scanner, rng, tmp_path):
    folder = tmp_path / "study"
    cols = random_events(small_scanner, 1000, rng)
    cuts = [0, 100, 450, 1000]
    # Written out of name order on purpose.
    for i in (2, 0, 1):
        part = {k: v[cuts[i]:cuts[i + 1]] for k, v in cols.items()}
        write_event_file(part, small_scanner, name=f"run{i}.parquet", folder=folder)
    (folder / "notes.txt").write_text("not events")
    (folder / "sub").mkdir()
    src = open_events(folder)
    assert [p.name for p in src.paths] == ["run0.parquet", "run1.parquet", "run2.parquet"]
    assert set(src.ignored) == {"notes.txt", "sub"}
    assert src.rows_per_file == (100, 350, 550)
    got = read_events(folder)
    np.testing.assert_array_equal(got["time_ns"], cols["time_ns"])
    # The global row index of each batch points at the right rows.
    for first, arrays in iter_event_batches(src, ["crystal_a"], batch_size=64):
        n = len(arrays["crystal_a"])
        np.testing.assert_array_equal(arrays["crystal_a"], cols["crystal_a"][first:first + n])


def test_column_projection_and_batch_sizes(tiny_event_file):
    batches = list(iter_event_batches(tiny_event_file, ["crystal_b", "delayed"], batch_size=333))
    assert [len(a["crystal_b"]) for _, a in batches] == [333] * 6 + [2]
    assert [first for first, _ in batches] == [333 * i for i in range(7)]
    for _, a in batches:
        assert set(a) == {"crystal_b", "delayed"}
        assert a["crystal_b"].dtype == np.int32 and a["crystal_b"].flags.c_contiguous
    with pytest.raises(TwinrayInputError, match="tof_ps"):
        iter_event_batches(tiny_event_file, ["tof_ps"])
    with pytest.raises(TwinrayInputError, match="batch size"):
        iter_event_batches(tiny_event_file, None, batch_size=0)


def test_prefetch_same_batches_and_early_stop(tiny_event_file):
    plain = list(iter_event_batches(tiny_event_file, ["time_ns"], batch_size=100))
    ahead = list(iter_event_batches(tiny_event_file, ["time_ns"], batch_size=100, prefetch=2))
    assert [f for f, _ in plain] == [f for f, _ in ahead]
    for (_, a), (_, b) in zip(plain, ahead):
        np.testing.assert_array_equal(a["time_ns"], b["time_ns"])
    it = iter_event_batches(tiny_event_file, ["time_ns"], batch_size=10, prefetch=1)
    next(it)
    it.close()  # must not hang with the producer blocked


def test_scanner_option_overrides_and_must_agree(tiny_event_file, small_scanner, write_scanner_toml):
    other = dataclasses.replace(small_scanner, span=3, max_ring_difference=2, energy_window_kev=(400.0, 600.0))
    src = open_events(tiny_event_file, scanner=write_scanner_toml(other))
    assert src.scanner.span == 3 and src.scanner.max_ring_difference == 2
    assert src.scanner.energy_window_kev == (400.0, 600.0)
    wrong = dataclasses.replace(small_scanner, radius_mm=small_scanner.radius_mm * (1 + 1e-5))
    with pytest.raises(TwinrayInputError, match="radius_mm"):
        open_events(tiny_event_file, scanner=wrong)
    close = dataclasses.replace(small_scanner, radius_mm=small_scanner.radius_mm * (1 + 1e-7))
    open_events(tiny_event_file, scanner=close)  # within the 1e-6 relative tolerance


def test_file_without_metadata_needs_scanner(write_event_file, small_scanner, rng):
    cols = random_events(small_scanner, 50, rng)
    path = write_event_file(cols, None, metadata=None)
    with pytest.raises(TwinrayInputError, match="--scanner"):
        open_events(path)
    src = open_events(path, scanner=small_scanner)
    assert src.metadata == {} and src.duration_s is None and src.num_rows == 50
    assert time_range_ns(src) == (int(cols["time_ns"].min()), int(cols["time_ns"].max()))


def _write_table(path, table):
    pq.write_table(table, path)
    return path


@pytest.mark.parametrize("change,match", [
    (lambda t: t.drop_columns(["crystal_b"]), "no column 'crystal_b'"),
    (lambda t: t.set_column(1, "crystal_a", t.column("crystal_a").cast(pa.int64())), "crystal_a.*int64.*int32"),
    (lambda t: t.set_column(0, "time_ns", t.column("time_ns").cast(pa.float64())), "time_ns.*double"),
    (lambda t: t.drop_columns(["energy_b_kev"]), "energy_a_kev"),
])
def test_schema_errors_name_file_and_column(tiny_event_file, tmp_path, change, match):
    table = change(pq.read_table(tiny_event_file))
    path = _write_table(tmp_path / "bad.parquet", table)
    with pytest.raises(TwinrayInputError, match=match) as err:
        open_events(path)
    assert "bad.parquet" in str(err.value)


def test_metadata_errors(tiny_event_file, tmp_path):
    table = pq.read_table(tiny_event_file)
    meta = json.loads(table.schema.metadata[b"twinray"])
    for bad, match in ((b"{not json", "not valid JSON"), (json.dumps({**meta, "schema_version": 2}).encode(),
                                                           "schema_version"),
                       (json.dumps({"schema_version": 1}).encode(), "no 'scanner'")):
        path = _write_table(tmp_path / "m.parquet", table.replace_schema_metadata({b"twinray": bad}))
        with pytest.raises(TwinrayInputError, match=match):
            open_events(path)


def test_nulls_are_refused(tmp_path, small_scanner):
    table = pa.table({"time_ns": pa.array([1, None], pa.int64()), "crystal_a": pa.array([0, 1], pa.int32()),
                      "crystal_b": pa.array([8, 9], pa.int32())})
    table = table.replace_schema_metadata({b"twinray": json.dumps(event_metadata(small_scanner)).encode()})
    path = _write_table(tmp_path / "nulls.parquet", table)
    with pytest.raises(TwinrayInputError, match="null"):
        read_events(path)


def test_folder_files_must_agree(write_event_file, small_scanner, rng, tmp_path):
    folder = tmp_path / "mixed"
    cols = random_events(small_scanner, 20, rng)
    write_event_file(cols, small_scanner, name="a.parquet", folder=folder)
    write_event_file({k: v for k, v in cols.items() if k != "delayed"}, small_scanner, name="b.parquet",
                     folder=folder)
    with pytest.raises(TwinrayInputError, match="same columns"):
        open_events(folder)
    folder2 = tmp_path / "geometries"
    write_event_file(cols, small_scanner, name="a.parquet", folder=folder2)
    write_event_file(cols, make_small_scanner(radius_mm=70.0), name="b.parquet", folder=folder2)
    with pytest.raises(TwinrayInputError, match="radius_mm"):
        open_events(folder2)
    empty = tmp_path / "empty_folder"
    empty.mkdir()
    with pytest.raises(TwinrayInputError, match="no \\*.parquet"):
        open_events(empty)


def test_statistics_match_numpy(write_event_file, small_scanner, rng):
    """Counts by kind and the count rate equal numpy.histogram over the same times."""
    cols = random_events(small_scanner, 5000, rng, energies=True, invalid_fraction=0.02, time_ordered=False)
    path = write_event_file(cols, small_scanner)
    stats = event_statistics(path, rate_bin_s=0.25, batch_size=700)
    d = cols["delayed"]
    assert stats.rows == 5000 and stats.delayed == int(d.sum()) and stats.prompts == int((~d).sum())
    edges = np.arange(0, 10.0 + 0.25, 0.25) * 1e9
    expected_p, _ = np.histogram(cols["time_ns"][~d], edges)
    expected_d, _ = np.histogram(cols["time_ns"][d], edges)
    np.testing.assert_array_equal(stats.prompts_per_bin, expected_p)
    np.testing.assert_array_equal(stats.delayed_per_bin, expected_d)
    n = small_scanner.n_crystals
    ca, cb = cols["crystal_a"], cols["crystal_b"]
    assert stats.invalid_crystal == int(((ca < 0) | (ca >= n) | (cb < 0) | (cb >= n)).sum())
    both = np.concatenate([cols["energy_a_kev"], cols["energy_b_kev"]]).astype(np.float64)
    assert stats.energy_kev["mean"] == pytest.approx(both.mean(), rel=1e-9)
    info = inspect_events(path, rate_bin_s=0.25)
    acc = info["accounting"]
    assert acc["read"] == acc["prompts_binned"] + acc["delayed_binned"] + acc["rejected_invalid_crystal"]
    assert [c["name"] for c in info["schema"]][:3] == ["time_ns", "crystal_a", "crystal_b"]
    json.dumps(info)  # JSON-ready


def test_default_rate_bin_covers_duration(tiny_event_file):
    stats = event_statistics(tiny_event_file)
    assert 10 <= len(stats.prompts_per_bin) <= 60
    assert len(stats.prompts_per_bin) * stats.rate_bin_s >= 10.0
    assert stats.prompts_per_bin.sum() + stats.delayed_per_bin.sum() == 2000
