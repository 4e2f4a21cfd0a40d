"""Tests of ordinary-Poisson OSEM / MLEM (src/twinray/reconstruct/osem.py, pipeline.py)."""

import numpy as np
import pytest

from twinray.errors import TwinrayInputError
from twinray.geometry import sinogram_geometry
from twinray.projectors import back_project, forward_project, image_grid, plane_geometry_2d
from twinray.reconstruct.osem import (expected_prompts, interleaved_subsets, osem,
                                      poisson_log_likelihood)
from twinray.reconstruct.pipeline import ReconOptions, reconstruct_arrays
from twinray.scanner import scanner_from_dict

RING = {"name": "test ring", "rings": 4, "crystals_per_ring": 64, "radius_mm": 60.0, "axial_pitch_mm": 4.0,
        "coincidence_window_ns": 6.0, "energy_window_kev": [425, 650],
        "sinogram": {"radial_bins": 41, "max_ring_difference": 3, "span": 1}}


@pytest.fixture(scope="module")
def small_problem():
    rng = np.random.default_rng(7)
    grid = image_grid(21, 21, 2.0, [0.0])
    phi = np.arange(24) * np.pi / 24
    s = (np.arange(31) - 15) * 1.4
    geom = plane_geometry_2d(phi, s, 40.0, grid)
    x, y = grid.x_mm()[None, :], grid.y_mm()[:, None]
    truth = ((x ** 2 + y ** 2) < 15 ** 2) * (1.0 + 3.0 * (((x - 5) ** 2 + y ** 2) < 4 ** 2))
    c = rng.uniform(0.5, 1.5, geom.sinogram_shape)
    b = np.full(geom.sinogram_shape, 0.5)
    mean = expected_prompts(truth[None], geom, c, b)
    prompts = rng.poisson(mean).astype(float)
    return geom, truth, c, b, prompts


def test_mlem_likelihood_never_decreases_and_image_stays_non_negative(small_problem):
    """EM theory: L(x) = sum y ln ybar - ybar is non-decreasing and x >= 0 (Shepp & Vardi 1982;
    Lange & Carson 1984; Dempster, Laird & Rubin 1977), with a fixed background b > 0."""
    geom, _, c, b, prompts = small_problem
    trace = []

    def record(it, m, x):
        assert np.all(x >= 0)
        trace.append(poisson_log_likelihood(prompts, expected_prompts(x, geom, c, b)))

    osem(prompts, geom, c, b, iterations=40, subsets=1, dtype=np.float64, callback=record)
    steps = np.diff(trace)
    assert np.all(steps >= -1e-9 * np.abs(trace[1:]))
    assert trace[-1] > trace[0]


def test_mlem_count_identity(small_problem):
    """sum_j s_j x_j^(k+1) = sum_i y_i over LORs that see the image, when b = 0 (references.md s.6, item 3)."""
    geom, _, c, _, prompts = small_problem
    sens = back_project(c, geom)
    seen = forward_project(np.ones(geom.grid.shape), geom) * c > 0
    for iterations in (1, 2, 5):
        x = osem(prompts, geom, c, None, iterations=iterations, subsets=1, dtype=np.float64)
        assert np.sum(sens * x) == pytest.approx(prompts[seen].sum(), rel=1e-10)


def test_noise_free_truth_is_a_fixed_point(small_problem):
    """Consistent data y = c*A x* + b make x* a fixed point of MLEM and OSEM (references.md s.6, item 4)."""
    geom, truth, c, b, _ = small_problem
    x_star = truth[None] + 0.2   # positive everywhere the sensitivity is
    y = expected_prompts(x_star, geom, c, b)
    for subsets in (1, 4):
        x = osem(y, geom, c, b, iterations=1, subsets=subsets, initial=x_star, dtype=np.float64)
        seen = back_project(c, geom) > 0
        np.testing.assert_allclose(x[seen], x_star[seen], rtol=1e-9)


