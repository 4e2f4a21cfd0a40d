"""The simulator against outside sources: geometry, attenuation, decay, Poisson, randoms, TOF."""

import json
import math
from pathlib import Path

import numpy as np
import pyarrow.parquet as pq
import pytest
from scipy import stats

from twinray.cli.main import main
from twinray.isotopes import decay_constant_per_s
from twinray.scanner import load_scanner
from twinray.simulate import PhysicsOptions, load_phantom, simulate, truth_paths_for
from twinray.simulate import _kernels as K
from twinray.simulate._rng import state_from_seed
from twinray.simulate.simulator import _shape_bound

ROOT = Path(__file__).resolve().parents[1]
BENCHTOP = ROOT / "configs" / "scanners" / "benchtop.toml"

#: Everything off: geometry and decay only.
BARE = PhysicsOptions(attenuation=False, scatter=False, randoms=False, delayed=False, non_collinearity=False,
                      positron_range=False, efficiency_spread=0.0, energy_resolution_fwhm=0.0)


def point_phantom(tmp_path, activity_bq, isotope="F-18", centre=(0.0, 0.0, 0.0), scanner=BENCHTOP,
                  name="point.toml"):
    """A 0.1 mm sphere holding ``activity_bq`` (before the positron fraction)."""
    volume_ml = 4.0 / 3.0 * math.pi * 0.1 ** 3 / 1000.0
    path = tmp_path / name
    path.write_text(f"""
name = "point"
isotope = "{isotope}"
scanner = "{scanner}"
duration_s = 1.0
[[shape]]
type = "sphere"
centre_mm = [{centre[0]}, {centre[1]}, {centre[2]}]
radius_mm = 0.1
activity_bq_per_ml = {activity_bq / volume_ml}
""")
    return load_phantom(path)


def read_events(path):
    return pq.read_table(path).to_pydict()


def test_point_source_geometric_acceptance(tmp_path):
    """Point at the centre: detected fraction (L/2)/sqrt(R^2+(L/2)^2) (plane geometry of a
    cylinder of radius R and axial length L; isotropic emission has cos(theta) uniform)."""
    phantom = point_phantom(tmp_path, 200_000.0)
    out = tmp_path / "ev.parquet"
    result = simulate(phantom, out, seed=3, physics=BARE)
    n_pairs = pq.ParquetFile(out).metadata.num_rows
    n_ann = result.counts["annihilations"]
    scanner = load_scanner(BENCHTOP)
    half = scanner.axial_length_mm / 2
    p = half / math.hypot(scanner.radius_mm, half)
    assert p == pytest.approx(0.14080, abs=1e-5)
    se = math.sqrt(p * (1 - p) / n_ann)
    assert abs(n_pairs / n_ann - p) < 3 * se
    assert result.counts["trues"] == n_pairs and result.counts["scatters"] == 0


def test_attenuation_line_integral_water_20cm():
    """A line through the centre of a 20 cm water cylinder: exp(-0.096 * 20) = 0.1466
    (mu of water at 511 keV, NIST XCOM / references.md s.1)."""
    kinds = np.array([K.CYLINDER], dtype=np.int32)
    params = np.array([[0.0, 0.0, 0.0, 100.0, 100.0, 50.0, 1.0, 0.0]])
    mus = np.array([0.096])
    scratch = [np.empty(4), np.empty(4), np.empty(1), np.empty(1)]
    tau = K._optical_depth(1, kinds, params, mus, np.zeros((1, 1, 1)), np.zeros(3), np.ones(3),
                           -150.0, 0.0, 0.0, 1.0, 0.0, 0.0, 300.0, *scratch)
    assert math.exp(-tau) == pytest.approx(0.1466, abs=5e-5)
    # an oblique in-plane line at distance 60 mm: chord 2*sqrt(100^2 - 60^2) = 160 mm
    d = np.array([1.0, 1.0, 0.0]) / math.sqrt(2.0)
    start = np.array([60.0 / math.sqrt(2), -60.0 / math.sqrt(2), 0.0]) - 150.0 * d
    tau = K._optical_depth(1, kinds, params, mus, np.zeros((1, 1, 1)), np.zeros(3), np.ones(3),
                           *start, *d, 300.0, *scratch)
    assert tau == pytest.approx(0.0096 * 160.0, rel=1e-12)


def test_attenuation_survival_statistical():
    """Photon pairs from the centre of a 20 cm water cylinder along a diameter survive
    unscattered with probability exp(-0.096 * 20) = 0.1466 (NIST XCOM), within 3 standard errors."""
    kinds = np.array([K.CYLINDER], dtype=np.int32)
    params = np.array([[0.0, 0.0, 0.0, 100.0, 100.0, 50.0, 1.0, 0.0]])
    mus = np.array([0.096])
    n = 20_000
    survived = _pair_survivals(state_from_seed(11), kinds, params, mus, n)
    p = 0.1466
    assert abs(survived / n - p) < 3 * math.sqrt(p * (1 - p) / n)


