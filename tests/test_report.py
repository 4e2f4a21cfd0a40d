"""Tests of the HTML report: builder, figures, provenance and the per-command readers.

Outside references used here: Python's ``html.parser`` (HTML parsing), the
PNG signature of the PNG specification (W3C / ISO/IEC 15948, section 5.2),
matplotlib's PNG decoder, RFC 4648 base64 as implemented by Python's
``base64``, the SHA-256 test vector of FIPS 180-2 (appendix B.1), nibabel's
``apply_affine`` for voxel-to-mm coordinates, and the Poisson variance law
(variance = mean; any statistics textbook).
"""

from __future__ import annotations

import base64
import csv
import io
import json
import re
from html.parser import HTMLParser

import numpy as np
import pytest

from twinray.errors import TwinrayInputError
from twinray.report import Report, format_value, report_for_image, report_for_resample, report_for_sinogram
from twinray.report import figures as F
from twinray.report.builder import accounting_rows, png_data_uri
from twinray.report.per_command import report_for_dynamic, report_for_events, report_for_tac
from twinray.report.provenance import provenance, sha256_file
from twinray.report.sections import noise_series_from_summary, read_tac_csv

PNG_SIGNATURE = b"\x89PNG\r\n\x1a\n"  # PNG specification, section 5.2
VOID_TAGS = {"meta", "img", "br", "hr", "link", "input", "col"}


class _Collector(HTMLParser):
    """Collects images, headings and text, and checks that tags nest properly."""

    def __init__(self):
        super().__init__(convert_charrefs=True)
        self.stack, self.errors, self.images, self.headings, self.text = [], [], [], [], []
        self._in_heading = False

    def handle_starttag(self, tag, attrs):
        if tag == "img":
            self.images.append(dict(attrs))
        if tag not in VOID_TAGS:
            self.stack.append(tag)
        if tag in ("h1", "h2", "h3"):
            self._in_heading = True
            self.headings.append("")

    def handle_endtag(self, tag):
        if tag in VOID_TAGS:
            return
        if not self.stack or self.stack[-1] != tag:
            self.errors.append(f"unexpected </{tag}> with open {self.stack[-3:]}")
            return
        self.stack.pop()
        if tag in ("h1", "h2", "h3"):
            self._in_heading = False

    def handle_data(self, data):
        self.text.append(data)
        if self._in_heading:
            self.headings[-1] += data


def parse_report(html_text: str) -> _Collector:
    parser = _Collector()
    parser.feed(html_text)
    parser.close()
    assert not parser.errors, parser.errors
    assert parser.stack == [], f"unclosed tags {parser.stack}"
    return parser


def decode_images(parser: _Collector) -> list:
    """Every embedded image, decoded with matplotlib's PNG reader."""
    from matplotlib.image import imread

    arrays = []
    for img in parser.images:
        src = img["src"]
        assert src.startswith("data:image/png;base64,")
        raw = base64.b64decode("".join(src.split(",", 1)[1].split()), validate=True)
        assert raw[:8] == PNG_SIGNATURE
        arrays.append(imread(io.BytesIO(raw), format="png"))
    return arrays


def assert_clean(html_text: str) -> None:
    """No NaN of any case anywhere in the raw file (checkers grep for it)."""
    assert re.search("nan", html_text, flags=re.IGNORECASE) is None


# -- builder -------------------------------------------------------------------

def test_report_parses_images_decode_and_no_nan(tmp_path):
    rng = np.random.default_rng(1)
    rep = Report("Study of a banana-shaped phantom", "nan in a subtitle is hidden too")
    rep.heading("Numbers that failed")
    rep.key_values({"good": 1.25, "failed": float("nan"), "infinite": float("inf"), "name": "Nanjing"})
    rep.table(["a", "b"], [(1, float("nan")), ("NaN", 2.5)], caption="a table")
    rep.heading("A picture")
    rep.figure(F.count_rate_figure(5.0, rng.poisson(100, 12), rng.poisson(10, 12)), caption="rate")
    out = rep.write(tmp_path / "report.html")
    html_text = out.read_text()
    assert_clean(html_text)
    parser = parse_report(html_text)
    images = decode_images(parser)
    assert len(images) == 1 and images[0].ndim == 3 and images[0].shape[0] > 100
    text = "".join(parser.text)
    # Escaped letters come back as the plain text for a reader.
    assert "banana" in parser.headings[0] and "Nanjing" in text
    assert "n/a" in text
    assert [h for h in parser.headings[1:]] == ["Contents", "Numbers that failed", "A picture"]


