"""Tests of `twinray reconstruct` (src/twinray/cli/reconstruct.py) on small sinogram files."""

import json

import nibabel as nib
import numpy as np
import pytest

from twinray.accounting import Accounting
from twinray.cli.main import main
from twinray.geometry import sinogram_geometry
from twinray.images import voxel_centres_mm
from twinray.scanner import scanner_from_dict
from twinray.sinogram_io import write_sinogram_file

RING = {"name": "cli ring", "rings": 3, "crystals_per_ring": 64, "radius_mm": 60.0, "axial_pitch_mm": 4.0,
        "coincidence_window_ns": 6.0, "energy_window_kev": [425, 650],
        "sinogram": {"radial_bins": 41, "max_ring_difference": 2, "span": 1}}


def _cylinder_file(path, with_corrected=True, with_norm=True, **attrs):
    """Noise-free cylinder (radius 30 mm) data with norm, acf, randoms; chords by plane geometry."""
    geo = sinogram_geometry(scanner_from_dict(RING))
    s = geo.radial_positions_mm[None, None, :]
    half = np.sqrt(geo.scanner.radius_mm ** 2 - geo.radial_positions_mm ** 2)[None, None, :]
    stretch = np.sqrt(1 + (geo.plane_ring_difference[:, None, None] * 4.0 / (2 * half)) ** 2)
    chords = 2 * np.sqrt(np.clip(30.0 ** 2 - s ** 2, 0, None)) * stretch * np.ones(geo.shape)
    k = (geo.radial_positions_mm[21] - geo.radial_positions_mm[20]) * 4.0 / 1000
    norm = np.where(np.arange(geo.radial_bins) % 2 == 0, 0.9, 1.1) * np.ones(geo.shape)
    acf = np.exp(0.0096 * chords)
    randoms = np.full(geo.shape, 0.5)
    prompts = 20.0 * k * 100.0 * chords / (norm * acf) + randoms
    arrays = {"prompts": prompts, "randoms": randoms, "acf": acf}
    if with_norm:
        arrays["norm"] = norm
    if with_corrected:
        arrays["corrected"] = (norm if with_norm else 1.0) * acf * (prompts - randoms)
    acc = Accounting(read=1000, prompts_binned=990, rejected_energy_window=10)
    write_sinogram_file(path, arrays, geo, frame_start_s=5.0, frame_duration_s=20.0, accounting=acc,
                        attrs={"isotope": "F-18", **attrs})
    return path


@pytest.fixture(scope="module")
def sino_file(tmp_path_factory):
    return _cylinder_file(tmp_path_factory.mktemp("sino") / "cyl.h5")


def test_osem_writes_image_and_sidecar(sino_file, tmp_path, capsys):
    out = tmp_path / "osem.nii.gz"
    code = main(["reconstruct", str(sino_file), "-o", str(out), "--method", "osem", "--iterations", "3",
                 "--subsets", "4", "--json"])
    captured = capsys.readouterr()
    assert code == 0, captured.err
    result = json.loads(captured.out)
    assert result["outputs"] == [str(out), str(tmp_path / "osem.json")]
    assert result["accounting"]["read"] == 1000
    img = nib.load(str(out))
    assert img.header.get_data_dtype() == np.float32
    assert int(img.header["qform_code"]) == 1 and int(img.header["sform_code"]) == 1
    data = np.asarray(img.dataobj)
    x, y, z = voxel_centres_mm(data.shape, img.affine)
    np.testing.assert_allclose(z, [-4, -2, 0, 2, 4])          # slices at the rebinned planes' z
    assert abs(x[0] + x[-1]) < 1e-4 and abs(y[0] + y[-1]) < 1e-4   # centred (float32 header)
    central = (x[:, None] ** 2 + y[None, :] ** 2) < 20 ** 2
    assert data[:, :, 2][central].mean() == pytest.approx(100.0, rel=0.02)
    side = json.loads((tmp_path / "osem.json").read_text())
    for key in ("Units", "ReconMethodName", "ReconMethodParameterLabels", "ReconMethodParameterUnits",
                "ReconMethodParameterValues", "ReconFilterType", "ReconFilterSize", "AttenuationCorrection",
                "FrameTimesStart", "FrameDuration", "ImageDecayCorrected"):
        assert key in side
    assert side["Units"] == "counts/s/mL"
    assert side["FrameTimesStart"] == [5.0] and side["FrameDuration"] == [20.0]
    assert side["ImageDecayCorrected"] is False
    assert side["TracerRadionuclide"] == "F-18"
    assert side["twinray"]["accounting"]["rejected_energy_window"] == 10