def test_interleaved_subsets():
    subsets = interleaved_subsets(10, 3)
    assert [list(v) for v in subsets] == [[0, 3, 6, 9], [1, 4, 7], [2, 5, 8]]
    with pytest.raises(TwinrayInputError, match="subsets"):
        interleaved_subsets(10, 11)


def _ring_sinogram(ring=RING):
    geo = sinogram_geometry(scanner_from_dict(ring))
    ends_xy = geo.transaxial_endpoints_mm()          # (views, radial, end, xy)
    ends_z = geo.axial_endpoints_mm()                # (planes, end)
    p1 = np.empty(geo.shape + (3,))
    p2 = np.empty(geo.shape + (3,))
    p1[..., :2] = ends_xy[None, :, :, 0, :]
    p2[..., :2] = ends_xy[None, :, :, 1, :]
    p1[..., 2] = ends_z[:, 0][:, None, None]
    p2[..., 2] = ends_z[:, 1][:, None, None]
    return geo, p1, p2


def _sphere_chords(p1, p2, centre, radius):
    """Length of each segment p1-p2 inside a sphere (plane geometry: 2*sqrt(r^2 - d^2))."""
    d = p2 - p1
    length = np.linalg.norm(d, axis=-1)
    u = d / length[..., None]
    w = np.asarray(centre) - p1
    along = np.sum(w * u, axis=-1)
    dist2 = np.sum(w * w, axis=-1) - along ** 2
    return 2.0 * np.sqrt(np.clip(radius ** 2 - dist2, 0.0, None))


def _cylinder_chords(p1, p2, radius):
    """Length inside an axially infinite cylinder: transaxial chord times the 3-D stretch."""
    d = p2 - p1
    dxy = np.linalg.norm(d[..., :2], axis=-1)
    u = d[..., :2] / dxy[..., None]
    along = np.sum(-p1[..., :2] * u, axis=-1)
    dist2 = np.sum(p1[..., :2] ** 2, axis=-1) - along ** 2
    transaxial = 2.0 * np.sqrt(np.clip(radius ** 2 - dist2, 0.0, None))
    return transaxial * np.linalg.norm(d, axis=-1) / dxy


def test_point_source_reconstructs_at_its_position_in_mm():
    """A small sphere at (10, -6, 2) mm, analytic 3-D chords on oblique planes -> OSEM 3-D centroid."""
    geo, p1, p2 = _ring_sinogram()
    centre = np.array([10.0, -6.0, 2.0])
    chords = _sphere_chords(p1, p2, centre, 2.5)
    duration = 10.0
    arrays = {"prompts": chords * 50.0}
    result = reconstruct_arrays(arrays, geo, 0.0, duration, ReconOptions(method="osem", iterations=10, subsets=4))
    image, grid = result.image.astype(np.float64), result.grid
    z, y, x = np.meshgrid(grid.slice_z_mm, grid.y_mm(), grid.x_mm(), indexing="ij")
    hot = image > 0.3 * image.max()
    weights = image * hot
    found = np.array([(weights * a).sum() / weights.sum() for a in (x, y, z)])
    np.testing.assert_allclose(found, centre, atol=1.0)
    assert result.image.min() >= 0


