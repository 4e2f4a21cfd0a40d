"""Tests of the Joseph projector pair (src/twinray/projectors.py)."""

import numpy as np
import pytest

from twinray.errors import TwinrayInputError
from twinray.geometry import sinogram_geometry
from twinray.projectors import (back_project, forward_project, image_grid, plane_geometry_2d,
                                projection_geometry)
from twinray.reconstruct.analytic import (SHEPP_LOGAN_MODIFIED, ellipse_image, ellipse_projections,
                                          scaled)
from twinray.scanner import scanner_from_dict

SMALL_SCANNER = {"name": "test ring", "rings": 4, "crystals_per_ring": 64, "radius_mm": 60.0,
                 "axial_pitch_mm": 3.0, "coincidence_window_ns": 6.0, "energy_window_kev": [425, 650],
                 "sinogram": {"radial_bins": 41, "max_ring_difference": 3, "span": 1}}


def _shepp_logan_setup(n=129, views=24):
    ellipses = scaled(SHEPP_LOGAN_MODIFIED, (n - 1) / 2 * 0.9)
    grid = image_grid(n, n, 1.0, [0.0])
    image = ellipse_image(ellipses, grid.x_mm(), grid.y_mm(), supersample=8)
    phi = np.deg2rad(np.arange(views) * 180.0 / views)
    s = np.arange(n) - (n - 1) / 2.0
    geom = plane_geometry_2d(phi, s, 1000.0, grid)
    return ellipses, image, phi, s, geom


def test_adjoint_2d():
    """<A x, y> = <x, A^T y> (definition of the adjoint) for random x, y in 2-D."""
    rng = np.random.default_rng(1)
    grid = image_grid(33, 31, 1.7, [0.0, 2.0, 4.0])
    phi = np.sort(rng.uniform(0, np.pi, 17))
    s = np.sort(rng.uniform(-25, 25, 23))
    geom = plane_geometry_2d(phi, s, 40.0, grid)
    x = rng.random(grid.shape)
    y = rng.random(geom.sinogram_shape)
    lhs = np.vdot(forward_project(x, geom), y)
    rhs = np.vdot(x, back_project(y, geom))
    assert lhs == pytest.approx(rhs, rel=1e-12)


def test_adjoint_3d_oblique_planes_and_subsets():
    """The adjoint identity on oblique planes of a real ring geometry, for a view subset too."""
    rng = np.random.default_rng(2)
    geo = sinogram_geometry(scanner_from_dict(SMALL_SCANNER))
    z_all = np.round(geo.plane_z_mm, 6)
    slices = np.unique(z_all)
    grid = image_grid(27, 27, 3.0, slices)
    ends = geo.axial_endpoints_mm()
    geom = projection_geometry(geo.view_angles_rad, geo.radial_positions_mm, geo.scanner.radius_mm,
                               ends[:, 0], ends[:, 1], grid)
    assert np.any(geom.dz_mm != 0)
    x = rng.random(grid.shape)
    for views in (None, np.arange(1, geo.views, 4)):
        n_views = geo.views if views is None else len(views)
        y = rng.random((geo.planes, n_views, geo.radial_bins))
        lhs = np.vdot(forward_project(x, geom, views=views), y)
        rhs = np.vdot(x, back_project(y, geom, views=views))
        assert lhs == pytest.approx(rhs, rel=1e-12)
    # float32 images give the same identity to float32 precision
    x32 = x.astype(np.float32)
    y32 = rng.random(geom.sinogram_shape).astype(np.float32)
    lhs = np.vdot(forward_project(x32, geom).astype(np.float64), y32)
    rhs = np.vdot(x32.astype(np.float64), back_project(y32, geom).astype(np.float64))
    assert lhs == pytest.approx(rhs, rel=1e-5)


def test_shepp_logan_projection_matches_analytic_ellipses():
    """Forward projection of the pixelized Shepp-Logan phantom vs the exact ellipse projections.

    Sources: Shepp & Logan (1974) ellipse table (references.md s.5) and the
    analytic projection of an ellipse, Kak & Slaney (1988) ch. 3. The pixel
    image differs from the ellipses on edges, so the check is a relative L1
    error of the whole sinogram (about 1% here, the same as scikit-image's
    radon of the same image).
    """
    ellipses, image, phi, s, geom = _shepp_logan_setup()
    ours = forward_project(image[None], geom)[0]
    exact = ellipse_projections(ellipses, phi, s)
    assert np.abs(ours - exact).sum() / np.abs(exact).sum() < 0.02
    # Line integrals of every view carry the same total (integral of the phantom, rho*pi*a*b summed).
    total = sum(rho * np.pi * a * b for rho, a, b, *_ in ellipses)
    np.testing.assert_allclose(ours.sum(axis=1), total, rtol=0.01)


def test_shepp_logan_projection_matches_skimage_radon():
    """Forward projection vs skimage.transform.radon (reference library) on the same image.

    scikit-image's theta = 0 integrates along image rows, with image row 0 at
    the top: our y axis points up, so its image is ours flipped in y
    (references.md s.5).
    """
    radon = pytest.importorskip("skimage.transform").radon
    _, image, phi, s, geom = _shepp_logan_setup()
    ours = forward_project(image[None], geom)[0]
    theirs = radon(image[::-1, :], theta=np.rad2deg(phi), circle=True).T
    assert theirs.shape == ours.shape
    assert np.abs(ours - theirs).sum() / np.abs(theirs).sum() < 0.01