def _pair_survivals(rng, kinds, params, mus, n):
    from numba import njit

    bound = _shape_bound(kinds, params, mus)

    @njit
    def run(rng, kinds, params, mus, n, bound):
        scratch_t = np.empty(4)
        scratch_mu = np.empty(4)
        t_in = np.empty(1)
        t_out = np.empty(1)
        grid = np.zeros((1, 1, 1))
        origin = np.zeros(3)
        voxel = np.ones(3)
        hits = 0
        for _ in range(n):
            a = K.transport_photon(rng, 1, kinds, params, mus, grid, origin, voxel, bound, 0.0, 0.0, 0.0,
                                   1.0, 0.0, 0.0, 150.0, 60.0, True, False, scratch_t, scratch_mu, t_in, t_out)[0]
            b = K.transport_photon(rng, 1, kinds, params, mus, grid, origin, voxel, bound, 0.0, 0.0, 0.0,
                                   -1.0, 0.0, 0.0, 150.0, 60.0, True, False, scratch_t, scratch_mu, t_in, t_out)[0]
            if a == 0 and b == 0:
                hits += 1
        return hits

    return run(rng, kinds, params, mus, n, bound)


def test_klein_nishina_total_cross_section():
    """sigma_KN at 511 keV = 2.86540e-25 cm^2 (references.md s.12, closed form of Klein & Nishina 1929)."""
    r_e_cm = 2.8179403262e-13  # CODATA classical electron radius
    assert 2 * math.pi * r_e_cm ** 2 * K._kn_total(1.0) == pytest.approx(2.86540e-25, rel=1e-5)


def test_klein_nishina_angles():
    """Sampled cos(theta) follows dsigma/dOmega = r_e^2/2 P^2 (P + 1/P - sin^2), P = 1/(2 - cos),
    for 511 keV photons (Klein & Nishina 1929; references.md s.12): chi-square over 20 bins."""
    from numba import njit

    @njit
    def draw(rng, n):
        out = np.empty(n)
        for i in range(n):
            out[i] = K.sample_klein_nishina_511(rng)
        return out

    n = 200_000
    cos_t = draw(state_from_seed(5), n)
    edges = np.linspace(-1, 1, 21)
    observed, _ = np.histogram(cos_t, edges)
    fine = np.linspace(-1, 1, 20001)
    p = 1 / (2 - fine)
    density = p * p * (p + 1 / p - (1 - fine ** 2))
    cdf = np.concatenate([[0], np.cumsum((density[1:] + density[:-1]) / 2 * np.diff(fine))])
    expected = np.diff(np.interp(edges, fine, cdf)) / cdf[-1] * n
    chi2 = ((observed - expected) ** 2 / expected).sum()
    assert chi2 < stats.chi2.ppf(0.999, 19)
    # E' = 511 / (2 - cos theta): 90 degrees gives 255.5 keV (references.md s.12)
    assert 511 / (2 - 0.0) == pytest.approx(255.5)


@pytest.mark.parametrize("isotope, half_life_min, duration_s", [
    ("C-11", 20.364, 3600.0),   # NNDC/ENSDF, references.md s.2
    ("F-18", 109.77, 21600.0),  # NNDC/ENSDF, references.md s.2
])
def test_counts_follow_half_life(tmp_path, isotope, half_life_min, duration_s):
    """Counts in 12 successive intervals decay with lambda = ln2 / T_half (NNDC half-lives):
    weighted log-linear fit of the slope within 3 standard errors."""
    lam = decay_constant_per_s(isotope)
    # about 700 000 annihilations over the whole acquisition
    phantom = point_phantom(tmp_path, 700_000.0 * lam / (1.0 - math.exp(-lam * duration_s)), isotope=isotope)
    out = tmp_path / "decay.parquet"
    simulate(phantom, out, seed=21, physics=BARE, duration_s=duration_s, chunk_s=duration_s / 24,
             write_truth=False)
    t_s = np.asarray(read_events(out)["time_ns"]) * 1e-9
    counts, edges = np.histogram(t_s, np.linspace(0, duration_s, 13))
    mid = 0.5 * (edges[1:] + edges[:-1])
    coeffs, cov = np.polyfit(mid, np.log(counts), 1, w=np.sqrt(counts), cov="unscaled")
    slope = coeffs[0]
    lam = math.log(2) / (half_life_min * 60)
    assert lam == pytest.approx(decay_constant_per_s(isotope), rel=1e-12)
    assert abs(-slope - lam) < 3 * math.sqrt(cov[0, 0])


