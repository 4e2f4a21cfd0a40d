"""Corrections of single-slice rebinned (``--rebin ssrb``) sinograms against 3-D ones and the analytic chord.

An SSRB plane holds every ring pair with the same axial mid-point
(Daube-Witherspoon & Muehllehner, J Nucl Med 28:1717, 1987), so its
detection efficiency is the sum of the efficiencies of those ring pairs and
its corrected value (an estimate of the line integral) is their average.
The corrected SSRB sinogram must therefore agree with the SSRB average of
the corrected 3-D sinogram of the same events, and, for a uniform water
cylinder, with the chord 2*sqrt(r^2 - s^2) (Kak & Slaney, Principles of
Computerized Tomographic Imaging, ch. 3).

The emission scan is simulated without Compton scatter (``[physics]
scatter = false``): the tail fit sees only the scatter that reaches the
tails, and the scatter it misses under the object is a separate, documented
limit (DEVELOPERS.md, Corrections), which these checks must not mix up with
the SSRB layout of norm and ACF.
"""

import numpy as np
import pytest

from twinray.corrections.apply import CorrectionOptions
from twinray.corrections.normalization import make_normalization
from twinray.simulate import load_phantom
from twinray.simulate.simulator import simulate
from twinray.sinogram import make_sinogram
from twinray.sinogram_io import read_sinogram_file

# The same 4-ring scanner and water-cylinder phantom template as the other simulated checks.
from test_corrections_simulated import PHANTOM, SCANNER  # noqa: E402

RADIUS = 30.0


@pytest.fixture(scope="module")
def scans(tmp_path_factory):
    tmp = tmp_path_factory.mktemp("ssrb")
    (tmp / "scanner.toml").write_text(SCANNER)
    (tmp / "norm.toml").write_text(PHANTOM.format(
        name="norm cylinder", duration=5.0, radius=50.0, activity=20000.0,
        extra='normalization_source = { shape = "cylinder", radius_mm = 50.0, mu_per_cm = 0.096 }'))
    (tmp / "scan.toml").write_text(PHANTOM.format(name="water cylinder", duration=2.0, radius=RADIUS,
                                                  activity=90000.0,
                                                  extra="[physics]\nscatter = false"))
    simulate(load_phantom(tmp / "norm.toml"), tmp / "norm.parquet", seed=21)
    simulate(load_phantom(tmp / "scan.toml"), tmp / "scan.parquet", seed=22)
    out = {}
    options = CorrectionOptions(randoms="delayed", scatter="tail-fit")
    for rebin in ("ssrb", "none"):
        make_normalization(tmp / "norm.parquet", tmp / f"norm_{rebin}.h5", rebin=rebin)
        res = make_sinogram(tmp / "scan.parquet", tmp / f"scan_{rebin}.h5", rebin=rebin, corrections=options,
                            norm=tmp / f"norm_{rebin}.h5", mu=tmp / "scan_truth_mu.nii.gz")
        out[rebin] = read_sinogram_file(res.output)
    return out


def _ssrb_of_3d(array, z3, z2, reduce):
    return np.stack([reduce(array[np.isclose(z3, z)], axis=0) for z in z2])


def test_ssrb_efficiency_is_the_sum_over_its_ring_pairs(scans):
    """1/norm of an SSRB plane = sum of 1/norm of the 3-D planes at its z (SSRB definition, DW & M 1987)."""
    s2, s3 = scans["ssrb"], scans["none"]
    z2, z3 = np.asarray(s2.geometry.plane_z_mm), np.asarray(s3.geometry.plane_z_mm)
    eff2 = 1.0 / np.asarray(s2.arrays["norm"], np.float64)
    n3 = np.asarray(s3.arrays["norm"], np.float64)
    eff3 = _ssrb_of_3d(np.where(n3 > 0, 1.0 / np.where(n3 > 0, n3, 1.0), 0.0), z3, z2, np.sum)
    np.testing.assert_allclose(eff2, eff3, rtol=1e-4)


def test_ssrb_corrected_cylinder_matches_3d_and_the_chord(scans):
    """Corrected SSRB profile vs the SSRB average of the corrected 3-D data and vs 2*sqrt(r^2 - s^2).

    Kak & Slaney ch. 3 (chord of a uniform disc). Both sinograms come from the
    same events, so their difference is not Poisson noise: within 1.5 % of the
    profile at every point inside the object. Against the chord (one scale
    factor, folded about s = 0): within 5 % at every point, and the centre
    (|s| < r/3) within 2.5 % of the outer part (r/2 < |s| < 0.85 r), the
    pattern that a centre bias of the image would leave in the projections.
    """
    s2, s3 = scans["ssrb"], scans["none"]
    z2, z3 = np.asarray(s2.geometry.plane_z_mm), np.asarray(s3.geometry.plane_z_mm)
    s = np.asarray(s2.geometry.radial_positions_mm)
    c2 = np.asarray(s2.arrays["corrected"], np.float64)
    c3 = _ssrb_of_3d(np.asarray(s3.arrays["corrected"], np.float64), z3, z2, np.mean)
    inside = np.abs(s) < 0.9 * RADIUS
    p2, p3 = c2.mean(axis=(0, 1)), c3.mean(axis=(0, 1))
    assert np.max(np.abs(p2[inside] / p3[inside] - 1)) < 0.015

    profile = 0.5 * (p2 + p2[::-1])
    analytic = 2 * np.sqrt(np.clip(RADIUS ** 2 - s ** 2, 0, None))
    k = profile[inside].sum() / analytic[inside].sum()
    ratio = profile / np.where(analytic > 0, k * analytic, 1.0)
    assert np.max(np.abs(ratio[inside] - 1)) < 0.05
    centre = np.abs(s) < RADIUS / 3
    outer = (np.abs(s) > RADIUS / 2) & (np.abs(s) < 0.85 * RADIUS)
    assert abs(ratio[centre].mean() / ratio[outer].mean() - 1) < 0.025