def test_fbp_and_osem_agree_in_scale_and_recover_the_concentration():
    """Noise-free data of a uniform cylinder (analytic chords) with norm, acf, randoms and scatter.

    The data follow the model of units.py with a known concentration, so both
    methods must return it in a central region (FBP: Kak & Slaney ch. 3;
    OSEM: ordinary Poisson, Shepp & Vardi 1982) and agree with each other.
    """
    rng = np.random.default_rng(3)
    geo, p1, p2 = _ring_sinogram()
    chords = _cylinder_chords(p1, p2, 35.0)
    concentration, duration = 40.0, 30.0   # counts/s/mL, s
    k = geo.radial_positions_mm[21] - geo.radial_positions_mm[20]
    k = k * geo.scanner.axial_pitch_mm / 1000.0
    norm = rng.uniform(0.8, 1.25, geo.shape)
    acf = np.exp(0.0096 * chords)           # water, mu = 0.096 /cm (NIST XCOM) = 0.0096 /mm
    randoms = np.full(geo.shape, 2.0)
    scatter = 1.0 + 0.5 * np.cos(geo.radial_positions_mm / 40.0)[None, None, :]
    trues = duration * k * concentration * chords / (norm * acf)
    prompts = trues + randoms + scatter
    corrected = norm * acf * (prompts - randoms - scatter)
    arrays = {"prompts": prompts, "norm": norm, "acf": acf, "randoms": randoms, "scatter": scatter,
              "corrected": corrected}
    fbp_img = reconstruct_arrays(arrays, geo, 0.0, duration, ReconOptions(method="fbp"))
    osem3d = reconstruct_arrays(arrays, geo, 0.0, duration, ReconOptions(method="osem", iterations=6, subsets=4))
    osem2d = reconstruct_arrays(arrays, geo, 0.0, duration,
                                ReconOptions(method="osem", iterations=6, subsets=4, mode="2d"))
    grid = fbp_img.grid
    central = (grid.x_mm()[None, :] ** 2 + grid.y_mm()[:, None] ** 2) < 20.0 ** 2
    means = {}
    for name, res in (("fbp", fbp_img), ("osem3d", osem3d), ("osem2d", osem2d)):
        assert res.units == "counts/s/mL"
        means[name] = res.image[1:-1][:, central].mean()
        assert means[name] == pytest.approx(concentration, rel=0.01), name
    assert means["fbp"] == pytest.approx(means["osem3d"], rel=0.01)
    assert osem3d.sidecar["AttenuationCorrection"].startswith("measured")
    assert osem3d.sidecar["ReconMethodParameterValues"] == [6, 4]


def test_decay_factor_calibration_and_bad_input():
    geo, p1, p2 = _ring_sinogram()
    chords = _cylinder_chords(p1, p2, 30.0)
    arrays = {"prompts": chords}
    base = reconstruct_arrays(arrays, geo, 0.0, 5.0, ReconOptions(method="osem", iterations=1, subsets=2))
    scaled = reconstruct_arrays(arrays, geo, 0.0, 5.0,
                                ReconOptions(method="osem", iterations=1, subsets=2, calibration_bq_per_ml=3.0),
                                attrs={"decay_correction_factor": 1.5})
    np.testing.assert_allclose(scaled.image, base.image * 4.5, rtol=1e-5)
    assert scaled.sidecar["ImageDecayCorrected"] is True and scaled.units == "Bq/mL"
    assert base.sidecar["ImageDecayCorrected"] is False
    empty = reconstruct_arrays({"prompts": np.zeros(geo.shape)}, geo, 0.0, 5.0,
                               ReconOptions(method="osem", iterations=2, subsets=2))
    assert np.all(empty.image == 0) and any("no prompts" in w for w in empty.warnings)
    with pytest.raises(TwinrayInputError, match="corrected"):
        reconstruct_arrays({"prompts": chords, "norm": np.ones(geo.shape)}, geo, 0.0, 5.0, ReconOptions(method="fbp"))
    with pytest.raises(TwinrayInputError, match="duration"):
        reconstruct_arrays(arrays, geo, 0.0, 0.0, ReconOptions(method="osem"))
    with pytest.raises(TwinrayInputError, match="non-negative"):
        osem(-np.ones((1, 2, 3)), plane_geometry_2d([0.0, 1.0], [-1.0, 0.0, 1.0], 5.0, image_grid(3, 3, 1.0, [0.0])))
    with pytest.raises(TwinrayInputError, match="--method"):
        ReconOptions(method="art")