def test_poisson_dispersion(tmp_path):
    """Counts of a long-lived source in 200 equal intervals: the index of dispersion
    sum((n - mean)^2 / mean) follows chi-square with 199 degrees of freedom (Poisson process;
    Fisher's dispersion test), so variance/mean is 1 within the 0.1 %..99.9 % quantiles."""
    phantom = point_phantom(tmp_path, 100_000.0, isotope="Ge-68")
    out = tmp_path / "poisson.parquet"
    simulate(phantom, out, seed=8, physics=BARE, duration_s=2.0, chunk_s=0.25, write_truth=False)
    t_s = np.asarray(read_events(out)["time_ns"]) * 1e-9
    counts, _ = np.histogram(t_s, np.linspace(0, 2.0, 201))
    dispersion = ((counts - counts.mean()) ** 2).sum() / counts.mean()
    assert stats.chi2.ppf(0.001, 199) < dispersion < stats.chi2.ppf(0.999, 199)
    assert 0.7 < counts.var(ddof=1) / counts.mean() < 1.3


def test_delayed_counts_match_singles_model(tmp_path):
    """Delayed-window counts equal sum over crystal pairs of 2 tau S_a S_b T
    (Cherry, Sorenson & Phelps; references.md s.3) within 3 standard errors, with S_c
    the singles rates recorded in the truth; the crystals of delayed events are
    distributed in proportion to S_c (sum S - S_c)."""
    scanner_path = tmp_path / "wide_window.toml"
    scanner_path.write_text(BENCHTOP.read_text().replace("coincidence_window_ns = 6.0",
                                                         "coincidence_window_ns = 1000.0"))
    phantom_path = tmp_path / "cyl.toml"
    phantom_path.write_text(f"""
name = "cylinder"
isotope = "F-18"
scanner = "{scanner_path}"
duration_s = 1.0
[[shape]]
type = "cylinder"
radius_mm = 30.0
length_mm = 20.0
activity_bq_per_ml = 8000.0
mu_per_cm = 0.096
""")
    out = tmp_path / "rand.parquet"
    physics = PhysicsOptions(non_collinearity=False, positron_range=False)
    result = simulate(load_phantom(phantom_path), out, seed=4, physics=physics, chunk_s=1.0)
    truth = json.loads(truth_paths_for(out)["json"].read_text())
    singles = np.asarray(truth["singles_per_crystal"], dtype=float)
    tau_s = 0.5 * 1000.0e-9
    duration = 1.0
    rates = singles / duration
    expected = tau_s * (rates.sum() ** 2 - (rates ** 2).sum()) * duration  # sum over a<b of 2 tau S_a S_b T
    events = read_events(out)
    delayed = np.asarray(events["delayed"])
    n_delayed = int(delayed.sum())
    assert n_delayed == result.counts["delayed"]
    assert expected > 2000
    assert abs(n_delayed - expected) < 3 * math.sqrt(expected)
    # prompts carry their own randoms with the same expectation
    assert abs(result.counts["randoms"] - expected) < 3 * math.sqrt(expected)
    # crystal marginal by ring: proportional to sum over the ring of S_c (sum S - S_c)
    rings = np.concatenate([np.asarray(events["crystal_a"])[delayed], np.asarray(events["crystal_b"])[delayed]]) // 128
    observed = np.bincount(rings, minlength=8)
    weight = (rates * (rates.sum() - rates)).reshape(8, 128).sum(axis=1)
    expected_rings = weight / weight.sum() * observed.sum()
    chi2 = ((observed - expected_rings) ** 2 / expected_rings).sum()
    assert chi2 < stats.chi2.ppf(0.999, 7)
    assert not np.any(np.asarray(events["crystal_a"])[delayed] == np.asarray(events["crystal_b"])[delayed])


def test_tof_sign_and_scale(tmp_path):
    """tof_ps = t_b - t_a, positive when the annihilation is nearer crystal a (data contract s.2);
    dt = 2 dx / c with c = 299.792458 mm/ns (SI definition)."""
    scanner_path = tmp_path / "tof.toml"
    scanner_path.write_text(BENCHTOP.read_text().replace("tof_fwhm_ps = 0.0", "tof_fwhm_ps = 0.001"))
    phantom = point_phantom(tmp_path, 50_000.0, centre=(40.0, 0.0, 0.0), scanner=scanner_path)
    out = tmp_path / "tof.parquet"
    simulate(phantom, out, seed=2, physics=BARE, write_truth=False)
    ev = read_events(out)
    assert pq.read_schema(out).field("tof_ps").type == "float"
    scanner = load_scanner(scanner_path)
    pos = scanner.crystal_positions_mm()
    source = np.array([40.0, 0.0, 0.0])
    d_a = np.linalg.norm(pos[np.asarray(ev["crystal_a"])] - source, axis=1)
    d_b = np.linalg.norm(pos[np.asarray(ev["crystal_b"])] - source, axis=1)
    predicted_ps = (d_b - d_a) / 299.792458 * 1000.0
    tof = np.asarray(ev["tof_ps"])
    # crystal centres differ from the hit points by up to half a crystal pitch (2.2 mm -> 7.4 ps)
    assert np.all(np.abs(tof - predicted_ps) < 16.0)
    assert np.mean(np.sign(tof) == np.sign(predicted_ps)) > 0.99
    assert np.abs(tof).max() > 200.0