def test_base64_guard_round_trips_data_that_encodes_to_nan():
    """Bytes whose base64 (RFC 4648) spells NaN: wrapped output has no NaN and decodes to the same bytes."""
    payload = PNG_SIGNATURE + base64.b64decode("NaNaNaNanaNA" * 40)
    uri = png_data_uri(payload)
    assert_clean(uri)
    assert base64.b64decode("".join(uri.split(",", 1)[1].split()), validate=True) == payload


def test_format_value_never_prints_nan():
    assert format_value(float("nan")) == "n/a"
    assert format_value(np.float32("inf")) == "n/a"
    assert format_value(1234567) == "1,234,567"
    assert format_value(np.int64(42)) == "42"
    assert format_value(0.123456) == "0.1235"
    assert format_value(89534.2) == "89,534"
    assert format_value(6000.0) == "6,000" and format_value(16000.0) == "16,000" and format_value(999.0) == "999"
    assert format_value(-2224.4) == "-2,224"
    assert format_value(3.2e-7) == "3.2e-07"
    assert format_value(True) == "yes"
    assert format_value([1, float("nan")]) == "1, n/a"


def test_accounting_rows_balance_and_order():
    """Rows follow data contract section 5; the balance is read minus binned minus rejected."""
    acc = {"read": 100, "prompts_binned": 70, "delayed_binned": 10, "rejected_energy_window": 15,
           "rejected_radial_fov": 5}
    rows, balance = accounting_rows(acc)
    assert [r[0] for r in rows][:3] == ["read", "prompts_binned", "delayed_binned"]
    assert balance == 0
    assert dict((r[0], r[2]) for r in rows)["rejected_energy_window"] == pytest.approx(15.0)
    _, off = accounting_rows({**acc, "read": 103})
    assert off == 3
    rep = Report("t")
    rep.heading("acc")
    rep.accounting({**acc, "read": 103})
    assert "do not balance" in "".join(parse_report(rep.to_html()).text)


def test_table_rejects_ragged_rows():
    with pytest.raises(ValueError):
        Report("t").table(["a", "b"], [(1,)])


def test_write_is_atomic_and_needs_existing_folder(tmp_path):
    rep = Report("t")
    with pytest.raises(TwinrayInputError):
        rep.write(tmp_path / "missing" / "report.html")
    target = tmp_path / "report.html"
    target.write_text("old")
    rep.write(target)
    assert target.read_text().startswith("<!DOCTYPE html>")
    assert [p.name for p in tmp_path.iterdir()] == ["report.html"]


# -- provenance -------------------------------------------------------------------

def test_sha256_matches_fips_180_2_vector(tmp_path):
    """FIPS 180-2, appendix B.1: SHA-256("abc")."""
    f = tmp_path / "abc.bin"
    f.write_bytes(b"abc")
    assert sha256_file(f) == "ba7816bf8f01cfea414140de5dae2223b00361a396177a9cb410ff61f20015ad"


def test_provenance_lists_folder_parquet_files_and_options(tmp_path):
    (tmp_path / "b.parquet").write_bytes(b"2")
    (tmp_path / "a.parquet").write_bytes(b"1")
    (tmp_path / "notes.txt").write_text("x")
    facts = provenance("twinray x", {"iterations": 4}, [tmp_path])
    assert [i["path"].rsplit("/", 1)[-1] for i in facts["inputs"]] == ["a.parquet", "b.parquet"]
    assert facts["options"] == {"iterations": 4}
    assert re.fullmatch(r"\d{4}-\d\d-\d\dT\d\d:\d\d:\d\dZ", facts["date (UTC)"])
    with pytest.raises(TwinrayInputError, match="does not exist"):
        provenance("x", {}, [tmp_path / "nope.parquet"])


# -- figures ---------------------------------------------------------------------

