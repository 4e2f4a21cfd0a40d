"""Tests of the exact voxel ray tracer (Siddon 1985)."""

import math

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st
from scipy import ndimage

from twinray.errors import TwinrayInputError
from twinray.raytrace import grid_from_affine, line_integrals, siddon_line_integral


def _grid(shape, voxel, origin):
    aff = np.diag([*voxel, 1.0])
    aff[:3, 3] = origin
    return aff


def _clip_length(p0, p1, lo, hi):
    """Length of the part of segment p0-p1 inside the box [lo, hi] (slab method, plane geometry)."""
    d = p1 - p0
    a0, a1 = 0.0, 1.0
    for k in range(3):
        if d[k] == 0:
            if not lo[k] <= p0[k] <= hi[k]:
                return 0.0
            continue
        with np.errstate(over="ignore"):     # a tiny direction gives +-inf: the slab is never left
            t0, t1 = sorted(((lo[k] - p0[k]) / d[k], (hi[k] - p0[k]) / d[k]))
        a0, a1 = max(a0, t0), min(a1, t1)
    return max(0.0, a1 - a0) * float(np.linalg.norm(d))


def test_axis_aligned_ray_sums_voxels():
    """A ray along x through voxel centres gives sum(values) * voxel size (definition of the integral)."""
    rng = np.random.default_rng(1)
    mu = rng.random((7, 5, 4))
    origin = np.array([-3.0, -2.0, 1.5]) * 2.0
    voxel = np.array([2.0, 2.0, 2.0])
    y = origin[1] + 3 * voxel[1]
    z = origin[2] + 2 * voxel[2]
    got = siddon_line_integral(mu, origin, voxel, -100.0, y, z, 100.0, y, z)
    assert got == pytest.approx(mu[:, 3, 2].sum() * 2.0, rel=1e-12)


@settings(max_examples=60, deadline=None)
@given(st.lists(st.floats(-30, 30), min_size=6, max_size=6))
def test_uniform_grid_length_is_clipped_segment_length(coords):
    """In a grid of ones the integral is the segment length inside the box (slab clipping, plane geometry)."""
    mu = np.ones((6, 5, 7), dtype=np.float32)
    voxel = np.array([3.0, 4.0, 2.5])
    origin = np.array([-7.5, -8.0, -7.5])
    lo = origin - voxel / 2
    hi = lo + np.array(mu.shape) * voxel
    p0, p1 = np.array(coords[:3]), np.array(coords[3:])
    got = siddon_line_integral(mu, origin, voxel, *p0, *p1)
    assert got == pytest.approx(_clip_length(p0, p1, lo, hi), rel=1e-9, abs=1e-9)


def test_random_values_match_dense_sampling_with_scipy():
    """Against scipy.ndimage.map_coordinates (order 0) sampled every 0.5 um along the ray (midpoint rule)."""
    rng = np.random.default_rng(7)
    mu = rng.random((9, 8, 6))
    voxel = np.array([2.0, 1.5, 3.0])
    origin = np.array([-8.0, -5.25, -7.5])
    aff = _grid(mu.shape, voxel, origin)
    starts = rng.uniform(-20, 20, size=(25, 3))
    ends = rng.uniform(-20, 20, size=(25, 3))
    got = line_integrals(mu, aff, starts, ends)
    n = 200_000
    for k in range(len(starts)):
        t = (np.arange(n) + 0.5) / n
        pts = starts[k][None, :] + t[:, None] * (ends[k] - starts[k])[None, :]
        idx = (pts - origin) / voxel
        # order 0 = value of the nearest voxel centre; points beyond the outer faces are masked
        # (scipy's "constant" mode would also drop the outer half voxels, so use "nearest").
        vals = ndimage.map_coordinates(mu, idx.T, order=0, mode="nearest")
        inside = np.all((idx > -0.5) & (idx < np.array(mu.shape) - 0.5), axis=1)
        ref = vals[inside].sum() * np.linalg.norm(ends[k] - starts[k]) / n
        assert got[k] == pytest.approx(ref, rel=2e-3, abs=2e-3)


def test_water_cylinder_chord_length():
    """Voxelized 20 cm water cylinder: integral -> mu*2*sqrt(r^2 - s^2) (chord length, plane geometry)."""
    voxel = 1.0
    n = 240
    c = (np.arange(n) - (n - 1) / 2) * voxel
    x, y = np.meshgrid(c, c, indexing="ij")
    # Fine sub-sampling of each voxel gives the partial-volume fraction.
    sub = (np.arange(8) + 0.5) / 8 - 0.5
    frac = np.zeros((n, n))
    for dx in sub:
        for dy in sub:
            frac += ((x + dx * voxel) ** 2 + (y + dy * voxel) ** 2 <= 100.0 ** 2)
    frac /= 64
    mu = np.repeat((0.096 * frac)[:, :, None], 3, axis=2)  # 1/cm, NIST XCOM water at 511 keV
    aff = _grid(mu.shape, (voxel,) * 3, (c[0], c[0], -1.0))
    for s in (0.5, 30.5, 70.5):
        got = line_integrals(mu, aff, [[-200, s, 0.3]], [[200, s, 0.3]])[0] / 10.0
        want = 0.096 * 2 * math.sqrt(100.0 ** 2 - s ** 2) / 10.0
        assert got == pytest.approx(want, rel=3e-3)
    assert math.exp(line_integrals(mu, aff, [[-200, 0.5, 0]], [[200, 0.5, 0]])[0] / 10) == pytest.approx(6.82, rel=5e-3)


def test_direction_and_flipped_affine_do_not_matter():
    rng = np.random.default_rng(3)
    mu = rng.random((5, 6, 7))
    aff = _grid(mu.shape, (2.0, 3.0, 1.0), (-4.0, -7.5, -3.0))
    a = np.array([[-9.0, -11.0, -4.0]])
    b = np.array([[8.0, 9.0, 5.0]])
    forward = line_integrals(mu, aff, a, b)
    backward = line_integrals(mu, aff, b, a)
    assert forward[0] == pytest.approx(backward[0], rel=1e-12)
    # The same grid described with a flipped x axis.
    flipped = aff.copy()
    flipped[0, 0] = -2.0
    flipped[0, 3] = -4.0 + 4 * 2.0
    assert line_integrals(mu[::-1], flipped, a, b)[0] == pytest.approx(forward[0], rel=1e-12)


def test_ray_on_voxel_boundary_and_missing_rays():
    mu = np.ones((4, 4, 4))
    origin = np.full(3, 0.5)
    voxel = np.ones(3)
    # Along a boundary plane of the grid: counted once (half-open voxels).
    assert siddon_line_integral(mu, origin, voxel, 1.0, 1.0, -3.0, 1.0, 1.0, 9.0) == pytest.approx(4.0)
    assert siddon_line_integral(mu, origin, voxel, 10.0, 0.5, 0.5, 20.0, 0.5, 0.5) == 0.0
    assert siddon_line_integral(mu, origin, voxel, 1.0, 1.0, 1.0, 1.0, 1.0, 1.0) == 0.0


def test_rotated_affine_is_refused():
    aff = np.eye(4)
    aff[0, 1] = 0.3
    with pytest.raises(TwinrayInputError, match="rotated"):
        grid_from_affine(np.zeros((2, 2, 2)), aff)
