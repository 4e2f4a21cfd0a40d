"""Tests of filtered back projection (src/twinray/reconstruct/fbp.py, filters.py, arc.py, rebin.py)."""

import numpy as np
import pytest

from twinray.errors import TwinrayInputError
from twinray.geometry import sinogram_geometry
from twinray.projectors import image_grid
from twinray.reconstruct.analytic import (SHEPP_LOGAN_MODIFIED, ellipse_image, ellipse_projections,
                                          scaled)
from twinray.reconstruct.arc import arc_correct
from twinray.reconstruct.fbp import fbp, fbp_uniform
from twinray.reconstruct.filters import FILTERS, frequency_response, ramp_kernel
from twinray.reconstruct.rebin import ssrb_average, ssrb_sum
from twinray.scanner import scanner_from_dict

N = 129


@pytest.fixture(scope="module")
def shepp_logan():
    """Analytic sinogram of the (modified) Shepp-Logan phantom and its pixel image."""
    ellipses = scaled(SHEPP_LOGAN_MODIFIED, (N - 1) / 2 * 0.95)
    grid = image_grid(N, N, 1.0, [0.0])
    phi = np.arange(180) * np.pi / 180
    s = np.arange(N) - (N - 1) / 2.0
    sino = ellipse_projections(ellipses, phi, s)
    truth = ellipse_image(ellipses, grid.x_mm(), grid.y_mm(), supersample=8)
    inside = grid.x_mm()[None, :] ** 2 + grid.y_mm()[:, None] ** 2 < ((N - 1) / 2) ** 2
    return sino, phi, s, grid, truth, inside


def test_ramp_kernel_dtft_is_abs_f():
    """DTFT of h(n tau) (Kak & Slaney eq. 3.61) equals |f| up to Nyquist (references.md s.5)."""
    tau = 1.0
    h = ramp_kernel(100_000, tau)
    n = np.arange(-100_000, 100_001)
    for f in (0.0, 0.1, 0.25, 0.4, 0.5):
        dtft = tau * np.sum(h * np.cos(2 * np.pi * f * n * tau))
        assert dtft == pytest.approx(f, abs=5e-6)
    # The exact kernel sums to zero (sum over odd n of 1/n^2 is pi^2/8), references.md s.5.
    assert tau * h.sum() == pytest.approx(0.0, abs=5e-6)


def test_finite_ramp_has_positive_dc_and_window_cutoff():
    """Built from the spatial kernel, the finite ramp has a small positive DC (references.md s.5)."""
    response = frequency_response(128, 2.0, "ramp")
    freq = np.fft.fftfreq(len(response), d=2.0)
    assert 0 < response[0] < 0.01 * np.abs(freq).max()
    np.testing.assert_allclose(response[5:100], np.abs(freq[5:100]), rtol=0.02)
    half = frequency_response(128, 2.0, "hann", cutoff=0.5)
    assert np.all(half[np.abs(freq) > 0.5 * 0.25 + 1e-12] == 0)
    with pytest.raises(TwinrayInputError, match="cutoff"):
        frequency_response(128, 2.0, "ramp", cutoff=1.5)
    with pytest.raises(TwinrayInputError, match="unknown filter"):
        frequency_response(128, 2.0, "butterworth")


@pytest.mark.parametrize("name", FILTERS)
def test_fbp_shepp_logan_no_worse_than_skimage(shepp_logan, name):
    """RMSE against the phantom no worse than skimage.transform.iradon with the same filter.

    Reference library: scikit-image. The sinogram is the exact projection of
    the Shepp & Logan (1974) ellipses (modified intensities, Toft 1996).
    Our y axis points up and scikit-image's image row 0 is at the top, so its
    image is flipped in y before the comparison.
    """
    iradon = pytest.importorskip("skimage.transform").iradon
    sino, phi, s, grid, truth, inside = shepp_logan
    ours = fbp_uniform(sino[None], phi, s[0], 1.0, grid, name)[0]
    theirs = iradon(sino.T, theta=np.rad2deg(phi), output_size=N, filter_name=name, circle=True)[::-1, :]
    rmse_ours = np.sqrt(np.mean((ours - truth)[inside] ** 2))
    rmse_theirs = np.sqrt(np.mean((theirs - truth)[inside] ** 2))
    assert rmse_ours <= rmse_theirs * (1 + 1e-6)
    # Same filter, same image: windows agree with scikit-image's (hamming/hann within ~0.01, s.5).
    assert np.max(np.abs(ours - theirs)[inside]) < 0.02


