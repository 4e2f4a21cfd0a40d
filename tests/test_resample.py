"""Resampling of list-mode events (twinray.resample, twinray._resample_kernels)."""

import json
import math

import nibabel as nib
import numpy as np
import pytest
from pathlib import Path
import scipy.stats

from conftest import make_small_scanner, random_events
from twinray import _resample_kernels as rk
from twinray.binning import bin_events
from twinray.errors import TwinrayInputError
from twinray.resample import (bin_replicates, check_resampling, parse_fractions, replicate_weights,
                              voxel_statistics)


@pytest.fixture(scope="module")
def study(tmp_path_factory):
    """20 000 random events with delayed flags and energies on the 4-ring test scanner, 10 s."""
    from conftest import event_metadata
    from twinray.event_writer import write_events

    scanner = make_small_scanner()
    cols = random_events(scanner, 20000, np.random.default_rng(11), energies=True)
    path = tmp_path_factory.mktemp("resample") / "events.parquet"
    write_events(path, cols, event_metadata(scanner))
    return path


@pytest.fixture(scope="module")
def original(study):
    return bin_events(study)


def test_splitmix64_reference_outputs():
    """SplitMix64 with state 1234567: first five outputs of the published generator
    (Steele, Lea & Flood 2014; values as printed by the reference C code, quoted from memory)."""
    state, out = 1234567, []
    for _ in range(5):
        state = (state + rk.GOLDEN_GAMMA) & ((1 << 64) - 1)
        out.append(rk.mix64(state))
    assert out == [6457827717110365317, 3203168211198807973, 9817491932198370423,
                   4593380528125082431, 16408922859458223821]