def test_central_section_theorem():
    """1-D FT of a projection = profile of the image's 2-D FT at that angle (Kak & Slaney ch. 3).

    The image is a smooth off-centre Gaussian blob, so both transforms can be
    evaluated as plain sums at the same frequencies.
    """
    n, voxel = 65, 1.5
    grid = image_grid(n, n, voxel, [0.0])
    x, y = grid.x_mm()[None, :], grid.y_mm()[:, None]
    image = np.exp(-((x - 12.0) ** 2 + (y + 7.0) ** 2) / (2 * 6.0 ** 2))
    image += 0.5 * np.exp(-((x + 10.0) ** 2 + (y - 15.0) ** 2) / (2 * 4.0 ** 2))
    phi = np.deg2rad([0.0, 23.0, 61.0, 90.0, 137.0])
    s = (np.arange(161) - 80) * 0.5
    geom = plane_geometry_2d(phi, s, 500.0, grid)
    proj = forward_project(image[None], geom)[0]
    # Low frequencies (cycles/mm): linear interpolation damps higher ones by ~1% at 0.04.
    freqs = np.array([0.0, 0.005, 0.01, 0.02])
    for v, angle in enumerate(phi):
        p_ft = (proj[v][None, :] * np.exp(-2j * np.pi * freqs[:, None] * s[None, :])).sum(axis=1) * 0.5
        u, w = freqs * np.cos(angle), freqs * np.sin(angle)
        phase = np.exp(-2j * np.pi * (u[:, None, None] * x[None] + w[:, None, None] * y[None]))
        img_ft = (image[None] * phase).sum(axis=(1, 2)) * voxel ** 2
        np.testing.assert_allclose(p_ft, img_ft, rtol=2e-3, atol=2e-3 * abs(img_ft[0]))


def test_point_source_lands_on_its_sinusoid():
    """A point at (x0, y0) projects to s = x0 cos(phi) + y0 sin(phi) in every view (the file convention)."""
    geo = sinogram_geometry(scanner_from_dict(SMALL_SCANNER), rebin="ssrb")
    # Voxels as large as the radial spacing, so that every view sees the point.
    grid = image_grid(15, 15, 3.0, np.unique(np.round(geo.plane_z_mm, 6)))
    image = np.zeros(grid.shape)
    x0, y0 = 12.0, -9.0
    image[3, 7 + int(y0 / 3), 7 + int(x0 / 3)] = 1.0
    geom = plane_geometry_2d(geo.view_angles_rad, geo.radial_positions_mm, geo.scanner.radius_mm, grid)
    proj = forward_project(image, geom)
    assert np.all(proj[np.arange(geo.planes) != 3] == 0.0)
    s = geo.radial_positions_mm
    expected = x0 * np.cos(geo.view_angles_rad) + y0 * np.sin(geo.view_angles_rad)
    centroid = (proj[3] * s[None, :]).sum(axis=1) / proj[3].sum(axis=1)
    np.testing.assert_allclose(centroid, expected, atol=0.5)


def test_oblique_length_through_axially_uniform_image():
    """Through an image constant in z, an oblique LOR integrates sqrt(1 + (dz/L)^2) times the direct one.

    Plain 3-D geometry (the line's length per unit of transaxial length).
    """
    grid = image_grid(31, 31, 2.0, np.arange(-10, 11) * 2.0)
    rng = np.random.default_rng(5)
    slab = rng.random((31, 31))
    image = np.repeat(slab[None], grid.nz, axis=0)
    phi = np.deg2rad([10.0, 50.0, 100.0])
    s = np.array([-8.0, 0.0, 5.0])
    radius = 40.0
    geom = projection_geometry(phi, s, radius, [0.0, 8.0, -6.0], [0.0, -8.0, 6.0], grid)
    proj = forward_project(image, geom)
    half = np.sqrt(radius ** 2 - s ** 2)
    factor = np.sqrt(1.0 + (np.array([0.0, 16.0, -12.0])[:, None, None] / (2 * half[None, None, :])) ** 2)
    np.testing.assert_allclose(proj, proj[0][None] * factor, rtol=1e-10)


def test_bad_shapes_are_refused():
    grid = image_grid(8, 8, 1.0, [0.0])
    geom = plane_geometry_2d([0.0, 1.0], [-1.0, 0.0, 1.0], 10.0, grid)
    with pytest.raises(TwinrayInputError, match="shape"):
        forward_project(np.zeros((1, 9, 8)), geom)
    with pytest.raises(TwinrayInputError, match="view indices"):
        forward_project(np.zeros(grid.shape), geom, views=[5])
    with pytest.raises(TwinrayInputError, match="ring radius"):
        plane_geometry_2d([0.0], [-11.0, 11.0], 10.0, grid)
    with pytest.raises(TwinrayInputError, match="evenly spaced"):
        image_grid(4, 4, 1.0, [0.0, 1.0, 3.0])