def test_fbp_uniform_disc_quantitation_and_cutoff():
    """A uniform disc of density 2 reconstructs to 2 in its centre (analytic chord 2*sqrt(r^2 - s^2))."""
    grid = image_grid(101, 101, 1.0, [0.0])
    phi = np.arange(128) * np.pi / 128
    s = np.arange(-60, 61) * 1.0
    sino = ellipse_projections([(2.0, 30.0, 30.0, 5.0, -3.0, 0.0)], phi, s)
    x, y = grid.x_mm()[None, :], grid.y_mm()[:, None]
    centre = (x - 5.0) ** 2 + (y + 3.0) ** 2 < 20.0 ** 2
    outside = (x - 5.0) ** 2 + (y + 3.0) ** 2 > 36.0 ** 2
    for name, cutoff in (("ramp", 1.0), ("hann", 0.5), ("shepp-logan", 0.8)):
        image = fbp_uniform(sino[None], phi, s[0], 1.0, grid, name, cutoff)[0]
        assert image[centre].mean() == pytest.approx(2.0, rel=0.01)
        assert abs(image[outside].mean()) < 0.02


def test_arc_correction_is_linear_interpolation():
    """Linear functions of s are interpolated exactly from R*sin(pi*m/N) positions."""
    n, radius = 128, 90.0
    m = np.arange(-35, 36)
    s = radius * np.sin(np.pi * m / n)
    data = np.stack([3.0 * s + 1.0, -s])[None]
    uniform, grid = arc_correct(data, s)
    assert grid[1] - grid[0] == pytest.approx(radius * np.sin(np.pi / n))
    assert grid[0] == pytest.approx(-grid[-1])
    np.testing.assert_allclose(uniform[0, 0], 3.0 * grid + 1.0, atol=1e-9)
    np.testing.assert_allclose(uniform[0, 1], -grid, atol=1e-9)


def test_ssrb_average_and_sum():
    z = np.array([0.0, 1.5, 1.5, 3.0, 1.5])
    data = np.arange(5, dtype=float)[:, None, None] * np.ones((5, 2, 3))
    avg, zu = ssrb_average(data, z)
    np.testing.assert_allclose(zu, [0.0, 1.5, 3.0])
    np.testing.assert_allclose(avg[:, 0, 0], [0.0, (1 + 2 + 4) / 3, 3.0])
    total, _ = ssrb_sum(data, z)
    np.testing.assert_allclose(total[:, 1, 2], [0.0, 7.0, 3.0])


def test_fbp_of_scanner_sinogram_with_oblique_planes():
    """Non-uniform radial positions, oblique planes (SSRB) and a point off centre, in mm.

    Data: analytic 3-D chords of a uniform cylinder plus a small hot rod
    (plane geometry), on a real ring geometry.
    """
    table = {"name": "t", "rings": 3, "crystals_per_ring": 96, "radius_mm": 80.0, "axial_pitch_mm": 4.0,
             "coincidence_window_ns": 6.0, "energy_window_kev": [425, 650],
             "sinogram": {"radial_bins": 61, "max_ring_difference": 2, "span": 1}}
    geo = sinogram_geometry(scanner_from_dict(table))
    ellipses = [(1.0, 40.0, 40.0, 0.0, 0.0, 0.0), (4.0, 3.0, 3.0, 20.0, 10.0, 0.0)]
    chords = ellipse_projections(ellipses, geo.view_angles_rad, geo.radial_positions_mm)
    sino = np.repeat(chords[None], geo.planes, axis=0)
    slices = np.unique(np.round(geo.plane_z_mm, 6))
    grid = image_grid(61, 61, 2.0, slices)
    image = fbp(sino, geo.view_angles_rad, geo.radial_positions_mm, geo.plane_z_mm, grid, "ramp")
    assert image.shape == (5, 61, 61)
    x, y = grid.x_mm()[None, :], grid.y_mm()[:, None]
    background = ((x ** 2 + y ** 2) < 30 ** 2) & (((x - 20) ** 2 + (y - 10) ** 2) > 8 ** 2)
    for k in range(5):
        assert image[k][background].mean() == pytest.approx(1.0, rel=0.02)
        j, i = np.unravel_index(np.argmax(image[k]), image[k].shape)
        assert abs(grid.x_mm()[i] - 20.0) <= 2.0 and abs(grid.y_mm()[j] - 10.0) <= 2.0


def test_fbp_needs_a_half_turn_of_views():
    grid = image_grid(11, 11, 1.0, [0.0])
    with pytest.raises(TwinrayInputError, match="180 degrees"):
        fbp_uniform(np.zeros((1, 4, 11)), np.linspace(0, np.pi, 4), -5.0, 1.0, grid)
