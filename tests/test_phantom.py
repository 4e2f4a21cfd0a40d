"""Phantom files: parsing, checks, rasterization, volumes."""

import math
from pathlib import Path

import numpy as np
import pytest

from twinray.errors import TwinrayInputError
from twinray.images import centred_affine
from twinray.scanner import load_scanner
from twinray.simulate import load_phantom, rasterize
from twinray.simulate.phantom import check_phantom_in_fov, visible_volumes_ml

ROOT = Path(__file__).resolve().parents[1]
PHANTOMS = sorted((ROOT / "configs" / "phantoms").glob("*.toml"))
BENCHTOP = ROOT / "configs" / "scanners" / "benchtop.toml"

BASE = f"""
name = "t"
isotope = "F-18"
scanner = "{BENCHTOP}"
duration_s = 1.0
"""

WATER = """
[[shape]]
name = "water"
type = "cylinder"
radius_mm = 40.0
length_mm = 24.0
activity_bq_per_ml = 1000.0
mu_per_cm = 0.096
"""


def write(tmp_path, text, name="p.toml"):
    path = tmp_path / name
    path.write_text(text)
    return path


@pytest.mark.parametrize("path", PHANTOMS, ids=[p.stem for p in PHANTOMS])
def test_shipped_phantoms_load_and_fit(path):
    phantom = load_phantom(path)
    assert phantom.scanner_path is not None and phantom.duration_s > 0
    check_phantom_in_fov(phantom, load_scanner(phantom.scanner_path))


def test_shipped_normalization_phantom_has_contract_source():
    """Data contract s.2: normalization_source {shape, radius_mm, mu_per_cm}."""
    phantom = load_phantom(ROOT / "configs" / "phantoms" / "normalization_cylinder.toml")
    assert phantom.normalization_source == {"shape": "cylinder", "radius_mm": 60.0, "mu_per_cm": 0.096}


def test_parse_shapes_and_tac(tmp_path):
    path = write(tmp_path, BASE + WATER + """
[[shape]]
name = "box"
type = "box"
size_mm = [10.0, 20.0, 4.0]
rotation_deg = 90.0
activity_bq_per_ml = 2.0
tac = { times_s = [0.0, 10.0], values = [0.0, 2.0] }
""")
    phantom = load_phantom(path)
    box = phantom.shapes[1]
    assert box.half_extents_mm == (5.0, 10.0, 2.0)
    assert box.rotation_rad == pytest.approx(math.pi / 2)
    assert box.tac([-1.0, 5.0, 20.0]).tolist() == [0.0, 1.0, 2.0]
    # rotated by 90 degrees: long side along x
    assert box.contains(np.array([9.0]), np.array([0.0]), np.array([0.0]))[0]
    assert not box.contains(np.array([0.0]), np.array([9.0]), np.array([0.0]))[0]


@pytest.mark.parametrize("text, pattern", [
    (BASE + "colour = 'blue'\n" + WATER, r"p\.toml: unknown key\(s\) colour"),
    (BASE + WATER.replace("mu_per_cm = 0.096", "mu_per_cm = 0.096\ndensity = 1.0"),
     r"shape\[0\]: unknown key\(s\) density"),
    (BASE + WATER.replace("1000.0", "-5.0"), r"shape\[0\]\.activity_bq_per_ml must be >= 0"),
    (BASE.replace("F-18", "Xy-7") + WATER, r"unknown isotope 'Xy-7' in .*p\.toml key 'isotope'"),
    (BASE + WATER.replace('"cylinder"', '"cone"'), r"shape\[0\]\.type must be one of"),
    (BASE + WATER.replace("length_mm = 24.0\n", ""), r"missing key 'length_mm'"),
    (BASE + WATER + "tac = { times_s = [1.0, 1.0], values = [1.0, 2.0] }\n", r"times_s must increase"),
    (BASE, r"the phantom is empty"),
    (BASE + "[physics]\nscatter = 'yes'\n" + WATER, r"\[physics\]\.scatter must be true or false"),
    (BASE + "[physics]\nmagic = 1\n" + WATER, r"\[physics\]: unknown key\(s\) magic"),
    ("isotope = 'F-18'\nduration_s = [\n", r"not valid TOML"),
])
def test_bad_phantoms_name_file_and_key(tmp_path, text, pattern):
    path = write(tmp_path, text)
    with pytest.raises(TwinrayInputError, match=pattern):
        load_phantom(path)


def test_shape_outside_field_of_view(tmp_path):
    scanner = load_scanner(BENCHTOP)
    far = load_phantom(write(tmp_path, BASE + WATER.replace("radius_mm = 40.0", "radius_mm = 95.0")))
    with pytest.raises(TwinrayInputError, match=r"shape\[0\] \(water\) is outside the field of view"):
        check_phantom_in_fov(far, scanner)
    beyond = load_phantom(write(tmp_path, BASE + WATER + "centre_mm = [0.0, 0.0, 40.0]\n"))
    with pytest.raises(TwinrayInputError, match=r"outside the field of view: z"):
        check_phantom_in_fov(beyond, scanner)


def test_visible_volume_cylinder_minus_sphere(tmp_path):
    """Volumes pi r^2 L and 4/3 pi r^3 (elementary geometry); replacement removes the sphere."""
    phantom = load_phantom(write(tmp_path, BASE + WATER + """
[[shape]]
type = "sphere"
radius_mm = 8.0
activity_bq_per_ml = 0.0
"""))
    volumes = visible_volumes_ml(phantom.shapes)
    cylinder = math.pi * 40.0 ** 2 * 24.0 / 1000.0
    sphere = 4.0 / 3.0 * math.pi * 8.0 ** 3 / 1000.0
    assert volumes[1] == pytest.approx(sphere, rel=1e-12)
    assert volumes[0] == pytest.approx(cylinder - sphere, rel=2e-3)


def test_rasterize_volume_and_replacement(tmp_path):
    """Partial-volume rasterization keeps the analytic volume pi r^2 L to 1 %."""
    phantom = load_phantom(write(tmp_path, BASE + WATER + """
[[shape]]
type = "sphere"
radius_mm = 8.0
activity_bq_per_ml = 0.0
mu_per_cm = 0.2
"""))
    shape = (45, 45, 15)
    affine = centred_affine(shape, 2.0)
    activity, mu = rasterize(phantom.shapes, shape, affine)
    voxel_ml = 8.0 / 1000.0
    expected = (math.pi * 40.0 ** 2 * 24.0 - 4.0 / 3.0 * math.pi * 8.0 ** 3) / 1000.0 * 1000.0
    assert activity.sum() * voxel_ml == pytest.approx(expected, rel=1e-2)
    assert activity[22, 22, 7] == 0.0 and mu[22, 22, 7] == pytest.approx(0.2)
    assert mu[22 + 15, 22, 7] == pytest.approx(0.096)