def test_non_collinearity_blur_at_centre():
    """Non-collinearity of 0.5 degree FWHM blurs LORs through the centre by 0.0022 * D FWHM
    (references.md s.11, Phelps & Hoffman 1976): measured on a fine 4096-crystal ring."""
    n_crystals = 4096
    radius = 90.0
    n = 150_000
    zeros = np.zeros(n)
    empty = np.zeros(0, dtype=np.int32)
    out = K.detect_pairs(state_from_seed(9), zeros, zeros.copy(), zeros.copy(), zeros.copy(), 0, empty,
                         np.zeros((0, 8)), np.zeros(0), np.zeros((1, 1, 1)), np.zeros(3), np.ones(3),
                         np.array([1.0, 0.0, 1.0, 0.0]), radius, 50.0, 1.0, 100, n_crystals, 0.0,
                         False, False, K_SIGMA, np.ones(100 * n_crystals), 0.0, 0.0, 1e9, 0.0, 0.0, 1.0)
    ja = out[1] % n_crystals
    jb = out[2] % n_crystals
    angle = 2 * np.pi / n_crystals
    s = radius * np.cos((ja - jb) * angle / 2.0)   # signed distance of the chord from the centre
    fwhm = 2.0 * math.sqrt(2.0 * math.log(2.0)) * np.std(s)
    assert fwhm == pytest.approx(0.0022 * 2 * radius, rel=0.08)


K_SIGMA = math.radians(0.5) / (2.0 * math.sqrt(2.0 * math.log(2.0)))


def test_same_seed_same_file(tmp_path):
    """Determinism: the same seed and inputs give byte-identical events; another seed differs."""
    path = ROOT / "configs" / "phantoms" / "benchtop_inserts.toml"
    phantom = load_phantom(path)
    files = []
    for name, seed in (("a.parquet", 5), ("b.parquet", 5), ("c.parquet", 6)):
        out = tmp_path / name
        simulate(phantom, out, seed=seed, duration_s=0.03, chunk_s=0.01, write_truth=False)
        files.append(out.read_bytes())
    assert files[0] == files[1]
    assert files[0] != files[2]


def test_contract_file_and_truth(tmp_path):
    """Event file columns, types and metadata of data contract s.2; events in time order;
    truth counts add up to the rows written."""
    path = ROOT / "configs" / "phantoms" / "benchtop_inserts.toml"
    out = tmp_path / "scan.parquet"
    result = simulate(load_phantom(path), out, seed=1, duration_s=0.2, chunk_s=0.1)
    schema = pq.read_schema(out)
    types = {f.name: str(f.type) for f in schema}
    assert types == {"time_ns": "int64", "crystal_a": "int32", "crystal_b": "int32", "delayed": "bool",
                     "energy_a_kev": "float", "energy_b_kev": "float"}
    meta = json.loads(schema.metadata[b"twinray"])
    assert meta["schema_version"] == 1 and meta["isotope"] == "F-18" and meta["duration_s"] == 0.2
    assert meta["scanner"]["rings"] == 8 and meta["acquisition_start"].startswith("2026-03-02T10:00")
    # the activity it holds: background and hot spheres with the inserts cut out (pi r^2 L, 4/3 pi r^3)
    sphere = lambda r: 4.0 / 3.0 * math.pi * r ** 3 / 1000.0  # noqa: E731
    background_ml = math.pi * 40 ** 2 * 24 / 1000 - 2 * sphere(7.0) - sphere(4.0) - math.pi * 5 ** 2 * 24 / 1000
    expected_bq = 25_000.0 * background_ml + 100_000.0 * (sphere(7.0) + sphere(4.0))
    # injected 45 min before the start: decayed back with the F-18 half-life (NNDC 109.77 min)
    assert meta["injection_time"] == "2026-03-02T09:15:00+00:00"
    assert meta["injected_activity_bq"] == pytest.approx(expected_bq * 2 ** (45 / 109.77), rel=5e-3)
    ev = read_events(out)
    t = np.asarray(ev["time_ns"])
    assert np.all(np.diff(t) >= 0) and t.min() >= 0 and t.max() < 0.2e9
    c = result.counts
    assert len(t) == c["events_written"] == c["trues"] + c["scatters"] + c["randoms"] + c["delayed"]
    assert int(np.sum(ev["delayed"])) == c["delayed"]
    assert c["scatters"] > 0 and c["trues"] > c["scatters"]
    truth = truth_paths_for(out)
    assert all(p.is_file() for p in truth.values())
    import nibabel as nib

    img = nib.load(str(truth["activity"]))
    assert img.header.get_sform(coded=True)[1] == 1
    data = img.get_fdata()
    voxel_ml = abs(np.prod(np.diag(img.affine)[:3])) / 1000.0
    assert data.sum() * voxel_ml == pytest.approx(expected_bq, rel=0.02)
    # energies: photopeak near 511 keV, scatter below it
    ea = np.asarray(ev["energy_a_kev"])
    assert 490 < np.median(ea) < 530 and ea.min() >= 300.0