def test_fbp_with_decay_factor_and_calibration(tmp_path, capsys):
    sino = _cylinder_file(tmp_path / "dcf.h5", decay_correction_factor=1.25)
    out = tmp_path / "fbp.nii"
    code = main(["reconstruct", str(sino), "-o", str(out), "--method", "fbp", "--filter", "hann", "--cutoff",
                 "0.9", "--calibration-factor", "2.0", "--matrix", "41", "-q"])
    assert code == 0, capsys.readouterr().err
    img = nib.load(str(out))
    data = np.asarray(img.dataobj)
    assert data.shape == (41, 41, 5)
    x, y, _ = voxel_centres_mm(data.shape, img.affine)
    central = (x[:, None] ** 2 + y[None, :] ** 2) < 20 ** 2
    assert data[:, :, 2][central].mean() == pytest.approx(100.0 * 1.25 * 2.0, rel=0.02)
    side = json.loads((tmp_path / "fbp.json").read_text())
    assert side["Units"] == "Bq/mL" and side["ImageDecayCorrected"] is True
    assert side["DecayCorrectionFactor"] == [1.25]
    assert side["ReconFilterType"] == "hann" and side["ReconMethodName"] == "FBP"


@pytest.mark.parametrize("args, message", [
    (["--method", "fbp", "--cutoff", "1.5"], "cutoff"),
    (["--method", "mart"], "mart"),
    (["--method", "osem", "--subsets", "1000"], "subsets"),
    (["--method", "osem", "--calibration-factor", "-2"], "calibration"),
])
def test_bad_options_give_one_error_line(sino_file, tmp_path, capsys, args, message):
    out = tmp_path / "bad.nii.gz"
    code = main(["reconstruct", str(sino_file), "-o", str(out)] + args)
    err = capsys.readouterr().err
    assert code != 0
    assert err.startswith("error:") and err.count("\n") == 1 and message in err
    assert "Traceback" not in err
    assert not out.exists()


def test_bad_inputs(tmp_path, capsys):
    missing = tmp_path / "nothere.h5"
    assert main(["reconstruct", str(missing), "-o", str(tmp_path / "a.nii"), "--method", "osem"]) == 1
    assert "does not exist" in capsys.readouterr().err
    no_corrected = _cylinder_file(tmp_path / "nocorr.h5", with_corrected=False)
    assert main(["reconstruct", str(no_corrected), "-o", str(tmp_path / "b.nii"), "--method", "fbp"]) == 1
    err = capsys.readouterr().err
    assert err.startswith("error:") and "corrected" in err
    before = no_corrected.read_bytes()
    assert main(["reconstruct", str(no_corrected), "-o", str(no_corrected), "--method", "osem"]) == 1
    assert "overwrite" in capsys.readouterr().err
    assert no_corrected.read_bytes() == before
    garbage = tmp_path / "garbage.h5"
    garbage.write_text("not hdf5")
    assert main(["reconstruct", str(garbage), "-o", str(tmp_path / "c.nii"), "--method", "osem"]) == 1
    assert "HDF5" in capsys.readouterr().err
    cal = tmp_path / "cal.json"
    cal.write_text("{}")
    sino = _cylinder_file(tmp_path / "ok.h5")
    assert main(["reconstruct", str(sino), "-o", str(tmp_path / "d.nii"), "--method", "osem",
                 "--calibration", str(cal)]) == 1
    assert "bq_per_ml_per_unit" in capsys.readouterr().err


# ---------------------------------------------------------------------------
# End to end on the shipped simulated study (simulated_events/, made by
# `twinray simulate`): normalize -> sinogram with every correction -> OSEM ->
# calibrate on the calibration cylinder -> calibrated images of the study.

EVENTS = __import__("pathlib").Path(__file__).resolve().parents[1] / "simulated_events"


@pytest.fixture(scope="module")
def study_images(tmp_path_factory):
    if not (EVENTS / "benchtop_inserts.parquet").is_file():
        pytest.skip("simulated_events/ is not in this checkout")
    out = tmp_path_factory.mktemp("e2e")
    corrections = ["--randoms", "delayed", "--scatter", "tail-fit", "-q"]
    osem = ["--method", "osem", "--iterations", "3", "--subsets", "8", "-q"]
    steps = [
        ["normalize", EVENTS / "normalization_cylinder.parquet", "-o", out / "norm.h5", "-q"],
        ["sinogram", EVENTS / "calibration_cylinder.parquet", "-o", out / "cal.h5", "--norm", out / "norm.h5",
         "--mu", EVENTS / "calibration_cylinder_truth_mu.nii.gz", *corrections],
        ["reconstruct", out / "cal.h5", "-o", out / "cal.nii.gz", *osem],
        # 20 kBq/mL at the acquisition start (configs/phantoms/calibration_cylinder.toml)
        ["calibrate", out / "cal.nii.gz", "-o", out / "cal.json", "--concentration", "20000", "-q"],
        ["sinogram", EVENTS / "benchtop_inserts.parquet", "-o", out / "study.h5", "--norm", out / "norm.h5",
         "--mu", EVENTS / "benchtop_inserts_truth_mu.nii.gz", *corrections],
        ["reconstruct", out / "study.h5", "-o", out / "osem.nii.gz", *osem, "--calibration", out / "cal.json"],
        ["reconstruct", out / "study.h5", "-o", out / "osem_pf.nii.gz", *osem, "--calibration", out / "cal.json",
         "--postfilter-mm", "4"],
        ["reconstruct", out / "study.h5", "-o", out / "fbp.nii.gz", "--method", "fbp", "-q",
         "--calibration", out / "cal.json"],
    ]
    for argv in steps:
        assert main([str(a) for a in argv]) == 0, argv
    images = {}
    for name in ("osem", "osem_pf", "fbp"):
        img = nib.load(str(out / f"{name}.nii.gz"))
        images[name] = (np.asarray(img.dataobj, dtype=np.float64), img.affine,
                        json.loads((out / f"{name}.json").read_text()))
    return images


