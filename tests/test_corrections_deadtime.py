"""Dead-time models (Knoll, Radiation Detection and Measurement, 4th ed., ch. 4; references.md s.13)."""

import numpy as np
import pytest

from twinray.corrections.deadtime import deadtime_factors, live_fraction, measured_rate, true_rate
from twinray.errors import TwinrayInputError
from twinray.geometry import sinogram_geometry

from test_corrections_common import all_pairs, sinogram_of, small_scanner


def test_reference_vector():
    """n = 1e6 cps, tau = 100 ns: 909 090.9 (non-paralysable), 904 837.4 cps (paralysable); references.md s.13."""
    assert measured_rate(1e6, 100e-9, "nonparalysable") == pytest.approx(909090.9, abs=0.05)
    assert measured_rate(1e6, 100e-9, "paralysable") == pytest.approx(904837.4, abs=0.05)


@pytest.mark.parametrize("model", ["nonparalysable", "paralysable"])
def test_round_trip(model):
    """n -> m -> n exact to 1e-12 (lower branch for paralysable), references.md s.13."""
    n = np.array([0.0, 1e3, 1e5, 1e6, 5e6])
    tau = 100e-9
    back = true_rate(measured_rate(n, tau, model), tau, model)
    np.testing.assert_allclose(back, n, rtol=1e-12)


def test_paralysable_maximum_and_impossible_rates():
    """m peaks at 1/(e*tau) for n = 1/tau (Knoll ch. 4)."""
    tau = 1e-6
    assert measured_rate(1 / tau, tau, "paralysable") == pytest.approx(1 / (np.e * tau), rel=1e-12)
    with pytest.raises(TwinrayInputError, match="maximum"):
        true_rate(0.5 / tau, tau, "paralysable")
    with pytest.raises(TwinrayInputError, match="impossible"):
        true_rate(1.0 / tau, tau, "nonparalysable")


def test_bin_factor_is_product_of_crystal_live_fractions():
    """Pair live fraction L_a*L_b (common practice): factor of a span-1 bin = 1/(L_a L_b)."""
    g = sinogram_geometry(small_scanner(rings=2, crystals=16, radius=40.0))
    rng = np.random.default_rng(0)
    rates = rng.uniform(1e4, 3e5, g.scanner.n_crystals)
    tau = 200e-9
    got = deadtime_factors(rates, tau, g)
    live = 1 - rates * tau  # non-paralysable m/n = 1 - m*tau
    pairs = all_pairs(g)
    want = sinogram_of(pairs, 1.0 / (live[pairs["a"]] * live[pairs["b"]]), g)
    has = sinogram_of(pairs, np.ones(len(pairs["a"])), g) > 0
    np.testing.assert_allclose(got[has], want[has], rtol=1e-6)
    np.testing.assert_allclose(live_fraction(rates, tau), live, rtol=1e-12)