def _cli(argv, capsys):
    code = main(argv)
    captured = capsys.readouterr()
    return code, captured.out, captured.err


@pytest.mark.parametrize("edit, pattern", [
    (lambda t: t.replace('name = "t"', 'name = "t"\ncolour = "red"'), "unknown key(s) colour"),
    (lambda t: t.replace("activity_bq_per_ml = 1000.0", "activity_bq_per_ml = -1.0"), "activity_bq_per_ml must be >= 0"),
    (lambda t: t.replace("radius_mm = 40.0", "radius_mm = 120.0"), "outside the field of view"),
    (lambda t: t.replace('isotope = "F-18"', 'isotope = "Qq-1"'), "unknown isotope 'Qq-1'"),
])
def test_bad_phantom_one_error_line(tmp_path, capsys, edit, pattern):
    """Bad phantoms end with one 'error:' line naming the file (CLI contract), no output written."""
    text = f"""name = "t"
isotope = "F-18"
scanner = "{BENCHTOP}"
duration_s = 0.1
[[shape]]
type = "cylinder"
radius_mm = 40.0
length_mm = 20.0
activity_bq_per_ml = 1000.0
"""
    path = tmp_path / "bad.toml"
    path.write_text(edit(text))
    out = tmp_path / "ev.parquet"
    code, stdout, stderr = _cli(["simulate", str(path), "-o", str(out)], capsys)
    lines = stderr.strip().splitlines()
    assert code != 0 and len(lines) == 1
    assert lines[0].startswith("error: ") and pattern in lines[0] and "bad.toml" in lines[0]
    assert "Traceback" not in stderr and not out.exists()


def test_cli_json_and_overrides(tmp_path, capsys):
    phantom = point_phantom(tmp_path, 20_000.0)
    out = tmp_path / "p.parquet"
    code, stdout, stderr = _cli(["simulate", str(phantom.path), "-o", str(out), "--duration", "0.5",
                                 "--no-randoms", "--no-delayed", "--seed", "3", "--json"], capsys)
    assert code == 0, stderr
    doc = json.loads(stdout)
    assert doc["accounting"]["randoms"] == 0 and doc["accounting"]["delayed"] == 0
    assert str(out) in doc["outputs"] and doc["seed"] == 3
    assert pq.ParquetFile(out).metadata.num_rows == doc["accounting"]["events_written"]
    # refuses to overwrite its input
    code, _, stderr = _cli(["simulate", str(phantom.path), "-o", str(tmp_path / "point.parquet"),
                            "--scanner", str(tmp_path / "missing.toml")], capsys)
    assert code != 0 and stderr.startswith("error:") and "missing.toml" in stderr


def test_voxel_phantom_matches_analytic(tmp_path):
    """A voxel phantom (NIfTI activity + mu-map, Siddon ray tracing) of a water cylinder gives the
    same detected fraction as the analytic chords of the same cylinder (within 4 standard errors
    plus 1 % for voxelization), and a fraction below the geometric acceptance by about the mean
    water attenuation."""
    from twinray.images import centred_affine, write_image
    from twinray.simulate import rasterize

    text = f"""
name = "cyl"
isotope = "F-18"
scanner = "{BENCHTOP}"
duration_s = 0.25
[[shape]]
type = "cylinder"
radius_mm = 30.0
length_mm = 20.0
activity_bq_per_ml = 20000.0
mu_per_cm = 0.096
"""
    analytic_path = tmp_path / "analytic.toml"
    analytic_path.write_text(text)
    analytic = load_phantom(analytic_path)
    shape = (35, 35, 12)
    affine = centred_affine(shape, 2.0)
    activity, mu = rasterize(analytic.shapes, shape, affine)
    write_image(tmp_path / "act.nii.gz", activity, affine)
    write_image(tmp_path / "mu.nii.gz", mu, affine)
    voxel_path = tmp_path / "voxel.toml"
    voxel_path.write_text(text.split("[[shape]]")[0] + '[voxel]\nactivity = "act.nii.gz"\nmu = "mu.nii.gz"\n')
    physics = PhysicsOptions(scatter=False, randoms=False, delayed=False, non_collinearity=False,
                             positron_range=False, efficiency_spread=0.0, energy_resolution_fwhm=0.0)
    fractions = []
    for phantom, name in ((analytic, "a.parquet"), (load_phantom(voxel_path), "v.parquet")):
        result = simulate(phantom, tmp_path / name, seed=12, physics=physics, write_truth=False)
        fractions.append((result.counts["trues"], result.counts["annihilations"]))
    (ta, na), (tv, nv) = fractions
    fa, fv = ta / na, tv / nv
    se = math.sqrt(fa * (1 - fa) / na + fv * (1 - fv) / nv)
    assert abs(fa - fv) < 4 * se + 0.01 * fa
    assert nv == pytest.approx(na, rel=0.02)
    assert fa < 0.75 * 0.1408