def _coords(data, affine):
    x, y, z = voxel_centres_mm(data.shape, affine)
    return np.meshgrid(x, y, z, indexing="ij")


def test_end_to_end_uniform_background_in_bq_per_ml(study_images):
    """Water background of configs/phantoms/benchtop_inserts.toml: 25 kBq/mL at the acquisition start
    (the images are decay-corrected to it); the calibrated images must give it within 5%."""
    for name in ("osem", "fbp"):
        data, affine, side = study_images[name]
        assert side["Units"] == "Bq/mL" and side["ImageDecayCorrected"] is True
        X, Y, Z = _coords(data, affine)
        inserts = [(20, 0, 11), (0, 20, 8), (-20, 0, 11)]
        background = (np.abs(Z) <= 8) & (X ** 2 + Y ** 2 < 30 ** 2) & ~((X ** 2 + (Y + 20) ** 2) < 9 ** 2)
        for cx, cy, r in inserts:
            background &= (X - cx) ** 2 + (Y - cy) ** 2 + Z ** 2 > r ** 2
        assert data[background].mean() == pytest.approx(25000.0, rel=0.05), name


def test_end_to_end_hot_spheres_in_place_and_recovery_rises_with_size(study_images):
    """Hot spheres of 14 and 8 mm at (20, 0, 0) and (0, 20, 0) mm, 100 kBq/mL (the phantom file)."""
    data, affine, _ = study_images["osem"]
    X, Y, Z = _coords(data, affine)
    for cx, cy, search in ((20.0, 0.0, 9.0), (0.0, 20.0, 6.0)):
        near = (X - cx) ** 2 + (Y - cy) ** 2 + Z ** 2 <= search ** 2
        w = data * near
        centroid = [float((w * a).sum() / w.sum()) for a in (X, Y, Z)]
        np.testing.assert_allclose(centroid, [cx, cy, 0.0], atol=1.0)
    smooth, affine, side = study_images["osem_pf"]
    assert side["ReconFilterType"] == "Gaussian" and side["ReconFilterSize"] == 4.0
    recovery = {}
    for name, cx, cy, radius in (("14 mm", 20.0, 0.0, 7.0), ("8 mm", 0.0, 20.0, 4.0)):
        inside = (X - cx) ** 2 + (Y - cy) ** 2 + Z ** 2 <= (radius - 2.0) ** 2
        recovery[name] = smooth[inside].mean() / 100000.0
    assert 0.3 < recovery["8 mm"] < recovery["14 mm"] - 0.1
    assert recovery["14 mm"] < 1.1


def test_end_to_end_off_centre_point_source_in_mm(tmp_path):
    """A Na-22 bead at (25, -15, 4) mm, simulated (no positron range), binned 3-D and reconstructed by
    OSEM: its image centroid must be within half a voxel of the true position in every axis."""
    scanner = __import__("pathlib").Path(__file__).resolve().parents[1] / "configs" / "scanners" / "benchtop.toml"
    phantom = tmp_path / "bead.toml"
    phantom.write_text(f'''name = "off-centre bead"
isotope = "Na-22"
scanner = "{scanner}"
duration_s = 0.5
[physics]
positron_range = false
[[shape]]
name = "bead"
type = "sphere"
centre_mm = [25.0, -15.0, 4.0]
radius_mm = 0.25
activity_bq_per_ml = 5.653e9
mu_per_cm = 0.0
''')
    steps = [["simulate", phantom, "-o", tmp_path / "bead.parquet", "--seed", "2", "-q"],
             ["sinogram", tmp_path / "bead.parquet", "-o", tmp_path / "bead.h5", "-q"],
             ["reconstruct", tmp_path / "bead.h5", "-o", tmp_path / "bead.nii.gz", "--method", "osem",
              "--iterations", "3", "--subsets", "8", "-q"]]
    for argv in steps:
        assert main([str(a) for a in argv]) == 0, argv
    img = nib.load(str(tmp_path / "bead.nii.gz"))
    data = np.asarray(img.dataobj, dtype=np.float64)
    X, Y, Z = _coords(data, img.affine)
    weights = data * (data > 0.3 * data.max())
    centroid = np.array([(weights * a).sum() / weights.sum() for a in (X, Y, Z)])
    half_voxel = 0.5 * np.abs(np.diag(img.affine)[:3])
    assert np.all(np.abs(centroid - [25.0, -15.0, 4.0]) <= half_voxel + 1e-6), centroid
