"""Tests of `twinray calibrate` and the calibration library (src/twinray/reconstruct/calibration.py)."""

import json
import math

import numpy as np
import pytest

from twinray.cli.main import main
from twinray.errors import TwinrayInputError
from twinray.images import centred_affine, read_image, write_image
from twinray.reconstruct.calibration import derive_calibration, read_calibration

# F-18 half-life 109.77 min (NNDC/ENSDF via Ph. Eur., references.md s.2).
F18_HALF_LIFE_S = 109.77 * 60.0


def _cylinder_image(path, value=50.0, radius_mm=40.0, **sidecar):
    shape, voxel = (61, 61, 7), (2.0, 2.0, 2.0)
    affine = centred_affine(shape, voxel)
    x = (np.arange(61) - 30) * 2.0
    disc = (x[:, None] ** 2 + x[None, :] ** 2) <= radius_mm ** 2
    rng = np.random.default_rng(4)
    data = np.where(disc[:, :, None], value, 0.0) * (1 + 0.01 * rng.standard_normal(shape))
    data[:, :, 0] *= 0.5   # a noisy, low-sensitivity end slice that the region leaves out
    side = {"Units": "counts/s/mL", "FrameTimesStart": [600.0], "FrameDuration": [300.0],
            "ImageDecayCorrected": False, "TracerRadionuclide": "F-18",
            "twinray": {"acquisition_start": "2026-01-05T10:00:00+00:00"}}
    side.update(sidecar)
    write_image(path, data, affine, side)
    return path


def test_frame_average_decay_and_reference_time(tmp_path):
    """Expected image = C * exp(-lambda t0) * (1 - exp(-lambda dt)) / (lambda dt): mean activity over a
    frame (textbook decay law; references.md s.8), F-18 half-life from NNDC."""
    image = _cylinder_image(tmp_path / "cyl.nii.gz")
    lam = math.log(2) / F18_HALF_LIFE_S
    frame_mean = math.exp(-lam * 600.0) * (1 - math.exp(-lam * 300.0)) / (lam * 300.0)
    cal = derive_calibration(image, 5000.0)
    assert cal.roi_mean == pytest.approx(50.0, rel=2e-3)
    assert cal.expected_image_bq_per_ml == pytest.approx(5000.0 * frame_mean, rel=1e-4)
    assert cal.bq_per_ml_per_unit == pytest.approx(5000.0 * frame_mean / cal.roi_mean, rel=1e-9)
    assert cal.object_radius_mm == pytest.approx(40.0, rel=0.03)
    assert cal.roi_radius_mm == pytest.approx(0.6 * cal.object_radius_mm)
    assert cal.slices_used == (1, 2, 3, 4, 5)
    # Measured one hour before the acquisition start: one more hour of decay.
    earlier = derive_calibration(image, 5000.0, reference_time="2026-01-05T09:00:00Z")
    assert earlier.bq_per_ml_per_unit == pytest.approx(cal.bq_per_ml_per_unit * math.exp(-lam * 3600), rel=1e-6)


def test_decay_corrected_image_needs_no_frame_average(tmp_path):
    image = _cylinder_image(tmp_path / "dc.nii.gz", ImageDecayCorrected=True)
    cal = derive_calibration(image, 5000.0)
    assert cal.expected_image_bq_per_ml == 5000.0
    # Corrected to an injection 30 min before the acquisition start: the activity was higher then.
    to_injection = _cylinder_image(tmp_path / "inj.nii.gz", ImageDecayCorrected=True, ImageDecayCorrectionTime=-1800.0)
    lam = math.log(2) / F18_HALF_LIFE_S
    cal = derive_calibration(to_injection, 5000.0)
    assert cal.expected_image_bq_per_ml == pytest.approx(5000.0 * math.exp(lam * 1800.0), rel=1e-4)


def test_cli_round_trip_and_errors(tmp_path, capsys):
    image = _cylinder_image(tmp_path / "cyl.nii.gz")
    out = tmp_path / "cal.json"
    code = main(["calibrate", str(image), "-o", str(out), "--concentration", "5000", "--json"])
    captured = capsys.readouterr()
    assert code == 0, captured.err
    result = json.loads(captured.out)
    assert result["outputs"] == [str(out)]
    factor = read_calibration(out)
    assert factor == pytest.approx(result["calibration"]["bq_per_ml_per_unit"])
    # Applying the factor to the same image gives back the expected concentration in the region.
    data, _, _ = read_image(image)
    assert data[20:41, 20:41, 1:6].mean() * factor == pytest.approx(
        result["calibration"]["expected_image_bq_per_ml"], rel=0.01)

    calibrated = _cylinder_image(tmp_path / "bq.nii.gz", Units="Bq/mL")
    assert main(["calibrate", str(calibrated), "-o", str(tmp_path / "x.json"), "--concentration", "5"]) == 1
    assert "uncalibrated" in capsys.readouterr().err
    no_isotope = _cylinder_image(tmp_path / "noiso.nii.gz", TracerRadionuclide=None)
    assert main(["calibrate", str(no_isotope), "-o", str(tmp_path / "y.json"), "--concentration", "5"]) == 1
    assert "--isotope" in capsys.readouterr().err
    assert main(["calibrate", str(image), "-o", str(tmp_path / "z.json"), "--concentration", "5",
                 "--reference-time", "yesterday"]) == 1
    assert "ISO 8601" in capsys.readouterr().err
    assert main(["calibrate", str(image), "-o", str(image), "--concentration", "5"]) == 1
    assert "overwrite" in capsys.readouterr().err
    with pytest.raises(TwinrayInputError, match="positive"):
        derive_calibration(image, -1.0)
