"""Scanner TOML loading and crystal placement (data contract, section 1)."""

import math
from pathlib import Path

import numpy as np
import pytest

from twinray.errors import TwinrayInputError
from twinray.scanner import check_same_geometry, load_scanner, merge_scanner_options, scanner_from_dict

CONFIGS = Path(__file__).resolve().parents[1] / "configs" / "scanners"

BASE = {
    "name": "t", "rings": 2, "crystals_per_ring": 8, "radius_mm": 50.0, "axial_pitch_mm": 4.0,
    "coincidence_window_ns": 4.0, "energy_window_kev": [400, 650],
}


@pytest.mark.parametrize("name", ["benchtop.toml", "wholebody.toml"])
def test_shipped_scanners_load(name):
    s = load_scanner(CONFIGS / name)
    assert s.crystals_per_ring % 2 == 0
    assert s.n_crystals == s.rings * s.crystals_per_ring


def test_wholebody_is_whole_body_sized():
    """Issue 2: about 24+ rings and 300-700 crystals per ring."""
    s = load_scanner(CONFIGS / "wholebody.toml")
    assert s.rings >= 24 and 300 <= s.crystals_per_ring <= 700


def test_crystal_numbering_follows_contract():
    """crystal = ring*N + j at angle offset + 2*pi*j/N, z = (ring - (rings-1)/2)*pitch."""
    s = scanner_from_dict({**BASE, "angle_offset_rad": 0.1})
    pos = s.crystal_positions_mm()
    ring, j = 1, 3
    c = ring * 8 + j
    theta = 0.1 + 2 * math.pi * j / 8
    np.testing.assert_allclose(pos[c], [50 * math.cos(theta), 50 * math.sin(theta), 2.0], atol=1e-12)
    assert pos[0, 2] < pos[8, 2]  # ring 0 has the most negative z


@pytest.mark.parametrize("change, words", [
    ({"crystals_per_ring": 7}, "crystals_per_ring"),
    ({"rings": 0}, "rings"),
    ({"radius_mm": -1.0}, "radius_mm"),
    ({"energy_window_kev": [600, 400]}, "energy_window_kev"),
    ({"colour": "blue"}, "unknown key"),
    ({"sinogram": {"span": 2}}, "span"),
    ({"sinogram": {"radial_bins": 6}}, "radial_bins"),
    ({"sinogram": {"max_ring_difference": 5}}, "max_ring_difference"),
])
def test_bad_scanner_tables_are_refused(change, words):
    with pytest.raises(TwinrayInputError, match=words):
        scanner_from_dict({**BASE, **change}, source="bad.toml")


def test_missing_key_named():
    d = dict(BASE)
    del d["radius_mm"]
    with pytest.raises(TwinrayInputError, match="radius_mm"):
        scanner_from_dict(d)


def test_not_toml(tmp_path):
    p = tmp_path / "s.toml"
    p.write_text("rings = [")
    with pytest.raises(TwinrayInputError, match="not valid TOML"):
        load_scanner(p)


def test_geometry_agreement_tolerance():
    """Relative tolerance 1e-6 on the crystal geometry (data contract, section 2)."""
    a = scanner_from_dict(BASE)
    check_same_geometry(a, scanner_from_dict({**BASE, "radius_mm": 50.0 * (1 + 1e-8)}), "x")
    with pytest.raises(TwinrayInputError, match="radius_mm"):
        check_same_geometry(a, scanner_from_dict({**BASE, "radius_mm": 50.1}), "x")


def test_given_scanner_overrides_sinogram_and_windows():
    embedded = scanner_from_dict(BASE)
    given = scanner_from_dict({**BASE, "energy_window_kev": [350, 700], "sinogram": {"span": 1, "radial_bins": 5}})
    merged = merge_scanner_options(embedded, given, "x")
    assert merged.energy_window_kev == (350.0, 700.0)
    assert merged.radial_bins == 5


def test_round_trip_through_dict():
    s = load_scanner(CONFIGS / "wholebody.toml")
    assert scanner_from_dict(s.to_dict()) == s
