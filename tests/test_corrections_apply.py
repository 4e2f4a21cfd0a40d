"""All corrections together, on a simulated uniform water cylinder.

Pair-level Poisson simulation (numpy, independent of the project's simulator):
trues n_ab = C eps_a eps_b g(dr, s) L_ab exp(-mu L_ab) with L_ab the chord of the
LOR through the cylinder, plus randoms r_a r_b and a smooth scatter. After
normalization (fitted from a simulated normalization scan), randoms
(delayed fan-sum), scatter (tail fit) and attenuation (ACF of a voxel mu-map)
the corrected sinogram must match the analytic projection of a uniform
cylinder, 2*sqrt(r^2 - s^2)/cos(theta) (Kak & Slaney ch. 3; plane geometry for
the axial tilt theta), within 5 % inside the object (|s| < 0.9 r): the
view-averaged profile of every plane, compared after scaling by one factor
for the whole sinogram (the absolute scale is the simulation's arbitrary
sensitivity). 2e7 trues keep the Poisson noise of a profile point near 1 %.
"""

import numpy as np
import pytest

from twinray.corrections import CorrectionInputs, CorrectionOptions, apply_corrections
from twinray.corrections.attenuation import attenuation_factors
from twinray.accounting import Accounting
from twinray.corrections.normalization import FanSums, NormalizationSource, fit_normalization
from twinray.decay import frame_decay_factor
from twinray.errors import TwinrayInputError
from twinray.geometry import sinogram_geometry
from twinray.isotopes import half_life_s

from test_corrections_common import all_pairs, sinogram_of, small_scanner

MU = 0.096  # water, 1/cm at 511 keV (NIST XCOM; references.md s.1)
R_OBJ = 35.0


def chord_mm(g, pairs, radius):
    s = g.radial_positions_mm[pairs["radial"]]
    R = g.scanner.radius_mm
    dz = (pairs["dr"] - (g.scanner.rings - 1)) * g.scanner.axial_pitch_mm
    inv_cos = np.sqrt(4 * (R ** 2 - s ** 2) + dz ** 2) / (2 * np.sqrt(R ** 2 - s ** 2))
    return 2 * np.sqrt(np.clip(radius ** 2 - s ** 2, 0, None)) * inv_cos


def mu_map():
    n, v, nz = 100, 1.0, 12
    c = (np.arange(n) - (n - 1) / 2) * v
    x, y = np.meshgrid(c, c, indexing="ij")
    frac = np.zeros((n, n))
    sub = (np.arange(4) + 0.5) / 4 - 0.5
    for dx in sub:
        for dy in sub:
            frac += (x + dx) ** 2 + (y + dy) ** 2 <= R_OBJ ** 2
    mu = np.repeat((MU * frac / 16)[:, :, None], nz, axis=2)
    aff = np.diag([v, v, 4.0, 1.0])
    aff[:3, 3] = [c[0], c[0], -(nz - 1) / 2 * 4.0]
    return mu, aff


@pytest.fixture(scope="module")
def study():
    g = sinogram_geometry(small_scanner(rings=4, crystals=128, radius=90.0, radial_bins=71))
    rng = np.random.default_rng(42)
    pairs = all_pairs(g)
    eps = rng.gamma(40.0, 1 / 40.0, g.scanner.n_crystals)
    s_norm = g.radial_positions_mm / g.scanner.radius_mm
    geo = (1 - 0.25 * s_norm ** 2)[None, :] * (1 - 0.03 * np.abs(np.arange(7) - 3))[:, None]
    det = eps[pairs["a"]] * eps[pairs["b"]] * geo[pairs["dr"], pairs["radial"]]

    # Normalization scan: a uniform cylinder of radius 60 mm, water.
    src = NormalizationSource("cylinder", 60.0, MU)
    L = chord_mm(g, pairs, 60.0)
    lam_norm = det * L * np.exp(-MU / 10 * L)
    lam_norm *= 2e7 / lam_norm.sum()
    # Fan sums straight from the pair counts (the event path is tested in test_corrections_normalization).
    counts = rng.poisson(lam_norm)
    n_crystals = g.scanner.n_crystals
    table = np.bincount(pairs["dr"] * g.radial_bins + pairs["radial"], counts, 7 * g.radial_bins)
    fan = FanSums(np.bincount(pairs["a"], counts, n_crystals) + np.bincount(pairs["b"], counts, n_crystals),
                  np.zeros(n_crystals, np.int64), table.reshape(7, g.radial_bins).astype(np.int64),
                  np.zeros((7, g.radial_bins), np.int64), Accounting(read=int(counts.sum())))
    fit = fit_normalization(fan, g, src)

    # Emission scan of the water cylinder.
    L = chord_mm(g, pairs, R_OBJ)
    trues = det * L * np.exp(-MU / 10 * L)
    trues *= 2e7 / trues.sum()
    s = g.radial_positions_mm[pairs["radial"]]
    scatter = det * np.exp(-0.5 * (s / 40.0) ** 2)
    scatter *= 0.25 * 2e7 / scatter.sum()
    singles = rng.uniform(0.7, 1.3, g.scanner.n_crystals)
    rnd = singles[pairs["a"]] * singles[pairs["b"]]
    rnd *= 0.3 * 2e7 / rnd.sum()
    prompts = sinogram_of(pairs, rng.poisson(trues + scatter + rnd).astype(float), g)
    delayed = sinogram_of(pairs, rng.poisson(rnd).astype(float), g)
    mu, aff = mu_map()
    acf = attenuation_factors(mu, aff, g)
    return g, fit, prompts, delayed, acf, sinogram_of(pairs, rnd, g)


