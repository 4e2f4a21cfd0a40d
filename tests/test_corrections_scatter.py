"""Tail-fit scatter (references.md s.12 oracle: a known smooth scatter with zero trues outside the object)."""

import numpy as np
import pytest

from twinray.corrections.scatter import TailFitOptions, estimate_scatter, tail_fit_scatter
from twinray.errors import TwinrayInputError
from twinray.geometry import sinogram_geometry

from test_corrections_common import small_scanner


def setup(offset_mm=0.0):
    g = sinogram_geometry(small_scanner(rings=3, crystals=128, radius=90.0))
    s = g.radial_positions_mm[None, None, :]
    phi = g.view_angles_rad[None, :, None]
    centre = offset_mm * np.cos(phi)  # object centred at (offset, 0): its projection moves with the view
    r = 35.0
    chord = 2 * np.sqrt(np.clip(r ** 2 - (s - centre) ** 2, 0, None))
    acf = np.exp(0.0096 * chord) * np.ones((g.planes, 1, 1))
    trues = 5.0 * chord * np.ones((g.planes, 1, 1))
    scatter = 40.0 * np.exp(-0.5 * ((s - centre) / 45.0) ** 2) * np.ones((g.planes, 1, 1))
    return g, acf, trues, scatter


@pytest.mark.parametrize("offset", [0.0, 15.0])
def test_noise_free_gaussian_scatter_is_recovered(offset):
    """Outside the object the fit equals the scatter exactly; inside, the Gaussian model is exact too."""
    g, acf, trues, scatter = setup(offset)
    rng = np.random.default_rng(0)
    norm = rng.uniform(0.8, 1.25, g.shape)  # raw counts are scatter / norm
    emission = (trues + scatter) / norm
    fit, missing = tail_fit_scatter(emission, norm, acf, g, TailFitOptions(view_smoothing=1))
    assert missing == 0
    np.testing.assert_allclose(fit * norm, scatter, rtol=0.03, atol=0.2)


def test_poisson_noise_scatter_within_a_few_percent():
    g, acf, trues, scatter = setup()
    rng = np.random.default_rng(1)
    emission = rng.poisson(trues + scatter).astype(float)
    fit, _ = tail_fit_scatter(emission, np.ones(g.shape), acf, g)
    inside = acf > 1.02
    # View- and plane-averaged profile under the object within 5 % of the truth.
    assert np.abs(fit[inside].mean() / scatter[inside].mean() - 1) < 0.05


def test_needs_acf_and_known_method():
    g, acf, trues, scatter = setup()
    with pytest.raises(TwinrayInputError, match="--mu"):
        tail_fit_scatter(trues, np.ones(g.shape), None, g)
    with pytest.raises(TwinrayInputError, match="unknown scatter method"):
        estimate_scatter("single-scatter", trues, np.ones(g.shape), acf, g)
    zero, notes = estimate_scatter("none", trues, np.ones(g.shape), acf, g)
    assert not zero.any() and notes == []


def test_object_filling_the_field_of_view_reports_missing_planes():
    g, acf, trues, scatter = setup()
    full = np.full(g.shape, 2.0)  # every LOR crosses the object: no tails
    _, notes = estimate_scatter("tail-fit", trues, np.ones(g.shape), full, g)
    assert notes and "no tails" in notes[0]


def test_scatter_is_never_negative_when_the_tails_are_empty():
    """A scatter expectation is non-negative (it is a count rate); tails holding only sparse
    Poisson counts around zero must not give negative amplitudes."""
    g, acf, trues, _ = setup()
    rng = np.random.default_rng(2)
    emission = rng.poisson(0.02 * trues + 0.01).astype(float)  # nearly empty tails
    fit, _ = tail_fit_scatter(emission, np.ones(g.shape), acf, g)
    assert np.all(fit >= 0.0)