def test_kernel_weights_match_the_python_reference():
    """The numba draws equal an independent pure-Python evaluation of the same definition: replicates
    2p and 2p+1 take the high and low 32 bits of SplitMix64 output number row of generator p, and the
    Poisson(1) weight is the smallest k with u / 2**32 < F(k), F from scipy.stats.poisson (reference
    library)."""
    cdf = scipy.stats.poisson.cdf(np.arange(40), 1.0)
    w = replicate_weights(5, "bootstrap", None, 3, 1000, 50)
    keys = [rk.stream_key(5, p) for p in range(2)]
    for i in range(50):
        for r in range(3):
            u = rk.draw_uniform(keys[r // 2], 1000 + i, r % 2)
            expected = int(np.argmax(u < cdf))
            assert w[i, r] == expected == rk.poisson1_weight(rk.draw_u32(keys[r // 2], 1000 + i, r % 2))
    t = replicate_weights(5, "thin", [0.3, 0.8], 2, 7, 40)
    for f, p in enumerate((0.3, 0.8)):
        key = rk.stream_key(5, (f << 32) + 0)
        for i in range(40):
            for r in range(2):
                assert t[i, 2 * f + r] == (rk.draw_uniform(key, 7 + i, r) < p)


def test_poisson1_thresholds_against_scipy():
    """Integer inversion thresholds T[k] = ceil(F(k) * 2**32) of the Poisson(1) CDF (scipy.stats.poisson,
    reference library); the largest weight is 12 because P(K > 11) = 8.3e-10 exceeds the 2**-32
    resolution of a uniform while P(K > 12) = 6.4e-11 does not; the shortcut table agrees with the
    comparisons at every cell edge and around every threshold."""
    t = rk.POISSON1_THRESHOLDS
    scaled = scipy.stats.poisson.cdf(np.arange(len(t)), 1.0) * 2.0 ** 32
    assert np.all(t - scaled >= -1e-6) and np.all(t - scaled < 1 + 1e-6)
    assert rk.MAX_WEIGHT == 12 == len(t)
    assert scipy.stats.poisson.sf(11, 1.0) > 2.0 ** -32 > scipy.stats.poisson.sf(12, 1.0)
    shift = 32 - rk.TABLE_BITS
    cells = np.arange(1 << rk.TABLE_BITS, dtype=np.int64)
    probes = np.concatenate([cells << shift, ((cells + 1) << shift) - 1, t - 1, t, t + 1, [2 ** 32 - 1]])
    for u in probes:
        assert rk._poisson1(np.int64(u)) == np.searchsorted(t, u, side="right") == rk.poisson1_weight(u)
    # every probability of the discrete law is Poisson(1)'s to within the 2**-32 resolution
    edges = np.concatenate([[0], t, [2 ** 32]])
    pmf = np.diff(edges) / 2.0 ** 32
    exact = scipy.stats.poisson.pmf(np.arange(13), 1.0)
    exact[12] += scipy.stats.poisson.sf(12, 1.0)
    np.testing.assert_allclose(pmf, exact, rtol=0, atol=2.0 ** -32)
    assert rk.thin_threshold(1.0) == 2 ** 32 and rk.thin_threshold(0.5) == 2 ** 31


def test_poisson1_weights_follow_the_poisson_law():
    """Bootstrap weights ~ Poisson(1) (Hanley & MacGibbon 2006): chi-square test against
    scipy.stats.poisson (reference library) on 400 000 draws; mean 1 and variance 1 (standard errors
    0.0016 and 0.0027: sqrt(1/n) and sqrt((mu4 - 1)/n) with mu4 = 4 for Poisson(1), textbook)."""
    w = replicate_weights(1, "bootstrap", None, 2, 0, 200_000).reshape(-1)
    observed = np.bincount(w, minlength=6)[:6].astype(float)
    observed[5] = (w >= 5).sum()
    p = scipy.stats.poisson.pmf(np.arange(5), 1.0)
    expected = np.append(p, 1 - p.sum()) * w.size
    chi2 = ((observed - expected) ** 2 / expected).sum()
    assert scipy.stats.chi2.sf(chi2, df=5) > 1e-4
    assert w.mean() == pytest.approx(1.0, abs=0.008) and w.var() == pytest.approx(1.0, abs=0.014)


def test_paired_replicates_are_independent():
    """Replicates 0 and 1 take the two halves of one 64-bit output: their weights must be independent
    (chi-square test of independence, scipy.stats.chi2_contingency, reference library; correlation
    within 5 standard errors 1/sqrt(n) of 0), and so must replicates 1 and 2 (different generators)."""
    w = replicate_weights(7, "bootstrap", None, 3, 123, 200_000)
    for a, b in ((0, 1), (1, 2)):
        table = np.zeros((4, 4))
        np.add.at(table, (np.minimum(w[:, a], 3), np.minimum(w[:, b], 3)), 1)
        assert scipy.stats.chi2_contingency(table)[1] > 1e-4
        assert abs(np.corrcoef(w[:, a], w[:, b])[0, 1]) < 5 / math.sqrt(len(w))


def test_thinning_weights_are_bernoulli():
    """Thinning weights are Bernoulli(P): mean P and variance P(1 - P) (textbook), within 5 standard
    errors sqrt(P(1 - P)/n) for the mean."""
    n = 200_000
    t = replicate_weights(2, "thin", [0.1, 0.75], 2, 0, n)
    for col, p in ((0, 0.1), (1, 0.1), (2, 0.75), (3, 0.75)):
        assert set(np.unique(t[:, col])) <= {0, 1}
        assert abs(t[:, col].mean() - p) < 5 * math.sqrt(p * (1 - p) / n)
        assert t[:, col].var() == pytest.approx(p * (1 - p), rel=0.02)


def test_thinning_counts_are_binomial(study, original):
    """Thinning keeps each event with probability P: bin counts have mean P*n and variance
    n*P*(1-P) (binomial distribution, textbook; references.md s.10 oracle 1)."""
    replicates = 300
    state = bin_replicates(study, mode="thin", fractions=[0.2, 0.6], replicates=replicates, seed=9)
    n = original.prompts[0].astype(np.float64)
    nd = original.delayed[0].astype(np.float64)
    assert state.prompts.shape == (2 * replicates,) + original.prompts.shape[1:]
    for p in (0.2, 0.6):
        x = state.prompts[state.fractions == p].astype(np.float64)
        mean, var = x.mean(axis=0), x.var(axis=0, ddof=1)
        sd_of_mean = np.sqrt(n * p * (1 - p) / replicates)
        z = np.divide(mean - p * n, sd_of_mean, out=np.zeros_like(n), where=n > 0)
        assert np.abs(z).max() < 5.0
        # Summed over bins the relative error of the variance estimate is ~sqrt(2/(B-1)/bins) < 1 %.
        assert var.sum() / (n * p * (1 - p)).sum() == pytest.approx(1.0, abs=0.03)
        d = state.delayed[state.fractions == p].astype(np.float64)
        assert d.mean(axis=0).sum() / nd.sum() == pytest.approx(p, rel=0.02)
    # Nothing is ever created: a thinned bin never exceeds the original.
    assert (state.prompts <= original.prompts[0][None]).all()


def test_bootstrap_variance_equals_the_count(study, original):
    """Poisson bootstrap: replicate counts of a bin have mean n and variance n, the Poisson
    variance (references.md s.10 oracle 3; Hanley & MacGibbon 2006)."""
    replicates = 300
    state = bin_replicates(study, mode="bootstrap", replicates=replicates, seed=4)
    n = original.prompts[0].astype(np.float64)
    x = state.prompts.astype(np.float64)
    mean, var = x.mean(axis=0), x.var(axis=0, ddof=1)
    z = np.divide(mean - n, np.sqrt(n / replicates), out=np.zeros_like(n), where=n > 0)
    assert np.abs(z).max() < 5.0
    assert var.sum() / n.sum() == pytest.approx(1.0, abs=0.03)
    busy = n >= 15
    assert np.median(var[busy] / n[busy]) == pytest.approx(1.0, abs=0.1)
    np.testing.assert_array_equal(state.totals[:, 0], x.reshape(replicates, -1).sum(axis=1))
    assert (x[:, n == 0] == 0).all()


def test_reproducible_whatever_the_batch_size_and_replicate_count(study):
    a = bin_replicates(study, mode="bootstrap", replicates=4, seed=21, batch_size=1 << 20)
    b = bin_replicates(study, mode="bootstrap", replicates=4, seed=21, batch_size=999)
    np.testing.assert_array_equal(a.prompts, b.prompts)
    np.testing.assert_array_equal(a.delayed, b.delayed)
    # replicate r does not depend on how many replicates were asked for (odd counts use half a pair)
    c = bin_replicates(study, mode="bootstrap", replicates=2, seed=21, batch_size=4096)
    np.testing.assert_array_equal(a.prompts[:2], c.prompts)
    c3 = bin_replicates(study, mode="bootstrap", replicates=3, seed=21, batch_size=5000)
    np.testing.assert_array_equal(a.prompts[:3], c3.prompts)
    np.testing.assert_array_equal(a.totals[:3], c3.totals)
    d = bin_replicates(study, mode="bootstrap", replicates=4, seed=22)
    assert not np.array_equal(a.prompts, d.prompts)
    # a tiny memory budget reads the events once per pair of replicates: same numbers
    e = bin_replicates(study, mode="bootstrap", replicates=4, seed=21, memory_bytes=1)
    assert e.passes == 2 and a.passes == 1
    np.testing.assert_array_equal(a.prompts, e.prompts)
    np.testing.assert_array_equal(a.totals, e.totals)


@pytest.fixture(scope="module")
def hot_study(tmp_path_factory):
    """5000 random events plus 3000 on one line of response (a bin with thousands of counts)."""
    from conftest import event_metadata
    from twinray.event_writer import write_events

    scanner = make_small_scanner()
    rng = np.random.default_rng(12)
    cols = random_events(scanner, 8000, rng)
    hot = rng.permutation(8000)[:3000]
    cols["crystal_a"][hot] = 1
    cols["crystal_b"][hot] = 9 + scanner.crystals_per_ring      # ring 1, opposite side
    path = tmp_path_factory.mktemp("resample_hot") / "events.parquet"
    write_events(path, cols, event_metadata(scanner))
    return path


@pytest.mark.parametrize("mode, fractions, replicates", [("bootstrap", None, 5), ("thin", [0.3, 1.0], 3)])
def test_replicates_equal_the_sum_of_their_weights(hot_study, mode, fractions, replicates):
    """Every replicate bin equals the sum of the weights of its events, summed independently with
    numpy (np.add.at) from replicate_weights and the ordinary classification, whatever the batch size;
    the hot bin (about 3000 events) overflows the one-byte working counts many times over."""
    from twinray.binning import _Binner, _energy_window, empty_state
    from twinray.events import open_events, read_events
    from twinray.resample import _classify

    source = open_events(hot_study)
    state = bin_replicates(source, mode=mode, fractions=fractions, replicates=replicates, seed=17, batch_size=777)
    g = state.geometry
    cols = read_events(source, ["crystal_a", "crystal_b", "delayed"])
    classifier = _Binner(empty_state(g, None, with_delayed=True), _energy_window(True, g.scanner, False))
    codes = _classify(classifier, cols).copy()
    weights = replicate_weights(17, mode, fractions, replicates, 0, len(codes))
    for flag, got in ((0, state.prompts), (1, state.delayed)):
        sel = (codes >= 0) & ((codes & 1) == flag)
        expected = np.zeros((state.n_streams, g.n_bins), np.int64)
        for r in range(state.n_streams):
            np.add.at(expected[r], codes[sel] >> 1, weights[sel, r])
        np.testing.assert_array_equal(got.reshape(state.n_streams, -1), expected)
        np.testing.assert_array_equal(state.totals[:, flag], expected.sum(axis=1))
    assert state.prompts.max() > 2000                # the hot bin went through the spill path
    other = bin_replicates(source, mode=mode, fractions=fractions, replicates=replicates, seed=17)
    np.testing.assert_array_equal(other.prompts, state.prompts)
    # the sinogram rows are shared among numba threads: one thread gives the same numbers
    import numba

    threads = numba.get_num_threads()
    numba.set_num_threads(1)
    try:
        single = bin_replicates(source, mode=mode, fractions=fractions, replicates=replicates, seed=17)
    finally:
        numba.set_num_threads(threads)
    np.testing.assert_array_equal(single.prompts, state.prompts)
    np.testing.assert_array_equal(single.delayed, state.delayed)
    np.testing.assert_array_equal(single.totals, state.totals)


def test_accounting_is_that_of_the_original_events(study, original):
    state = bin_replicates(study, mode="thin", fractions=[1.0], replicates=2, seed=0)
    assert state.accounting == original.accounting(0)
    assert state.accounting.balances()
    # thinning with P = 1 keeps every event: both replicates equal the ordinary binning
    np.testing.assert_array_equal(state.prompts[0], original.prompts[0])
    np.testing.assert_array_equal(state.delayed[1], original.delayed[0])


def test_frame_window(study):
    full = bin_events(study, frames=[(2.0, 5.0)])
    state = bin_replicates(study, mode="thin", fractions=[1.0], replicates=2, frame=(2.0, 5.0))
    np.testing.assert_array_equal(state.prompts[0], full.prompts[0])
    assert state.accounting == full.accounting(0)
    assert state.frame_s == (2.0, 5.0)


def test_options_are_checked():
    assert check_resampling("bootstrap", 5, None) == (1.0,)
    assert parse_fractions("0.1, 0.5") == (0.1, 0.5)
    for args, match in [(("jackknife", 5, None), "bootstrap or thin"), (("bootstrap", 1, None), ">= 2"),
                        (("bootstrap", 5, [0.5]), "thin only"), (("thin", 5, None), "needs --fraction"),
                        (("thin", 5, [0.0]), r"\(0, 1\]"), (("thin", 5, [1.5]), r"\(0, 1\]"),
                        (("thin", 5, [0.5, 0.5]), "twice")]:
        with pytest.raises(TwinrayInputError, match=match):
            check_resampling(*args)
    with pytest.raises(TwinrayInputError, match="numbers"):
        parse_fractions("half")


def test_voxel_statistics():
    """ddof = 1 standard deviation (numpy reference) and cov = std/mean, 0 where mean is 0."""
    rng = np.random.default_rng(0)
    images = rng.normal(5.0, 1.0, (7, 4, 3, 2))
    images[:, 0, 0, 0] = 0.0
    mean, std, cov = voxel_statistics(images)
    np.testing.assert_allclose(std, np.std(images, axis=0, ddof=1), rtol=1e-6)
    expected = np.std(images, axis=0, ddof=1)[1:] / images.mean(axis=0)[1:]
    np.testing.assert_allclose(cov[1:], expected, rtol=1e-5)
    assert cov[0, 0, 0] == 0.0 and mean.dtype == np.float32
    with pytest.raises(TwinrayInputError):
        voxel_statistics(images[:1])


@pytest.fixture(scope="module")
def realizations(tmp_path_factory):
    """Independent simulated scans (seeds 1..8) of one uniform F-18 water cylinder on the bench-top scanner."""
    from conftest import SCANNER_DIR
    from twinray.simulate.phantom import load_phantom
    from twinray.simulate.simulator import simulate

    folder = tmp_path_factory.mktemp("realizations")
    phantom = folder / "cylinder.toml"
    phantom.write_text(f'''name = "uniform cylinder"
isotope = "F-18"
scanner = "{(SCANNER_DIR / 'benchtop.toml').as_posix()}"
duration_s = 4.0
acquisition_start = "2026-03-02T08:30:00+00:00"

[physics]
attenuation = false
scatter = false
randoms = false
delayed = false
efficiency_spread = 0.0

[[shape]]
name = "water"
type = "cylinder"
radius_mm = 35.0
length_mm = 24.0
activity_bq_per_ml = 1500.0
mu_per_cm = 0.096
''')
    loaded = load_phantom(phantom)
    paths = []
    for seed in range(1, 9):
        path = folder / f"scan{seed}.parquet"
        simulate(loaded, path, seed=seed, write_truth=False)
        paths.append(path)
    return paths


def test_image_bootstrap_std_matches_independent_realizations(realizations, tmp_path):
    """The bootstrap standard deviation of FBP images of one scan, in a uniform region, lies within 25 %
    of the standard deviation across independent simulated scans (Dahlbom 2002; Hanley & MacGibbon 2006)."""
    from twinray.corrections.apply import CorrectionOptions, prepare_corrections
    from twinray.dynamic import FrameTask, frame_image
    from twinray.geometry import sinogram_geometry
    from twinray.reconstruct.pipeline import ReconOptions
    from twinray.resample import make_resample
    from twinray.tac import parse_region, region_mask

    recon = ReconOptions(method="fbp", filter_name="hann", cutoff=0.8)
    corrections = CorrectionOptions(randoms="none")
    region = parse_region("centre=sphere:0,0,0,22")
    result = make_resample(realizations[0], tmp_path / "boot", mode="bootstrap", replicates=24, seed=3,
                           rebin="ssrb", correction_options=corrections, recon_options=recon, regions=[region],
                           workers=0)
    std_img = nib.load(tmp_path / "boot" / "std.nii.gz")
    boot_std = np.asarray(std_img.dataobj)

    from twinray.events import open_events
    source = open_events(realizations[0])
    geometry = sinogram_geometry(source.scanner, "ssrb")
    inputs = prepare_corrections(geometry, corrections)
    images = []
    for path in realizations:
        state = bin_events(path, geometry)
        task = FrameTask(0, state.prompts[0], None, 0.0, 4.0, decay_factor=1.0)
        images.append(frame_image(task, geometry=geometry, correction_options=corrections,
                                  correction_inputs=inputs, recon_options=recon)["image"])
    across = np.std(np.stack(images).astype(np.float64), axis=0, ddof=1)
    mask = region_mask(boot_std.shape, std_img.affine, region)
    ratio = boot_std[mask].mean() / across[mask].mean()
    print(f"bootstrap std / realization std = {ratio:.3f}")
    assert 0.75 <= ratio <= 1.25, ratio
    level = result.summary["levels"][0]["regions"]["centre"]
    assert level["voxel_std"] == pytest.approx(float(boot_std[mask].mean()), rel=1e-5)


def test_thinning_levels_through_the_command(realizations, tmp_path, capsys):
    """`twinray resample --mode thin` with two fractions: 4-D outputs, cov = std/mean, the thinned mean
    images estimate the same concentration (reconstructed as scans of P times the duration), and the
    relative noise falls with counts roughly as 1/sqrt(counts) (Poisson statistics)."""
    from twinray.cli.main import main

    out = tmp_path / "levels"
    code = main(["resample", str(realizations[1]), "-o", str(out), "--mode", "thin", "--fraction", "0.2,0.6",
                 "--replicates", "6", "--seed", "5", "--rebin", "ssrb", "--method", "fbp", "--filter", "hann",
                 "--workers", "0", "--roi", "centre=sphere:0,0,0,22", "--json"])
    assert code == 0
    result = json.loads(capsys.readouterr().out)
    assert result["accounting"]["read"] == result["accounting"]["prompts_binned"] + sum(
        v for k, v in result["accounting"].items() if k.startswith("rejected_")) + result["accounting"]["delayed_binned"]
    for name in ("mean.nii.gz", "std.nii.gz", "cov.nii.gz", "summary.json", "noise_vs_counts.png",
                 "mean.json", "std.json", "cov.json"):
        assert (out / name).exists(), name
    mean = np.asarray(nib.load(out / "mean.nii.gz").dataobj)
    std = np.asarray(nib.load(out / "std.nii.gz").dataobj)
    cov = np.asarray(nib.load(out / "cov.nii.gz").dataobj)
    assert mean.ndim == 4 and mean.shape[3] == 2
    expected = np.divide(std, mean, out=np.zeros_like(std), where=mean > 0)
    np.testing.assert_allclose(cov, expected, rtol=1e-5, atol=1e-7)
    summary = json.loads((out / "summary.json").read_text())
    low, high = summary["levels"]
    assert low["fraction"] == 0.2 and high["fraction"] == 0.6
    assert high["mean_prompts"] / low["mean_prompts"] == pytest.approx(3.0, rel=0.02)
    assert low["regions"]["centre"]["mean"] == pytest.approx(high["regions"]["centre"]["mean"], rel=0.05)
    low_c, high_c = low["regions"]["centre"], high["regions"]["centre"]
    # Across thinned replicates of one scan a bin varies binomially, n P (1 - P) (textbook), so for FBP
    # (linear) the voxel CoV ratio of the two levels is sqrt((1-0.2)/0.2 / ((1-0.6)/0.6)) = 2.449 ...
    ratio = low_c["voxel_cov"] / high_c["voxel_cov"]
    assert ratio == pytest.approx(math.sqrt((0.8 / 0.2) / (0.4 / 0.6)), rel=0.15)
    # ... and the scan-equivalent noise (divided by sqrt(1-P)) falls as counts^-0.5 (Poisson statistics).
    assert low_c["scan_voxel_cov"] == pytest.approx(low_c["voxel_cov"] / math.sqrt(0.8), rel=1e-9)
    assert summary["noise_vs_counts_slope"]["centre"]["voxel_cov"] == pytest.approx(-0.5, abs=0.12)
    side = json.loads((out / "cov.json").read_text())
    assert side["Units"] == "1" and side["twinray"]["volume_axis"] == "fraction"
    assert (out / "noise_vs_counts.png").read_bytes()[:4] == b"\x89PNG"


def test_thinned_levels_estimate_the_same_concentration(tmp_path):
    """A thinned Poisson process has mean P*lambda (textbook thinning; cli.md: thinned replicates are
    reconstructed as scans of P times the duration), so the object's mean must not depend on P.

    Regression: the object region used to be thresholded on the noisiest (smallest-fraction) mean
    image, which picked the voxels that happened to be high and inflated that level's mean 3x.
    """
    import json

    from twinray.cli.main import main

    events = Path(__file__).resolve().parents[1] / "simulated_events" / "benchtop_inserts.parquet"
    out = tmp_path / "thin"
    code = main(["resample", str(events), "-o", str(out), "--mode", "thin", "--fraction", "0.0625,1",
                 "--replicates", "2", "--seed", "3", "--workers", "0", "--method", "fbp", "--quiet"])
    assert code == 0
    levels = json.loads((out / "summary.json").read_text())["levels"]
    low, full = (lv["regions"]["object"]["mean"] for lv in levels)
    # 2 replicates of ~25k prompts: the regional mean is known to about 1-2 %.
    assert low == pytest.approx(full, rel=0.06)


def test_populating_pages_leaves_the_contents():
    """populate_pages only faults pages in (madvise MADV_POPULATE_WRITE): the data stay as they were,
    also for arrays that do not start or end on a page boundary."""
    from twinray.resample import populate_pages

    data = np.arange(3_000_001, dtype=np.int64)
    view = data[7:-5]
    assert populate_pages([view, np.zeros(1, np.uint8)], chunk_bytes=1 << 16) in (True, False)
    np.testing.assert_array_equal(data, np.arange(3_000_001))
    fresh = np.zeros((3, 1_000_000), np.int32)
    populate_pages([fresh[1:]])
    assert not fresh.any()
