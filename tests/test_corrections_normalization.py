"""Normalization: fan-sum crystal efficiencies and geometric factors.

Oracle (references.md s.3): synthetic Poisson data n_ab = eps_a eps_b g_ab
(times the source's line integral) with known efficiencies; the fan-sum
estimate must recover them (Defrise et al. 1991; Casey & Hoffman 1986).
"""

import math

import numpy as np
import pytest

from twinray.corrections.normalization import (
    NormalizationSource, fan_sums_of_batch, fit_normalization, make_normalization, norm_from_factors,
    read_norm_file, source_line_integrals, stream_fan_sums)
from twinray.errors import TwinrayInputError
from twinray.event_writer import write_events
from twinray.events import open_events
from twinray.geometry import sinogram_geometry
from twinray.sinogram_io import read_sinogram_file

from test_corrections_common import all_pairs, events_of, sinogram_of, small_scanner


def true_geometric(g):
    """A smooth made-up geometric efficiency per (ring difference, radial)."""
    s = g.radial_positions_mm / g.scanner.radius_mm
    rings = g.scanner.rings
    return (1 - 0.3 * s ** 2)[None, :] * (1 - 0.04 * np.abs(np.arange(2 * rings - 1) - (rings - 1)))[:, None]


def norm_scan(g, source, total=1.5e6, randoms_fraction=0.1, seed=0):
    rng = np.random.default_rng(seed)
    pairs = all_pairs(g)
    eps = rng.gamma(40.0, 1 / 40.0, g.scanner.n_crystals)
    gt = true_geometric(g)
    src = source_line_integrals(g, source)
    lam = eps[pairs["a"]] * eps[pairs["b"]] * gt[pairs["dr"], pairs["radial"]] * src[pairs["dr"], pairs["radial"]]
    lam *= total / lam.sum()
    singles = rng.uniform(0.8, 1.2, g.scanner.n_crystals)
    rnd = singles[pairs["a"]] * singles[pairs["b"]]
    rnd *= randoms_fraction * total / rnd.sum()
    prompts = rng.poisson(lam + rnd)
    delayed = rng.poisson(rnd)
    cols_p = events_of(pairs, prompts, rng, delayed=np.zeros(len(prompts), bool))
    cols_d = events_of(pairs, delayed, rng, delayed=np.ones(len(delayed), bool))
    cols = {k: np.concatenate([cols_p[k], cols_d[k]]) for k in cols_p}
    order = rng.permutation(len(cols["crystal_a"]))
    cols = {k: v[order] for k, v in cols.items()}
    return cols, eps, gt, pairs


@pytest.mark.parametrize("shape", ["cylinder", "flood", "rotating-line"])
def test_fan_sum_recovers_crystal_efficiencies(shape):
    """Correlation with the simulated efficiencies >= 0.95 (issue 4; oracle references.md s.3)."""
    g = sinogram_geometry(small_scanner(rings=4, crystals=64, radius=60.0))
    source = NormalizationSource(shape, 45.0, 0.096 if shape == "cylinder" else 0.0)
    cols, eps, gt, _ = norm_scan(g, source)
    fan = fan_sums_of_batch(cols, g)
    assert fan.accounting.balances() and fan.accounting.read == len(cols["crystal_a"])
    fit = fit_normalization(fan, g, source, iterations=20)
    assert np.corrcoef(fit.crystal_efficiency, eps)[0, 1] >= 0.95
    assert fit.crystal_efficiency.mean() == pytest.approx(1.0, rel=1e-9)
    # Relative error close to the Poisson limit of each fan (about 1/sqrt(fan counts)).
    ratio = fit.crystal_efficiency / (eps / eps.mean())
    assert np.std(ratio) < 3.0 / math.sqrt(fan.fan_prompts.mean())
    # Geometric factors, where the source covers them, up to one overall scale.
    cov = fit.covered
    k = fit.geometric_factor[cov] / gt[cov]
    assert np.std(k) / np.mean(k) < 0.1


def test_norm_flattens_the_scan_to_the_source():
    """norm * (prompts - delayed) of the scan itself is the source line integral (up to noise and scale)."""
    g = sinogram_geometry(small_scanner(rings=4, crystals=64, radius=60.0))
    source = NormalizationSource("cylinder", 50.0, 0.096)
    cols, _, _, pairs = norm_scan(g, source, total=3e6)
    fit = fit_normalization(fan_sums_of_batch(cols, g), g, source)
    d = cols["delayed"]
    flat_p = np.zeros(g.n_bins)
    # Bin the events with the pair table (independent numpy path).
    n = g.scanner.n_crystals
    keys = np.minimum(pairs["a"], pairs["b"]) * n + np.maximum(pairs["a"], pairs["b"])
    order = np.argsort(keys)
    ev = (np.minimum(cols["crystal_a"], cols["crystal_b"]).astype(np.int64) * n
          + np.maximum(cols["crystal_a"], cols["crystal_b"]))
    idx = pairs["flat"][order][np.searchsorted(keys[order], ev)]
    np.add.at(flat_p, idx, np.where(d, -1.0, 1.0))
    corrected = (flat_p.reshape(g.shape) * fit.norm)
    src = source_line_integrals(g, source)
    s = g.radial_positions_mm
    central = np.abs(s) < 40
    direct = g.plane_ring_difference == 0
    profile = corrected[direct][:, :, central].mean(axis=(0, 1))
    want = src[g.scanner.rings - 1, central]
    k = profile / want
    assert np.std(k) / np.mean(k) < 0.03