def test_time_activity_curve_shapes_the_count_rate(tmp_path):
    """A triangular time-activity curve (0 -> 1 -> 0 over 2 s, linear interpolation) on a
    long-lived source: counts in 10 bins match the integral of the curve (chi-square, 9 dof)."""
    volume_ml = 4.0 / 3.0 * math.pi * 0.1 ** 3 / 1000.0
    path = tmp_path / "tac.toml"
    path.write_text(f"""
name = "tac"
isotope = "Ge-68"
scanner = "{BENCHTOP}"
duration_s = 2.0
[[shape]]
type = "sphere"
radius_mm = 0.1
activity_bq_per_ml = {300_000.0 / volume_ml}
tac = {{ times_s = [0.0, 1.0, 2.0], values = [0.0, 1.0, 0.0] }}
""")
    out = tmp_path / "tac.parquet"
    simulate(load_phantom(path), out, seed=6, physics=BARE, chunk_s=0.3, write_truth=False)
    t_s = np.asarray(read_events(out)["time_ns"]) * 1e-9
    edges = np.linspace(0.0, 2.0, 11)
    observed, _ = np.histogram(t_s, edges)
    triangle_cdf = np.where(edges <= 1.0, edges ** 2 / 2, 1.0 - (2.0 - edges) ** 2 / 2)
    expected = np.diff(triangle_cdf) * len(t_s)
    chi2 = ((observed - expected) ** 2 / expected).sum()
    assert chi2 < stats.chi2.ppf(0.999, 9)


def test_dynamic_truth_images(tmp_path):
    """With time-activity curves the truth activity image holds the reference concentrations,
    and the label image marks each shape."""
    import nibabel as nib

    out = tmp_path / "dyn.parquet"
    simulate(load_phantom(ROOT / "configs" / "phantoms" / "dynamic_insert.toml"), out, seed=1, duration_s=0.5)
    truth = truth_paths_for(out)
    activity = nib.load(str(truth["activity"]))
    labels = np.asarray(nib.load(str(truth["labels"])).dataobj)
    doc = json.loads(truth["json"].read_text())
    names = [s["name"] for s in doc["shapes"]]
    centre = np.round(np.linalg.solve(activity.affine, [12.0, 8.0, 0.0, 1.0])[:3]).astype(int)
    assert labels[tuple(centre)] == names.index("lesion") + 1
    assert activity.get_fdata()[tuple(centre)] == pytest.approx(doc["shapes"][names.index("lesion")]["activity_bq_per_ml"])
    assert doc["shapes"][names.index("vessel")]["tac"]["values"][2] == 1.0