def test_axis_centres_agree_with_nibabel_apply_affine():
    """Voxel centres in mm, checked with nibabel.affines.apply_affine (reference library)."""
    from nibabel.affines import apply_affine

    affine = np.array([[-2.0, 0, 0, 40.0], [0, 1.5, 0, -30.0], [0, 0, 3.0, -12.0], [0, 0, 0, 1]])
    shape = (5, 7, 3)
    xs, ys, zs = F.axis_centres_mm(shape, affine)
    np.testing.assert_allclose(xs, apply_affine(affine, np.c_[np.arange(5), np.zeros(5), np.zeros(5)])[:, 0])
    np.testing.assert_allclose(ys, apply_affine(affine, np.c_[np.zeros(7), np.arange(7), np.zeros(7)])[:, 1])
    np.testing.assert_allclose(zs, apply_affine(affine, np.c_[np.zeros(3), np.zeros(3), np.arange(3)])[:, 2])
    rotated = affine.copy()
    rotated[0, 1] = 0.5
    with pytest.raises(TwinrayInputError, match="axis-aligned"):
        F.axis_centres_mm(shape, rotated)


def test_slices_have_mm_axes_and_cut_through_the_hot_spot():
    """A hot voxel at a known position: the three slices cut through it, extents are voxel edges in mm."""
    from nibabel.affines import apply_affine

    affine = np.array([[2.0, 0, 0, -31.0], [0, 2.0, 0, -31.0], [0, 0, -4.0, 18.0], [0, 0, 0, 1]])
    vol = np.zeros((32, 32, 10), np.float32)
    vol[20, 8, 3] = 10.0
    vol[0, 0, 0] = np.nan
    hot_mm = apply_affine(affine, [20, 8, 3])
    fig = F.slices_figure(vol, affine, units="Bq/mL")
    trans, cor, sag = fig.axes[:3]
    assert f"z = {hot_mm[2]:.1f} mm" in trans.get_title(loc="left")
    assert f"y = {hot_mm[1]:.1f} mm" in cor.get_title(loc="left")
    assert f"x = {hot_mm[0]:.1f} mm" in sag.get_title(loc="left")
    # Edges: first centre minus half a voxel to last centre plus half a voxel (z flipped to increase).
    assert trans.images[0].get_extent() == pytest.approx([-32.0, 32.0, -32.0, 32.0])
    z_centres = apply_affine(affine, np.c_[np.zeros(10), np.zeros(10), np.arange(10)])[:, 2]
    assert cor.images[0].get_extent()[2:] == pytest.approx([z_centres.min() - 2, z_centres.max() + 2])
    # The displayed transaxial slice has the hot voxel at (row y=8, column x=20), NaN shown as 0.
    shown = np.asarray(trans.images[0].get_array())
    assert np.unravel_index(np.argmax(shown), shown.shape) == (8, 20)
    assert np.all(np.isfinite(shown))
    assert "x (mm)" == trans.get_xlabel() and "z (mm)" == sag.get_ylabel()


def test_count_rate_figure_plots_counts_per_second():
    counts = np.array([100, 200, 50])
    fig = F.count_rate_figure(2.0, counts, np.array([10, 0, 5]))
    ax = fig.axes[0]
    steps = [p for p in ax.patches]
    values, edges, _ = steps[0].get_data()
    np.testing.assert_allclose(values, counts / 2.0)
    np.testing.assert_allclose(edges, [0, 2, 4, 6])
    assert "counts/s" in ax.get_ylabel() and "(s)" in ax.get_xlabel()
    assert steps[0].get_edgecolor()[:3] == pytest.approx((0.0, 114 / 255, 178 / 255))  # Okabe-Ito blue
    with pytest.raises(TwinrayInputError):
        F.count_rate_figure(0.0, counts)


def test_power_law_fit_recovers_poisson_slope():
    """Relative noise of Poisson counts falls as N**-0.5 (variance equals the mean)."""
    rng = np.random.default_rng(7)
    levels = np.array([200.0, 800.0, 3200.0, 12800.0, 51200.0])
    cov = np.array([rng.poisson(m, 4000).std(ddof=1) / m for m in levels])
    slope, prefactor = F.power_law_fit(levels, cov)
    assert slope == pytest.approx(-0.5, abs=0.03)
    assert prefactor == pytest.approx(1.0, rel=0.15)
    assert np.isnan(F.power_law_fit([1.0], [1.0])[0])


def test_display_range_ignores_non_finite_values():
    lo, hi = F.display_range(np.array([np.nan, 1.0, 2.0, np.inf]))
    assert (lo, hi) == (0.0, pytest.approx(2.0, rel=1e-2))
    assert F.display_range(np.full(4, np.nan)) == (0.0, 1.0)
    assert F.display_range(np.zeros(4)) == (0.0, 1.0)


# -- per-command readers on synthetic contract files ---------------------------------

