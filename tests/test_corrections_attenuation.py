"""Attenuation correction factors by Siddon ray tracing of a mu-map."""

import math

import numpy as np
import pytest

from twinray.corrections.attenuation import attenuation_factors, attenuation_factors_from_file, check_mu_map
from twinray.errors import TwinrayInputError
from twinray.geometry import sinogram_geometry
from twinray.images import write_image

from test_corrections_common import small_scanner

MU_WATER = 0.096  # 1/cm at 511 keV, NIST XCOM / SRD 126 (references.md s.1)


def water_cylinder(radius_mm=100.0, voxel=1.0, n=220, nz=30, dz=2.0):
    """Uniform water cylinder along z, partial volumes from 4x4 sub-samples per voxel."""
    c = (np.arange(n) - (n - 1) / 2) * voxel
    x, y = np.meshgrid(c, c, indexing="ij")
    frac = np.zeros((n, n))
    sub = (np.arange(4) + 0.5) / 4 - 0.5
    for dx in sub:
        for dy in sub:
            frac += (x + dx * voxel) ** 2 + (y + dy * voxel) ** 2 <= radius_mm ** 2
    mu = np.repeat((MU_WATER * frac / 16)[:, :, None], nz, axis=2).astype(np.float32)
    aff = np.diag([voxel, voxel, dz, 1.0])
    aff[:3, 3] = [c[0], c[0], -(nz - 1) / 2 * dz]
    return mu, aff


@pytest.fixture(scope="module")
def cylinder_acf():
    g = sinogram_geometry(small_scanner(rings=4, crystals=192, radius=150.0, pitch=4.0))
    mu, aff = water_cylinder()
    return g, attenuation_factors(mu, aff, g), mu, aff


def test_central_lor_of_20cm_water_cylinder(cylinder_acf):
    """ACF of the central LOR = exp(0.096/cm * 20 cm) = 6.82 (NIST XCOM water at 511 keV)."""
    g, acf, _, _ = cylinder_acf
    mid = g.radial_bins // 2
    direct = g.plane_ring_difference == 0
    assert math.exp(MU_WATER * 20) == pytest.approx(6.82, abs=0.005)
    np.testing.assert_allclose(acf[direct][:, :, mid], 6.82, rtol=0.01)


def test_off_centre_and_oblique_lors_follow_chord_length(cylinder_acf):
    """ACF = exp(mu * 2*sqrt(r^2 - s^2) / cos(theta)) (chord length, plane geometry; theta = axial tilt)."""
    g, acf, _, _ = cylinder_acf
    s = g.radial_positions_mm
    R = g.scanner.radius_mm
    inside = np.abs(s) < 90.0  # away from the partial-volume edge
    chord_cm = 2 * np.sqrt(np.clip(100.0 ** 2 - s ** 2, 0, None)) / 10
    for p in range(g.planes):
        dz = g.plane_ring_difference[p] * g.scanner.axial_pitch_mm
        inv_cos = np.sqrt((2 * np.sqrt(R ** 2 - s ** 2)) ** 2 + dz ** 2) / (2 * np.sqrt(R ** 2 - s ** 2))
        want = MU_WATER * chord_cm * inv_cos
        # log(acf) to within 0.015 (about 1.5 mm of water: the staircase of the 1 mm voxel edge).
        np.testing.assert_allclose(np.log(acf[p][:, inside]),
                                   np.broadcast_to(want[inside], acf[p][:, inside].shape), atol=0.015)
    outside = np.abs(s) > 101.0
    assert np.all(acf[:, :, outside] == 1.0)


def test_from_file_matches_and_flipped_affine(tmp_path, cylinder_acf):
    g, acf, mu, aff = cylinder_acf
    path = tmp_path / "mu.nii.gz"
    write_image(path, mu, aff)
    np.testing.assert_allclose(attenuation_factors_from_file(path, g), acf, rtol=1e-5)
    flipped = aff.copy()
    flipped[1, 1] = -aff[1, 1]
    flipped[1, 3] = -aff[1, 3]
    write_image(tmp_path / "muf.nii", mu[:, ::-1], flipped)
    np.testing.assert_allclose(attenuation_factors_from_file(tmp_path / "muf.nii", g), acf, rtol=1e-5)


@pytest.mark.parametrize("values, message", [
    (np.array([-1000.0, 0.0, 40.0]), "Hounsfield"),
    (np.array([0.0, 0.0096, 0.0]), "1/mm"),
    (np.array([0.0, 9.6, 0.0]), "too high"),
    (np.array([0.0, -0.5, 0.1]), "negative"),
    (np.array([0.0, np.nan, 0.1]), "NaN"),
])
def test_unit_checks(values, message):
    mu = np.zeros((3, 3, 3), np.float32)
    mu[0, 0, :] = values
    with pytest.raises(TwinrayInputError, match=message):
        check_mu_map(mu, "mu.nii")


def test_map_outside_field_of_view_is_refused(tmp_path):
    g = sinogram_geometry(small_scanner())
    aff = np.eye(4)
    aff[:3, 3] = [5000.0, 0, 0]
    write_image(tmp_path / "far.nii", np.full((4, 4, 4), 0.096, np.float32), aff)
    with pytest.raises(TwinrayInputError, match="outside the scanner"):
        attenuation_factors_from_file(tmp_path / "far.nii", g)