def test_corrected_cylinder_matches_analytic_projection(study):
    g, fit, prompts, delayed, acf, _ = study
    options = CorrectionOptions(randoms="delayed", scatter="tail-fit")
    out = apply_corrections(prompts, delayed, g, options, CorrectionInputs(norm=fit.norm, acf=acf),
                            frame_start_s=0.0, frame_duration_s=600.0, isotope="F-18")
    d = out.datasets
    assert set(d) == {"randoms", "scatter", "norm", "acf", "corrected"}
    np.testing.assert_allclose(d["corrected"], d["norm"] * d["acf"] * (prompts - d["randoms"] - d["scatter"]),
                               rtol=1e-4, atol=1e-3)
    s = g.radial_positions_mm
    R = g.scanner.radius_mm
    inside = np.abs(s) < 0.9 * R_OBJ
    profiles = d["corrected"].mean(axis=1)  # (plane, radial), averaged over views
    dz = g.plane_ring_difference[:, None] * g.scanner.axial_pitch_mm
    inv_cos = np.sqrt(4 * (R ** 2 - s ** 2) + dz ** 2) / (2 * np.sqrt(R ** 2 - s ** 2))
    analytic = 2 * np.sqrt(np.clip(R_OBJ ** 2 - s ** 2, 0, None))[None, :] * inv_cos
    scale = profiles[:, inside].sum() / analytic[:, inside].sum()
    ratio = profiles[:, inside] / (scale * analytic[:, inside])
    assert np.max(np.abs(ratio - 1)) < 0.05
    # Outside the object nothing is left after the corrections; without scatter correction the
    # tails keep their scatter (so the check can tell the difference).
    outside = np.abs(s) > R_OBJ + 8.0
    centre = profiles[:, g.radial_bins // 2].mean()
    plain = apply_corrections(prompts, delayed, g, CorrectionOptions(randoms="delayed"),
                              CorrectionInputs(norm=fit.norm, acf=acf)).datasets["corrected"].mean(axis=1)
    assert plain[:, outside].mean() > 0.02 * centre
    assert abs(profiles[:, outside].mean()) < 0.1 * plain[:, outside].mean()


def test_attributes_decay_factor_and_fractions(study):
    g, fit, prompts, delayed, acf, rnd_truth = study
    out = apply_corrections(prompts, delayed, g, CorrectionOptions(randoms="delayed"),
                            CorrectionInputs(norm=fit.norm), frame_start_s=300.0, frame_duration_s=600.0,
                            isotope="F18")
    # DCF to acquisition start from the dynamic helper's decay module (references.md s.8 formula).
    assert out.attrs["decay_correction_factor"] == pytest.approx(frame_decay_factor(half_life_s("F-18"), 300.0, 600.0))
    assert out.attrs["isotope"] == "F-18"
    assert out.attrs["randoms_fraction"] == pytest.approx(rnd_truth.sum() / prompts.sum(), rel=0.02)
    assert np.all(out.datasets["acf"] == 1.0)
    none = apply_corrections(prompts, None, g, CorrectionOptions())
    assert none.attrs["decay_correction_factor"] == 1.0 and none.notes
    assert not none.datasets["randoms"].any() and not none.datasets["scatter"].any()


def test_missing_delayed_is_an_error(study):
    g, _, prompts, delayed, _, _ = study
    with pytest.raises(TwinrayInputError, match="no delayed column"):
        apply_corrections(prompts, None, g, CorrectionOptions(randoms="delayed"))
    with pytest.raises(TwinrayInputError, match="no delayed event"):
        apply_corrections(prompts, np.zeros_like(delayed), g, CorrectionOptions(randoms="delayed"))
    with pytest.raises(TwinrayInputError, match="unknown randoms"):
        CorrectionOptions(randoms="smoothed")


def test_singles_randoms_and_deadtime_from_inputs(study):
    g, fit, prompts, delayed, _, _ = study
    rates = np.full((1, g.scanner.n_crystals), 2e4)
    inputs = CorrectionInputs(norm=fit.norm, singles_rate_cps=rates)
    out = apply_corrections(prompts, delayed, g, CorrectionOptions(randoms="singles", deadtime_ns=500.0), inputs,
                            frame_duration_s=10.0)
    # Every bin holds one pair: randoms 2 tau S^2 T; dead time 1/(1 - m tau)^2 folded into norm.
    np.testing.assert_allclose(out.datasets["randoms"][fit.norm > 0], 6e-9 * 2e4 ** 2 * 10.0, rtol=1e-5)
    np.testing.assert_allclose(out.datasets["norm"], fit.norm / (1 - 2e4 * 500e-9) ** 2, rtol=1e-5)