def test_pair_acceptance_is_product_of_efficiencies(tmp_path):
    """Each photon is detected independently with probability proportional to its crystal's
    efficiency (binomial thinning, Kingman's colouring theorem; references.md s.10), so the pair
    counts of opposite crystals divided by eps_a * eps_b are equal within each ring pair
    (chi-square over crystal positions)."""
    phantom = point_phantom(tmp_path, 1_500_000.0, isotope="Ge-68")
    out = tmp_path / "eff.parquet"
    physics = dataclasses_replace(BARE, efficiency_spread=0.3)
    result = simulate(phantom, out, seed=17, physics=physics)
    truth = json.loads(truth_paths_for(out)["json"].read_text())
    eps = np.asarray(truth["crystal_efficiency"])
    assert eps.mean() == pytest.approx(1.0, rel=1e-6) and eps.std() > 0.2
    ev = read_events(out)
    a = np.asarray(ev["crystal_a"])
    b = np.asarray(ev["crystal_b"])
    lo, hi = np.minimum(a, b), np.maximum(a, b)
    n = 128
    # from the centre (0.1 mm sphere), the partner is the opposite crystal in the mirrored ring,
    # except for lines within 0.1 mm of a crystal or ring boundary
    opposite = (hi % n == (lo % n + n // 2) % n) & (hi // n == 7 - lo // n)
    assert opposite.mean() > 0.9
    lo = lo[opposite]
    for ring in range(4):
        sel = lo // n == ring
        if sel.sum() < 2000:
            continue
        counts = np.bincount(lo[sel] % n, minlength=n)
        ca = ring * n + np.arange(n)
        cb = (7 - ring) * n + (np.arange(n) + n // 2) % n
        weight = eps[ca] * eps[cb]
        # pairs (j, j + N/2) and (j + N/2, j) are the same line: fold them
        folded = counts[: n // 2] + counts[n // 2:]
        w = weight[: n // 2] + weight[n // 2:]
        expected = w / w.sum() * folded.sum()
        chi2 = ((folded - expected) ** 2 / expected).sum()
        assert chi2 < stats.chi2.ppf(0.999, n // 2 - 1), ring
    assert result.counts["trues"] == len(a)


def dataclasses_replace(obj, **changes):
    import dataclasses

    return dataclasses.replace(obj, **changes)


def test_emission_points_uniform_in_shapes():
    """Points are uniform inside each shape (volume fractions of the inner half-size shape:
    1/8 for an ellipsoid, 1/4 for a cylinder's inner radius, elementary geometry) and none
    fall where a later shape replaces the earlier one."""
    rot = math.radians(30.0)
    params = np.array([
        [0.0, 0.0, 0.0, 30.0, 30.0, 10.0, 1.0, 0.0],                       # cylinder
        [0.0, 20.0, 0.0, 4.0, 4.0, 4.0, 1.0, 0.0],                          # box replacing part of it
        [85.0, -3.0, 1.0, 20.0, 10.0, 6.0, math.cos(rot), math.sin(rot)],  # ellipsoid, apart
    ])
    kinds = np.array([K.CYLINDER, K.BOX, K.ELLIPSOID], dtype=np.int32)
    n = 200_000
    xs, ys, zs, ts, which = K.emit_from_shapes(
        state_from_seed(3), kinds, params, np.array([n, 0, n], dtype=np.int64), np.ones(3), np.zeros((3, 1)), np.zeros((3, 1)),
        np.zeros(3, dtype=np.int64), 1e-4, 0.0, 1.0, 0.0, 0.0)
    e = which == 2
    assert e.sum() > 0.99 * n
    dx, dy = xs[e] - 85.0, ys[e] + 3.0
    u = dx * math.cos(rot) + dy * math.sin(rot)
    v = -dx * math.sin(rot) + dy * math.cos(rot)
    w = zs[e] - 1.0
    r2 = (u / 20) ** 2 + (v / 10) ** 2 + (w / 6) ** 2
    assert r2.max() <= 1.0 + 1e-12
    assert abs(np.mean(r2 <= 0.25) - 0.125) < 3 * math.sqrt(0.125 * 0.875 / e.sum())
    c = which == 0
    rho2 = (xs[c] ** 2 + ys[c] ** 2) / 30.0 ** 2
    assert rho2.max() <= 1.0 + 1e-12 and np.abs(zs[c]).max() <= 10.0
    assert not np.any((np.abs(xs[c]) <= 4) & (np.abs(ys[c] - 20) <= 4) & (np.abs(zs[c]) <= 4))
    # the box removes 8*4*4*4... of the cylinder's volume pi*30^2*20 from the kept points
    kept = c.sum() / n
    expected = 1.0 - 8 * 4.0 ** 3 / (math.pi * 30.0 ** 2 * 20.0)
    assert abs(kept - expected) < 4 * math.sqrt(expected * (1 - expected) / n) + 3 / math.sqrt(n)
    # times follow exp(-lambda t) within the step: mean below the midpoint by lambda/12 (Taylor)
    assert abs(ts.mean() - (0.5 - 1e-4 / 12)) < 4 * math.sqrt(1 / 12 / len(ts))


def test_xoshiro256starstar_reference_outputs():
    """The kernels' generator is xoshiro256** (Blackman & Vigna, ACM Trans. Math. Softw. 47(4):36, 2021).
    From the state (1, 2, 3, 4) the authors' reference C code gives the ten outputs below (the published
    test vector, quoted from memory; the first is rotl(2 * 5, 7) * 9 = 11520 by hand)."""
    from twinray.simulate._rng import next_u64

    state = np.array([1, 2, 3, 4], dtype=np.uint64)
    got = [int(next_u64(state)) for _ in range(10)]
    assert got == [11520, 0, 1509978240, 1215971899390074240, 1216172134540287360, 607988272756665600,
                   16172922978634559625, 8476171486693032832, 10595114339597558777, 2904607092377533576]


def _draw_samples(n):
    from numba import njit

    from twinray.simulate._rng import exponential, in_ball, isotropic, normal_pair, uniform

    @njit
    def draw(rng, n):
        out = np.empty((n, 9))
        for i in range(n):
            out[i, 0] = uniform(rng)
            out[i, 1] = exponential(rng)
            out[i, 2], out[i, 3] = normal_pair(rng)
            out[i, 4], out[i, 5], out[i, 6] = isotropic(rng)
            x, y, z = in_ball(rng)
            out[i, 7] = x * x + y * y + z * z
            out[i, 8] = z
        return out

    return draw(state_from_seed(123), n)


def test_samplers_follow_their_distributions():
    """Kolmogorov-Smirnov tests (scipy.stats) of the kernels' samplers: uniform on [0, 1); exponential(1);
    both deviates of a polar-method pair standard normal (Marsaglia & Bray 1964) and uncorrelated;
    isotropic directions with z uniform on [-1, 1] and a uniform azimuth (Archimedes' hat-box theorem,
    Marsaglia 1972); points in the unit ball with r^3 uniform and z of density 3/4 (1 - z^2)."""
    n = 100_000
    s = _draw_samples(n)
    p_min = 1e-4
    assert stats.kstest(s[:, 0], "uniform").pvalue > p_min
    assert stats.kstest(s[:, 1], "expon").pvalue > p_min
    assert stats.kstest(s[:, 2], "norm").pvalue > p_min
    assert stats.kstest(s[:, 3], "norm").pvalue > p_min
    assert abs(np.corrcoef(s[:, 2], s[:, 3])[0, 1]) < 4 / math.sqrt(n)
    assert np.allclose(s[:, 4] ** 2 + s[:, 5] ** 2 + s[:, 6] ** 2, 1.0, atol=1e-12)
    assert stats.kstest(s[:, 6], stats.uniform(-1, 2).cdf).pvalue > p_min
    assert stats.kstest(np.arctan2(s[:, 5], s[:, 4]), stats.uniform(-math.pi, 2 * math.pi).cdf).pvalue > p_min
    r3 = s[:, 7] ** 1.5
    assert r3.max() <= 1.0 and stats.kstest(r3, "uniform").pvalue > p_min
    # z of a uniform point in the unit ball has density 3/4 (1 - z^2), CDF (2 + 3z - z^3) / 4
    assert stats.kstest(s[:, 8], lambda z: (2 + 3 * z - z ** 3) / 4).pvalue > p_min


def test_depth_bound_is_never_below_the_exact_depth():
    """The attenuation shortcut is exact only if the bound is >= the exact optical depth for every path:
    checked on 20 000 random paths from points in and around the benchtop_inserts phantom."""
    phantom = load_phantom(ROOT / "configs" / "phantoms" / "benchtop_inserts.toml")
    from twinray.simulate.simulator import _prepare_source

    src = _prepare_source(phantom, load_scanner(BENCHTOP), PhysicsOptions())
    rng = np.random.default_rng(0)
    scratch = [np.empty(2 * len(src.kinds) + 2), np.empty(2 * len(src.kinds) + 2),
               np.empty(len(src.kinds)), np.empty(len(src.kinds))]
    positive = 0
    for _ in range(20_000):
        p = rng.uniform([-50, -50, -15], [50, 50, 15])
        d = rng.normal(size=3)
        d /= np.linalg.norm(d)
        t_end = K.cylinder_exit(p[0], p[1], d[0], d[1], 90.0)
        if t_end < 0:
            continue
        exact = K._optical_depth(1, src.kinds, src.params, src.mus, src.grid, src.origin, src.voxel,
                                 *p, *d, t_end, *scratch)
        bound = K.depth_bound(*src.bound, *p, *d, t_end)
        assert bound >= exact
        positive += exact > 0
    assert positive > 5000


def test_detection_cone_split_leaves_the_counts_unchanged(tmp_path, monkeypatch):
    """Following only the pairs inside the detection cone (the rest split off as an independent Poisson
    count: thinning of a Poisson process, Kingman, Poisson Processes, 1993, ch. 5) gives the same
    annihilations, trues, singles and singles per ring as following every pair: an off-centre F-18 point
    with positron range and non-collinearity, in air, two independent runs within 4 standard errors."""
    import dataclasses

    from twinray.simulate import simulator

    phantom = point_phantom(tmp_path, 400_000.0, centre=(30.0, -10.0, 9.0))
    physics = dataclasses.replace(BARE, non_collinearity=True, positron_range=True, randoms=True)
    src = simulator._prepare_source(phantom, load_scanner(BENCHTOP), physics)
    cone = simulator.detection_cone(src, load_scanner(BENCHTOP), physics, 0.6, K_SIGMA)
    assert 0.1 < cone < 1.0
    runs = []
    for name, force in (("cut.parquet", False), ("all.parquet", True)):
        if force:
            monkeypatch.setattr(simulator, "detection_cone", lambda *a: 1.0)
        out = tmp_path / name
        result = simulate(phantom, out, seed=31 if force else 32, physics=physics)
        truth = json.loads(truth_paths_for(out)["json"].read_text())
        rings = np.asarray(truth["singles_per_crystal"]).reshape(8, 128).sum(axis=1)
        runs.append((result.counts, rings))
    (a, ra), (b, rb) = runs
    for key in ("annihilations", "trues", "singles", "randoms"):
        assert abs(a[key] - b[key]) < 4 * math.sqrt(a[key] + b[key]) + 1, key
    assert a["trues"] > 10_000
    assert np.all(np.abs(ra - rb) < 4 * np.sqrt(ra + rb) + 1)