def _write_sinogram(path, planes=3, views=12, radial=9):
    import h5py

    rng = np.random.default_rng(3)
    shape = (planes, views, radial)
    prompts = rng.poisson(40, shape).astype(np.float32)
    randoms = np.full(shape, 4.0, np.float32)
    scatter = np.full(shape, 2.0, np.float32)
    norm = rng.uniform(0.9, 1.1, shape).astype(np.float32)
    acf = np.exp(0.096 * np.linspace(0, 20, radial))[None, None, :].repeat(views, 1).repeat(planes, 0)
    with h5py.File(path, "w") as f:
        for name, arr in dict(prompts=prompts, randoms=randoms, scatter=scatter, norm=norm, acf=acf,
                              corrected=norm * acf * (prompts - randoms - scatter)).items():
            f.create_dataset(name, data=arr)
        f.attrs["view_angles_rad"] = np.pi * np.arange(views) / views
        f.attrs["radial_positions_mm"] = 100 * np.sin(np.pi * (np.arange(radial) - radial // 2) / 32)
        f.attrs["plane_z_mm"] = np.array([-4.0, 0.0, 4.0])[:planes]
        f.attrs["plane_ring_difference"] = np.zeros(planes, np.int32)
        f.attrs["frame_start_s"] = 0.0
        f.attrs["frame_duration_s"] = 60.0
        f.attrs["scanner"] = json.dumps({"name": "test ring", "rings": 2, "crystals_per_ring": 24})
        f.attrs["accounting"] = json.dumps({"read": 1000, "prompts_binned": 900, "delayed_binned": 50,
                                            "rejected_radial_fov": 50})
    return path


def _write_image(path, data, sidecar):
    import nibabel as nib

    affine = np.diag([2.0, 2.0, 3.0, 1.0])
    affine[:3, 3] = [-(data.shape[0] - 1), -(data.shape[1] - 1), -1.5 * (data.shape[2] - 1)]
    nib.save(nib.Nifti1Image(data.astype(np.float32), affine), str(path))
    stem = path.name[: -len(".nii.gz")]
    (path.parent / f"{stem}.json").write_text(json.dumps(sidecar))
    return path


def _phantom(n=24, nz=6):
    x, y, z = np.meshgrid(np.arange(n) - n / 2, np.arange(n) - n / 2, np.arange(nz), indexing="ij")
    return ((x ** 2 + y ** 2) < (n / 3) ** 2) * 5.0 + ((x - 3) ** 2 + y ** 2 < 4) * 10.0


def _check_report(path, headings):
    text = path.read_text()
    assert_clean(text)
    parser = parse_report(text)
    images = decode_images(parser)
    for h in headings:
        assert any(h in got for got in parser.headings), (h, parser.headings)
    assert any("Provenance" in h for h in parser.headings)
    return parser, images


def test_report_for_sinogram_from_contract_file(tmp_path):
    sino = _write_sinogram(tmp_path / "sino.h5")
    out = report_for_sinogram(sino, tmp_path / "report.html", command="twinray sinogram", options={"span": 1},
                              inputs=[sino])
    parser, images = _check_report(out, ["Sinogram: sino.h5"])
    assert len(images) == 2
    text = " ".join(parser.text)
    assert "rejected radial fov" in text and "The counts balance" in text
    assert sha256_file(sino) in text


def test_report_for_image_and_comparison(tmp_path):
    vol = _phantom()
    vol[0, 0, 0] = np.nan
    side = {"Units": "Bq/mL", "ReconMethodName": "OSEM", "twinray": {"accounting": {
        "read": 10, "prompts_binned": 10}}}
    osem = _write_image(tmp_path / "osem.nii.gz", vol, side)
    fbp = _write_image(tmp_path / "fbp.nii.gz", vol + 0.5, {"Units": "Bq/mL", "ReconMethodName": "FBP"})
    out = report_for_image(osem, tmp_path / "r.html", compare_with={"FBP": fbp}, inputs=[osem])
    parser, images = _check_report(out, ["Image: osem.nii.gz", "Images side by side"])
    assert len(images) == 2
    assert "non-finite voxels (shown as 0)" in " ".join(parser.text)


def test_report_for_dynamic_and_tacs(tmp_path):
    frames = np.stack([_phantom() * k for k in (1, 2, 3, 4)], axis=-1)
    _write_image(tmp_path / "dynamic.nii.gz", frames, {
        "Units": "Bq/mL", "FrameTimesStart": [0, 10, 20, 50], "FrameDuration": [10, 10, 30, 30],
        "DecayCorrectionFactor": [1.0, 1.001, 1.003, 1.006]})
    tac = tmp_path / "tac.csv"
    with open(tac, "w", newline="") as fh:
        w = csv.writer(fh)
        w.writerow(["region", "frame", "start_s", "duration_s", "mid_s", "mean", "std", "voxels"])
        for k, (s, d) in enumerate(((0, 10), (10, 10), (20, 30), (50, 30))):
            w.writerow(["hot", k, s, d, s + d / 2, 10.0 * (k + 1), 1.0, 12])
            w.writerow(["background", k, s, d, s + d / 2, 5.0 * (k + 1), "nan", 200])
    curves = read_tac_csv(tac)
    np.testing.assert_allclose(curves["hot"]["mid_s"], [5, 15, 35, 65])
    out = report_for_dynamic(tmp_path, tmp_path / "dyn.html", tac_path=tac)
    _, images = _check_report(out, ["Dynamic study: dynamic.nii.gz", "Time-activity curves: tac.csv"])
    assert len(images) == 2
    out2 = report_for_tac(tac, tmp_path / "tac.html", units="Bq/mL")
    _check_report(out2, ["Time-activity curves"])


def test_report_for_resample_finds_noise_against_counts(tmp_path):
    vol = _phantom()
    fractions = [0.1, 0.3, 1.0]
    for name, data in (("mean", vol), ("std", vol * 0.1), ("cov", (vol > 0) * 0.1)):
        _write_image(tmp_path / f"{name}.nii.gz", np.stack([data] * 3, axis=-1), {"Units": "Bq/mL"})
    levels = [{"fraction": f, "mean_prompts": 1e6 * f,
               "regions": {"background": {"mean": 5.0, "voxel_cov": 0.05 / np.sqrt(f),
                                          "roi_mean_cov": 0.01 / np.sqrt(f)}}} for f in fractions]
    summary = {"mode": "thin", "replicates": 5, "fractions": fractions, "levels": levels,
               "accounting": {"read": 10, "prompts_binned": 9, "rejected_no_lor": 1}}
    (tmp_path / "summary.json").write_text(json.dumps(summary))
    series = noise_series_from_summary(summary)
    np.testing.assert_allclose(series["background, voxel COV"][0], [1e5, 3e5, 1e6])
    np.testing.assert_allclose(series["background, regional-mean COV"][1], 0.01 / np.sqrt(fractions))
    levels[0]["regions"]["background"]["scan_voxel_cov"] = 0.3
    levels[1]["regions"]["background"]["scan_voxel_cov"] = 0.2
    scan = noise_series_from_summary(summary)
    np.testing.assert_allclose(scan["background, voxel COV (scan-equivalent)"][1], [0.3, 0.2])
    assert "background, voxel COV" not in scan  # one level left without scan_*: too few for a series
    out = report_for_resample(tmp_path, tmp_path / "noise.html")
    parser, images = _check_report(out, ["Noise study"])
    assert len(images) == 3  # mean, noise map, noise against counts
    assert "(fraction 1)" in " ".join(parser.text)


def test_noise_series_generic_records():
    summary = {"runs": [{"region": "a", "counts": 100, "cov": 0.1}, {"region": "a", "counts": 400, "cov": 0.05},
                        {"region": "b", "counts": 100, "std": 2.0}]}
    series = noise_series_from_summary(summary)
    assert list(series) == ["a"]
    np.testing.assert_allclose(series["a"][1], [0.1, 0.05])


def test_report_for_events_counts_and_rate(tmp_path):
    import pyarrow as pa
    import pyarrow.parquet as pq

    scanner = {"name": "tiny", "rings": 2, "crystals_per_ring": 16, "radius_mm": 50.0, "axial_pitch_mm": 4.0,
               "coincidence_window_ns": 4.0, "energy_window_kev": [425.0, 650.0]}
    n = 3000
    rng = np.random.default_rng(5)
    table = pa.table({
        "time_ns": pa.array(np.sort(rng.integers(0, 30_000_000_000, n)), pa.int64()),
        "crystal_a": pa.array(rng.integers(0, 16, n), pa.int32()),
        "crystal_b": pa.array(rng.integers(16, 32, n), pa.int32()),
        "delayed": pa.array(rng.random(n) < 0.1),
    })
    meta = {"schema_version": 1, "scanner": scanner, "isotope": "F-18", "acquisition_start": "2026-01-01T00:00:00Z",
            "duration_s": 30.0}
    table = table.replace_schema_metadata({b"twinray": json.dumps(meta).encode()})
    events = tmp_path / "events.parquet"
    pq.write_table(table, events)
    out = report_for_events(events, tmp_path / "ev.html", command="twinray inspect events.parquet")
    parser, images = _check_report(out, ["Events: events.parquet"])
    assert len(images) == 1
    assert f"{n:,}" in " ".join(parser.text)


def test_readers_refuse_bad_files_with_one_line(tmp_path):
    import h5py

    with h5py.File(tmp_path / "empty.h5", "w") as f:
        f.attrs["view_angles_rad"] = np.zeros(2)
    with pytest.raises(TwinrayInputError, match="no 'prompts' dataset"):
        report_for_sinogram(tmp_path / "empty.h5", tmp_path / "r.html")
    (tmp_path / "bad.csv").write_text("region,frame\nhot,0\n")
    with pytest.raises(TwinrayInputError, match="lacks column"):
        read_tac_csv(tmp_path / "bad.csv")
    (tmp_path / "text.h5").write_text("not hdf5")
    with pytest.raises(TwinrayInputError, match="not a readable HDF5"):
        report_for_sinogram(tmp_path / "text.h5", tmp_path / "r.html")
    with pytest.raises(TwinrayInputError, match="does not exist"):
        report_for_image(tmp_path / "none.nii.gz", tmp_path / "r.html")
    assert not (tmp_path / "r.html").exists()


def test_recovery_rows_on_different_grids(tmp_path):
    """Regional means on two grids: voxel membership checked with nibabel.affines.apply_affine."""
    import nibabel as nib
    from nibabel.affines import apply_affine

    from twinray.report.sections import recovery_rows

    truth = np.full((40, 40, 10), 100.0, np.float32)
    t_aff = np.diag([1.5, 1.5, 2.0, 1.0])
    t_aff[:3, 3] = [-29.25, -29.25, -9.0]
    nib.save(nib.Nifti1Image(truth, t_aff), str(tmp_path / "truth.nii.gz"))
    img = _write_image(tmp_path / "osem.nii.gz", np.full((24, 24, 6), 80.0), {"Units": "Bq/mL"})
    zero = _write_image(tmp_path / "zero.nii.gz", np.zeros((24, 24, 6)), {"Units": "Bq/mL"})
    rows = recovery_rows({"OSEM": img, "none": zero}, tmp_path / "truth.nii.gz", [("a", (4.0, -2.0, 0.0, 6.0))])
    name, true_mean, voxels, measured = rows[0]
    assert name == "a" and true_mean == pytest.approx(100.0)
    assert measured["OSEM"] == (pytest.approx(80.0), pytest.approx(0.8))
    assert measured["none"][1] == pytest.approx(0.0)
    aff = nib.load(str(img)).affine
    ijk = np.stack(np.meshgrid(*[np.arange(n) for n in (24, 24, 6)], indexing="ij"), -1).reshape(-1, 3)
    xyz = apply_affine(aff, ijk)
    assert voxels == int(np.sum(np.sum((xyz - [4.0, -2.0, 0.0]) ** 2, axis=1) <= 36.0))
    with pytest.raises(TwinrayInputError, match="no voxel"):
        recovery_rows({"OSEM": img}, tmp_path / "truth.nii.gz", [("far", (500.0, 0.0, 0.0, 1.0))])


def test_true_curves_from_simulation_truth_json(tmp_path):
    """Truth curves: concentration x the phantom's piecewise-linear multiplier (numpy.interp as reference)."""
    from twinray.report.sections import _frame_average, true_curves_from_simulation

    truth = {"duration_s": 100.0, "shapes": [
        {"name": "lesion", "activity_bq_per_ml": 4000.0, "tac": {"times_s": [0, 50, 100], "values": [0, 1, 0.5]}},
        {"name": "flat", "activity_bq_per_ml": 10.0},
        {"name": "unused", "activity_bq_per_ml": 1.0}]}
    (tmp_path / "t.json").write_text(json.dumps(truth))
    curves = true_curves_from_simulation(tmp_path / "t.json", ["lesion", "flat", "missing"])
    assert sorted(curves) == ["flat", "lesion"]
    t, v = curves["lesion"]
    assert v[np.searchsorted(t, 50.0)] == pytest.approx(4000.0)
    assert np.interp(75.0, t, v) == pytest.approx(3000.0)
    np.testing.assert_allclose(curves["flat"][1], 10.0)
    # Mean of a linear ramp 0 -> 4000 over [0, 50] s is 2000 (trapezoid).
    assert _frame_average(curves["lesion"], 0.0, 50.0) == pytest.approx(2000.0, rel=1e-3)
    with pytest.raises(TwinrayInputError, match="truth file"):
        true_curves_from_simulation(tmp_path / "nope.json", ["lesion"])


def test_report_option_and_write_report(tmp_path):
    """The shared --report option: absent -> nothing; given -> the report; never over an input."""
    import click
    from click.testing import CliRunner

    from twinray.cli._common import Run
    from twinray.cli._report import report_option, write_report

    sino = _write_sinogram(tmp_path / "sino.h5")

    @click.command()
    @report_option
    def cmd(report_path):
        outputs = write_report(Run(False, True, False), report_path, "report_for_sinogram", sino, inputs=[sino, None])
        click.echo(json.dumps(outputs))

    runner = CliRunner()
    assert json.loads(runner.invoke(cmd, []).output) == []
    res = runner.invoke(cmd, ["--report", str(tmp_path / "r.html")])
    assert json.loads(res.output) == [str(tmp_path / "r.html")]
    _check_report(tmp_path / "r.html", ["Sinogram: sino.h5"])
    res = runner.invoke(cmd, ["--report", str(sino)])
    assert isinstance(res.exception, TwinrayInputError) and "overwrite" in str(res.exception)
    assert "--report REPORT.html" in runner.invoke(cmd, ["--help"]).output


def test_slices_mask_greys_out_voxels_outside():
    affine = np.diag([2.0, 2.0, 2.0, 1.0])
    vol = np.full((10, 10, 4), 5.0)
    show = np.zeros(vol.shape, bool)
    show[2:8, 2:8, :] = True
    vol[~show] = 1e6  # would dominate the colour scale if not masked
    fig = F.slices_figure(vol, affine, units="COV", show=show)
    shown = fig.axes[0].images[0].get_array()
    assert np.ma.is_masked(shown) and shown.mask.sum() == 100 - 36
    assert fig.axes[0].images[0].get_clim()[1] < 10.0


def test_every_command_offers_report():
    """--report is an option of every command (demo writes its report anyway)."""
    from twinray.cli.main import COMMANDS, cli

    for name in sorted(set(COMMANDS) - {"demo"}):
        command = cli.get_command(None, name)
        assert any("--report" in p.opts for p in command.params), name


def test_tac_command_writes_its_report(tmp_path):
    """A real command with --report: the report is written, parses, and is listed in --json outputs."""
    import contextlib

    from twinray.cli.main import main

    frames = np.stack([_phantom() * k for k in (1, 2, 3)], axis=-1)
    image = _write_image(tmp_path / "dyn.nii.gz", frames, {"Units": "Bq/mL", "FrameTimesStart": [0, 10, 20],
                                                           "FrameDuration": [10, 10, 10]})
    out = io.StringIO()
    with contextlib.redirect_stdout(out):
        code = main(["tac", str(image), "-o", str(tmp_path / "tac.csv"), "--roi", "hot=sphere:6,0,3,3",
                     "--report", str(tmp_path / "tac.html"), "--json"])
    assert code == 0
    assert str(tmp_path / "tac.html") in json.loads(out.getvalue())["outputs"]
    _check_report(tmp_path / "tac.html", ["Time-activity curves: tac.csv"])


def test_report_for_calibration(tmp_path):
    from twinray.report import report_for_calibration

    image = _write_image(tmp_path / "cyl.nii.gz", _phantom(), {"Units": "counts/s/mL"})
    cal = tmp_path / "cal.json"
    cal.write_text(json.dumps({"bq_per_ml_per_unit": 11867.75, "roi_voxels": 2808, "reference_time": None}))
    parser, images = _check_report(report_for_calibration(cal, tmp_path / "cal.html", image_path=image,
                                                          inputs=[image]), ["Calibration: cal.json"])
    assert len(images) == 1 and "11,868" in " ".join(parser.text)
    (tmp_path / "bad.json").write_text("[1, 2")
    with pytest.raises(TwinrayInputError, match="not valid JSON"):
        report_for_calibration(tmp_path / "bad.json", tmp_path / "x.html")
