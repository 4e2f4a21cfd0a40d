"""Time-activity curves (twinray.tac) and `twinray tac`."""

import csv
import json
import math

import numpy as np
import pytest

from twinray.errors import TwinrayInputError
from twinray.images import centred_affine, write_image
from twinray.tac import parse_region, region_mask, tac_from_image, time_activity_curves


def test_parse_region():
    r = parse_region("hot spot=sphere:20,-3.5,1e1,8")
    assert r.name == "hot spot" and r.centre_mm == (20.0, -3.5, 10.0) and r.radius_mm == 8.0
    for bad in ("hot", "hot=cube:1,2,3,4", "hot=sphere:1,2,3", "hot=sphere:1,2,3,-4", "hot=sphere:a,b,c,d",
                "=sphere:1,2,3,4", "hot=sphere:1,2,3,nan"):
        with pytest.raises(TwinrayInputError, match="region"):
            parse_region(bad)


def test_mask_membership_by_voxel_centre():
    """A voxel is in when its centre is within R; checked voxel by voxel against the distance formula."""
    shape = (9, 8, 5)
    affine = centred_affine(shape, (2.0, 2.0, 3.0))
    region = parse_region("a=sphere:1,-1,1.5,4.2")
    mask = region_mask(shape, affine, region)
    for i, j, k in np.ndindex(shape):
        x, y, z, _ = affine @ np.array([i, j, k, 1.0])
        inside = (x - 1) ** 2 + (y + 1) ** 2 + (z - 1.5) ** 2 <= 4.2 ** 2
        assert mask[i, j, k] == inside


def test_voxel_count_approaches_sphere_volume():
    """Voxel count * voxel volume -> 4/3 pi R^3 (volume of a ball, common practice) for small voxels."""
    shape = (64, 64, 64)
    affine = centred_affine(shape, 0.5)
    mask = region_mask(shape, affine, parse_region("b=sphere:0.1,0.2,-0.3,10"))
    assert mask.sum() * 0.125 == pytest.approx(4 / 3 * math.pi * 1000, rel=0.01)


def test_curves_of_a_known_dynamic_image():
    """Uniform spheres with known curves, plus a linear ramp: the mean of a linear function over a
    set symmetric about its centre is the value at the centre (symmetry), the std of a constant is 0."""
    shape = (21, 21, 11)
    affine = centred_affine(shape, 2.0)
    starts = np.array([0.0, 10.0, 20.0, 40.0])
    durations = np.array([10.0, 10.0, 20.0, 20.0])
    x, y, z = np.meshgrid(*(affine[k, k] * np.arange(shape[k]) + affine[k, 3] for k in range(3)), indexing="ij")
    curve = np.array([1.0, 4.0, 3.0, 2.0])
    image = np.zeros(shape + (4,))
    hot = parse_region("hot=sphere:10,0,0,5")
    image[region_mask(shape, affine, hot)] = curve
    ramp = 7.0 + 0.5 * x - 0.25 * y + 0.1 * z
    image += (x < -4)[..., None] * ramp[..., None] * np.arange(1, 5)
    cold = parse_region("ramp=sphere:-12,2,0,5")
    tacs = time_activity_curves(image, affine, starts, durations, [hot, cold], units="Bq/mL")
    np.testing.assert_allclose(tacs.mean[0], curve)
    np.testing.assert_allclose(tacs.std[0], 0.0, atol=1e-12)
    np.testing.assert_allclose(tacs.mean[1], (7.0 + 0.5 * -12 - 0.25 * 2) * np.arange(1, 5), rtol=1e-12)
    np.testing.assert_allclose(tacs.frame_mid_s, [5.0, 15.0, 30.0, 50.0])
    assert tacs.voxels[0] == region_mask(shape, affine, hot).sum()


def test_errors():
    shape = (5, 5, 5)
    affine = centred_affine(shape, 1.0)
    image = np.ones(shape + (2,))
    with pytest.raises(TwinrayInputError, match="no voxel centre"):
        time_activity_curves(image, affine, [0, 1], [1, 1], [parse_region("far=sphere:100,0,0,1")])
    with pytest.raises(TwinrayInputError, match="2 frames"):
        time_activity_curves(image, affine, [0], [1], [parse_region("a=sphere:0,0,0,1")])
    with pytest.raises(TwinrayInputError, match="unique"):
        time_activity_curves(image, affine, [0, 1], [1, 1], [parse_region("a=sphere:0,0,0,1")] * 2)


def _dynamic_image(tmp_path, with_sidecar=True):
    shape = (12, 12, 4)
    affine = centred_affine(shape, 3.0)
    rng = np.random.default_rng(1)
    image = rng.uniform(0, 1, shape + (3,)).astype(np.float32)
    sidecar = {"FrameTimesStart": [0, 30, 60], "FrameDuration": [30, 30, 60], "Units": "Bq/mL"}
    path = tmp_path / "dyn.nii.gz"
    write_image(path, image, affine, sidecar if with_sidecar else None)
    return path, image, affine


def test_files_round_trip(tmp_path):
    path, image, affine = _dynamic_image(tmp_path)
    out = tmp_path / "tac.csv"
    result = tac_from_image(path, ["a=sphere:0,0,0,7", "b=sphere:6,6,0,5"], out, tmp_path / "tac.png")
    rows = list(csv.DictReader(out.open()))
    assert list(rows[0]) == ["region", "frame", "start_s", "duration_s", "mid_s", "mean", "std", "voxels"]
    assert len(rows) == 6
    mask = region_mask(image.shape, affine, parse_region("a=sphere:0,0,0,7"))
    for k in range(3):
        row = rows[k]
        assert row["region"] == "a" and int(row["frame"]) == k
        assert float(row["mean"]) == pytest.approx(float(image[..., k][mask].astype(np.float64).mean()), rel=1e-6)
        assert float(row["std"]) == pytest.approx(float(image[..., k][mask].astype(np.float64).std()), rel=1e-6)
        assert int(row["voxels"]) == mask.sum()
    assert float(rows[2]["mid_s"]) == 90.0
    assert (tmp_path / "tac.png").read_bytes()[:8] == b"\x89PNG\r\n\x1a\n"
    assert len(result["outputs"]) == 2


def test_cli(tmp_path, capsys):
    from twinray.cli.main import main

    path, _, _ = _dynamic_image(tmp_path)
    out = tmp_path / "c.csv"
    assert main(["tac", str(path), "-o", str(out), "--roi", "a=sphere:0,0,0,7", "--json"]) == 0
    result = json.loads(capsys.readouterr().out)
    assert str(out) in result["outputs"] and (tmp_path / "c.png").exists()
    assert result["regions"] == {"a": int(result["regions"]["a"])}
    # bad region: one error line, no traceback
    assert main(["tac", str(path), "-o", str(out), "--roi", "a=box:1"]) != 0
    err = capsys.readouterr().err
    assert err.startswith("error:") and err.count("\n") == 1 and "Traceback" not in err
    # no sidecar with frame times
    nos = tmp_path / "nos"
    nos.mkdir()
    p2, _, _ = _dynamic_image(nos, with_sidecar=False)
    assert main(["tac", str(p2), "-o", str(tmp_path / "d.csv"), "--roi", "a=sphere:0,0,0,7"]) == 1
    assert "FrameTimesStart" in capsys.readouterr().err
    # never overwrite the input
    before = path.read_bytes()
    assert main(["tac", str(path), "-o", str(path), "--roi", "a=sphere:0,0,0,7"]) == 1
    assert path.read_bytes() == before
