"""Randoms: delayed window with fan-sum variance reduction, and the singles formula."""

import numpy as np
import pytest

from twinray.corrections.randoms import (
    crystal_fan_sums, fit_crystal_factors, randoms_from_delayed, randoms_from_singles, read_singles_rates)
from twinray.errors import TwinrayInputError
from twinray.geometry import sinogram_geometry

from test_corrections_common import all_pairs, sinogram_of, small_scanner


def expected_randoms(g, rng, total):
    """True randoms expectation R_ab = 2 tau S_a S_b T, scaled to ``total`` counts (references.md s.3)."""
    singles = rng.uniform(0.5, 1.5, g.scanner.n_crystals) * 1e4
    pairs = all_pairs(g)
    r = 2 * 3e-9 * singles[pairs["a"]] * singles[pairs["b"]]
    r *= total / r.sum()
    return sinogram_of(pairs, r, g)


@pytest.mark.parametrize("span", [1, 3])
def test_delayed_fan_sum_estimate_matches_true_expectation(span):
    """Variance-reduced estimate vs the true randoms expectation (Casey & Hoffman 1986)."""
    g = sinogram_geometry(small_scanner(rings=6, crystals=64, radius=60.0, span=span, mrd=4))
    rng = np.random.default_rng(5)
    truth = expected_randoms(g, rng, total=2e5)
    delayed = rng.poisson(truth)
    estimate = randoms_from_delayed(delayed, g)
    assert estimate.sum() == pytest.approx(delayed.sum(), rel=1e-6)
    has = truth > 0
    # The estimate is within a few percent of the truth everywhere (the rest is the Poisson noise of
    # about 170 delayed counts per crystal fan) ...
    rel = estimate[has] / truth[has] - 1
    assert np.sqrt(np.mean(rel ** 2)) < 0.06
    # ... and exact on noise-free data, whatever the span.
    exact = randoms_from_delayed(truth, g, iterations=20)
    np.testing.assert_allclose(exact[has], truth[has], rtol=1e-4)
    # ... while the delayed counts themselves scatter by 1/sqrt(mean) (about 50 % here).
    raw = delayed[has] / truth[has] - 1
    assert np.mean((estimate[has] - truth[has]) ** 2) < 0.02 * np.mean((delayed[has] - truth[has]) ** 2)
    assert np.sqrt(np.mean(raw ** 2)) > 0.3


def test_fit_recovers_product_factors_exactly_without_noise():
    """Noise-free product data r_a r_b: the fit reproduces every bin (ML fixed point)."""
    g = sinogram_geometry(small_scanner(rings=3, crystals=32, radius=50.0))
    rng = np.random.default_rng(2)
    r = rng.uniform(0.5, 2.0, g.scanner.n_crystals)
    pairs = all_pairs(g)
    data = sinogram_of(pairs, r[pairs["a"]] * r[pairs["b"]], g)
    fit = fit_crystal_factors(data, g, iterations=200)
    model = sinogram_of(pairs, fit[pairs["a"]] * fit[pairs["b"]], g)
    np.testing.assert_allclose(model, data, rtol=2e-3, atol=1e-9)
    np.testing.assert_allclose(crystal_fan_sums(data, g),
                               np.bincount(pairs["a"], data.reshape(-1)[pairs["flat"]], g.scanner.n_crystals)
                               + np.bincount(pairs["b"], data.reshape(-1)[pairs["flat"]], g.scanner.n_crystals))


def test_singles_formula():
    """R_ab = 2 tau S_a S_b T with 2 tau = coincidence_window_ns (Knoll; references.md s.3)."""
    g = sinogram_geometry(small_scanner(rings=2, crystals=16, radius=40.0, window_ns=8.0))
    rates = np.linspace(1e4, 2e4, g.scanner.n_crystals)
    out = randoms_from_singles(rates, g, frame_duration_s=10.0)
    pairs = all_pairs(g)
    want = sinogram_of(pairs, 8e-9 * rates[pairs["a"]] * rates[pairs["b"]] * 10.0, g)
    np.testing.assert_allclose(out, want, rtol=1e-6)


def test_singles_formula_against_simulated_coincidences():
    """Two independent Poisson singles streams: pairs with |dt| < tau number 2 tau S_a S_b T (references.md s.3)."""
    rng = np.random.default_rng(11)
    S, T, tau = 1e5, 20.0, 4e-9
    ta = np.sort(rng.uniform(0, T, rng.poisson(S * T)))
    tb = np.sort(rng.uniform(0, T, rng.poisson(S * T)))
    lo = np.searchsorted(tb, ta - tau)
    hi = np.searchsorted(tb, ta + tau)
    found = int(np.sum(hi - lo))
    g = sinogram_geometry(small_scanner(rings=1, crystals=4, radius=40.0, window_ns=2 * tau * 1e9))
    rates = np.array([S, 0.0, S, 0.0])
    predicted = randoms_from_singles(rates, g, T).sum()
    assert predicted == pytest.approx(2 * tau * S * S * T, rel=1e-6)  # 1600 counts
    assert abs(found - predicted) < 4 * np.sqrt(predicted)


def test_read_singles_rates(tmp_path):
    import json

    import pyarrow as pa
    import pyarrow.parquet as pq

    n_crystals = 6
    interval = 500_000_000  # 0.5 s
    t = np.repeat(np.arange(8) * interval, n_crystals).astype(np.int64)
    c = np.tile(np.arange(n_crystals), 8).astype(np.int32)
    counts = (100 * (c + 1)).astype(np.int64)  # crystal k: 200*(k+1) counts/s
    schema = pa.schema([("time_ns", pa.int64()), ("crystal", pa.int32()), ("counts", pa.int64())],
                       metadata={b"twinray": json.dumps({"interval_ns": interval}).encode()})
    table = pa.Table.from_arrays([pa.array(t), pa.array(c), pa.array(counts)], schema=schema)
    pq.write_table(table, tmp_path / "singles.parquet")
    rates = read_singles_rates(tmp_path / "singles.parquet", n_crystals, [(0.0, 4.0), (0.25, 1.25)], batch_size=7)
    np.testing.assert_allclose(rates[0], 200.0 * np.arange(1, 7))
    np.testing.assert_allclose(rates[1], 200.0 * np.arange(1, 7))
    with pytest.raises(TwinrayInputError, match="covers only"):
        read_singles_rates(tmp_path / "singles.parquet", n_crystals, [(0.0, 10.0)])
    with pytest.raises(TwinrayInputError, match="outside"):
        read_singles_rates(tmp_path / "singles.parquet", 3, [(0.0, 1.0)])
    pq.write_table(table.replace_schema_metadata({}), tmp_path / "nometa.parquet")
    with pytest.raises(TwinrayInputError, match="interval_ns"):
        read_singles_rates(tmp_path / "nometa.parquet", n_crystals, [(0.0, 1.0)])
    with pytest.raises(TwinrayInputError, match="does not exist"):
        read_singles_rates(tmp_path / "missing.parquet", n_crystals, [(0.0, 1.0)])