def test_streaming_equals_one_batch(tmp_path):
    g = sinogram_geometry(small_scanner(rings=2, crystals=32, radius=50.0))
    source = NormalizationSource("flood", 40.0)
    cols, _, _, _ = norm_scan(g, source, total=2e5)
    cols["time_ns"] = np.sort(np.random.default_rng(1).integers(0, 10**9, len(cols["crystal_a"])))
    meta = {"scanner": g.scanner.to_dict(), "isotope": "Ge-68", "duration_s": 1.0,
            "normalization_source": {"shape": "flood", "radius_mm": 40.0, "mu_per_cm": 0.0}}
    path = write_events(tmp_path / "norm.parquet", cols, meta)
    whole = fan_sums_of_batch(cols, g)
    streamed = stream_fan_sums(open_events(path), g, batch_size=777)
    np.testing.assert_array_equal(streamed.fan_prompts, whole.fan_prompts)
    np.testing.assert_array_equal(streamed.fan_delayed, whole.fan_delayed)
    np.testing.assert_array_equal(streamed.table_prompts, whole.table_prompts)
    assert streamed.accounting == whole.accounting


def test_norm_file_round_trip_and_geometry_refusal(tmp_path):
    g = sinogram_geometry(small_scanner(rings=2, crystals=32, radius=50.0))
    cols, _, _, _ = norm_scan(g, NormalizationSource("flood", 40.0), total=2e5)
    cols["time_ns"] = np.arange(len(cols["crystal_a"]), dtype=np.int64)
    meta = {"scanner": g.scanner.to_dict(), "isotope": "Ge-68", "duration_s": 1.0,
            "normalization_source": {"shape": "flood", "radius_mm": 40.0}}
    events = write_events(tmp_path / "norm.parquet", cols, meta)
    result = make_normalization(events, tmp_path / "norm.h5")
    f = read_sinogram_file(tmp_path / "norm.h5")
    assert f.arrays["crystal_efficiency"].shape == (g.scanner.n_crystals,)
    assert f.arrays["crystal_efficiency"].mean() == pytest.approx(1.0, rel=1e-6)
    assert f.arrays["norm"].shape == g.shape
    assert f.accounting.balances() and f.accounting.read == len(cols["crystal_a"])
    np.testing.assert_array_equal(read_norm_file(tmp_path / "norm.h5", g), result.fit.norm)
    other = sinogram_geometry(small_scanner(rings=2, crystals=32, radius=50.0, radial_bins=21))
    with pytest.raises(TwinrayInputError, match="another sinogram geometry"):
        read_norm_file(tmp_path / "norm.h5", other)
    with pytest.raises(TwinrayInputError, match="another sinogram geometry"):
        read_norm_file(tmp_path / "norm.h5", sinogram_geometry(g.scanner, "ssrb"))
    # A corrected sinogram file also has a `norm` dataset, but it is not a normalization file
    # (data contract s.3: crystal_efficiency and norm).
    from twinray.sinogram_io import write_sinogram_file
    write_sinogram_file(tmp_path / "sino.h5", {"prompts": np.zeros(g.shape, np.int32), "norm": f.arrays["norm"]}, g)
    with pytest.raises(TwinrayInputError, match="not a normalization file"):
        read_norm_file(tmp_path / "sino.h5", g)
    # A scan without normalization_source metadata is refused.
    del meta["normalization_source"]
    plain = write_events(tmp_path / "plain.parquet", cols, meta)
    with pytest.raises(TwinrayInputError, match="normalization_source"):
        make_normalization(plain, tmp_path / "x.h5")


def test_source_line_integrals_are_chords():
    """Cylinder: L*exp(-mu L) with L = 2 sqrt(r0^2 - s^2)/cos(theta) (plane geometry)."""
    g = sinogram_geometry(small_scanner(rings=4, crystals=64, radius=60.0))
    src = source_line_integrals(g, NormalizationSource("cylinder", 30.0, 0.1))
    s = g.radial_positions_mm
    row = g.scanner.rings - 1  # ring difference 0
    L = 2 * np.sqrt(np.clip(30.0 ** 2 - s ** 2, 0, None))
    np.testing.assert_allclose(src[row], L * np.exp(-0.01 * L), rtol=1e-12)
    # Rotating line: the bin average of 2 r0/sqrt(r0^2 - s^2) integrates to 2*pi*r0 over s (arcsine).
    line = source_line_integrals(g, NormalizationSource("rotating-line", 30.0))
    from twinray.corrections.normalization import radial_bin_edges_mm
    widths = np.diff(radial_bin_edges_mm(g))
    assert np.sum(line[row] * widths) == pytest.approx(2 * 30.0 * math.pi, rel=1e-9)


def test_norm_without_file_is_axial_compression():
    """Span 3 mashes 1 or 2 ring pairs into a plane of segment 0: norm 1 or 1/2 (Fahey 2002)."""
    g = sinogram_geometry(small_scanner(rings=4, crystals=32, radius=50.0, span=3, mrd=1))
    norm = norm_from_factors(g)
    pairs = sinogram_of(all_pairs(g), np.ones(len(all_pairs(g)["a"])), g)
    has = pairs > 0
    np.testing.assert_allclose(norm[has], 1.0 / pairs[has])
    assert set(np.unique(pairs[has])) == {1.0, 2.0}
