"""``twinray normalize`` and the correction options of ``twinray sinogram``, through the command line."""

import hashlib
import json

import numpy as np
import pytest

from twinray.cli.main import main
from twinray.corrections.normalization import NormalizationSource, source_line_integrals
from twinray.event_writer import write_events
from twinray.geometry import sinogram_geometry
from twinray.images import write_image
from twinray.sinogram_io import read_sinogram_file

from test_corrections_common import all_pairs, events_of, small_scanner


def run(capsys, *argv):
    code = main([str(a) for a in argv])
    out, err = capsys.readouterr()
    return code, out, err


def one_error_line(code, err):
    assert code != 0
    lines = [line for line in err.splitlines() if line.strip()]
    assert len(lines) == 1 and lines[0].startswith("error:"), err
    assert "Traceback" not in err


def digest(path):
    return hashlib.sha256(path.read_bytes()).hexdigest()


@pytest.fixture(scope="module")
def study(tmp_path_factory):
    """A normalization scan (water cylinder source) and an emission scan of the same small scanner."""
    tmp = tmp_path_factory.mktemp("norm_cli")
    scanner = small_scanner(rings=3, crystals=64, radius=60.0)
    g = sinogram_geometry(scanner)
    rng = np.random.default_rng(4)
    pairs = all_pairs(g)
    eps = rng.lognormal(0.0, 0.1, scanner.n_crystals)
    det = eps[pairs["a"]] * eps[pairs["b"]]
    src = NormalizationSource("cylinder", 45.0, 0.096)
    lam = det * source_line_integrals(g, src)[pairs["dr"], pairs["radial"]]
    lam *= 1.2e6 / lam.sum()
    rnd = np.full(len(lam), 0.05 * 1.2e6 / len(lam))
    p = events_of(pairs, rng.poisson(lam + rnd), rng, delayed=np.zeros(len(lam), bool))
    d = events_of(pairs, rng.poisson(rnd), rng, delayed=np.ones(len(lam), bool))
    cols = {k: np.concatenate([p[k], d[k]]) for k in p}
    n = len(cols["crystal_a"])
    cols["time_ns"] = np.sort(rng.integers(0, 10 ** 10, n))
    meta = {"scanner": scanner.to_dict(), "isotope": "Ge-68", "duration_s": 10.0,
            "acquisition_start": "2026-01-01T00:00:00+00:00",
            "normalization_source": {"shape": "cylinder", "radius_mm": 45.0, "mu_per_cm": 0.096}}
    norm_scan = write_events(tmp / "normscan.parquet", cols, meta)

    # Emission: a small water cylinder (radius 20 mm) plus randoms, F-18.
    s = g.radial_positions_mm[pairs["radial"]]
    L = 2 * np.sqrt(np.clip(20.0 ** 2 - s ** 2, 0, None))
    trues = det * L * np.exp(-0.0096 * L)
    trues *= 4e5 / trues.sum()
    rnd = np.full(len(lam), 0.2 * 4e5 / len(lam))
    p = events_of(pairs, rng.poisson(trues + rnd), rng, delayed=np.zeros(len(lam), bool))
    d = events_of(pairs, rng.poisson(rnd), rng, delayed=np.ones(len(lam), bool))
    order = rng.permutation(len(p["crystal_a"]) + len(d["crystal_a"]))
    cols = {k: np.concatenate([p[k], d[k]])[order] for k in p}
    cols["time_ns"] = np.sort(rng.integers(0, 60 * 10 ** 9, len(cols["crystal_a"])))
    meta = {"scanner": scanner.to_dict(), "isotope": "F-18", "duration_s": 60.0,
            "acquisition_start": "2026-01-01T01:00:00+00:00"}
    emission = write_events(tmp / "scan.parquet", cols, meta)
    no_delayed = write_events(tmp / "prompts_only.parquet", {k: v for k, v in cols.items() if k != "delayed"}, meta)

    n_vox, v = 64, 1.5
    c = (np.arange(n_vox) - (n_vox - 1) / 2) * v
    x, y = np.meshgrid(c, c, indexing="ij")
    mu = np.repeat((0.096 * (x ** 2 + y ** 2 <= 20.0 ** 2))[:, :, None], 4, axis=2).astype(np.float32)
    aff = np.diag([v, v, 4.0, 1.0])
    aff[:3, 3] = [c[0], c[0], -6.0]
    write_image(tmp / "mu.nii.gz", mu, aff)
    write_image(tmp / "hu.nii.gz", (mu / 0.096 * 1000 - 1000).astype(np.float32), aff)
    return {"tmp": tmp, "g": g, "eps": eps, "norm_scan": norm_scan, "emission": emission,
            "no_delayed": no_delayed, "mu": tmp / "mu.nii.gz", "hu": tmp / "hu.nii.gz"}


def test_normalize_writes_contract_file(capsys, study):
    out = study["tmp"] / "norm.h5"
    before = digest(study["norm_scan"])
    code, stdout, err = run(capsys, "normalize", study["norm_scan"], "-o", out, "--json")
    assert code == 0, err
    result = json.loads(stdout)
    assert result["outputs"] == [str(out)]
    acc = result["accounting"]
    assert acc["read"] == acc["prompts_binned"] + acc["delayed_binned"] + sum(
        v for k, v in acc.items() if k.startswith("rejected_"))
    f = read_sinogram_file(out)
    eff = f.arrays["crystal_efficiency"]
    assert eff.shape == (study["g"].scanner.n_crystals,) and eff.mean() == pytest.approx(1.0, rel=1e-6)
    # Fan-sum recovers the simulated efficiencies (issue 4; references.md s.3 oracle).
    assert np.corrcoef(eff, study["eps"])[0, 1] >= 0.95
    assert f.arrays["norm"].shape == study["g"].shape
    for key in ("view_angles_rad", "radial_positions_mm", "plane_z_mm", "plane_ring_difference", "scanner"):
        assert key in f.attrs
    assert digest(study["norm_scan"]) == before


def test_sinogram_with_every_correction(capsys, study):
    norm = study["tmp"] / "norm.h5"
    if not norm.exists():
        assert run(capsys, "normalize", study["norm_scan"], "-o", norm)[0] == 0
    out = study["tmp"] / "corrected.h5"
    code, stdout, err = run(capsys, "sinogram", study["emission"], "-o", out, "--norm", norm, "--mu", study["mu"],
                            "--randoms", "delayed", "--scatter", "tail-fit", "--frame", "0:30", "--json")
    assert code == 0, err
    result = json.loads(stdout)
    assert "corrections" in result["timings_s"]
    f = read_sinogram_file(out)
    a = f.arrays
    assert set(a) >= {"prompts", "delayed", "randoms", "scatter", "norm", "acf", "corrected"}
    np.testing.assert_allclose(a["corrected"], a["norm"] * a["acf"] * (a["prompts"] - a["randoms"] - a["scatter"]),
                               rtol=1e-4, atol=1e-3)
    assert a["randoms"].sum() == pytest.approx(a["delayed"].sum(), rel=1e-5)
    assert np.all(a["acf"] >= 1.0)
    # Decay factor of the frame 0-30 s, F-18, to the acquisition start (lambda*dt/(1-exp(-lambda*dt))).
    lam = np.log(2) / (109.77 * 60)
    assert f.attrs["decay_correction_factor"] == pytest.approx(lam * 30 / (1 - np.exp(-lam * 30)), rel=1e-9)
    assert f.attrs["corrections"]["randoms"] == "delayed"
    # The corrected profile follows the cylinder's chord 2*sqrt(r^2 - s^2) (Kak & Slaney ch. 3) within noise.
    s = f.geometry.radial_positions_mm
    inside = np.abs(s) < 17
    prof = a["corrected"].mean(axis=(0, 1))
    want = 2 * np.sqrt(20.0 ** 2 - s[inside] ** 2)
    k = prof[inside].sum() / want.sum()
    assert np.max(np.abs(prof[inside] / (k * want) - 1)) < 0.08


def test_plain_sinogram_keeps_only_binned_data(capsys, study):
    out = study["tmp"] / "plain.h5"
    code, _, err = run(capsys, "sinogram", study["emission"], "-o", out)
    assert code == 0, err
    assert set(read_sinogram_file(out).arrays) == {"prompts", "delayed"}


def test_correction_errors_are_one_line(capsys, study):
    tmp = study["tmp"]
    norm = tmp / "norm.h5"
    if not norm.exists():
        assert run(capsys, "normalize", study["norm_scan"], "-o", norm)[0] == 0
    out = tmp / "bad.h5"
    before = digest(study["emission"])
    for argv, match in (
        (["--norm", norm, "--rebin", "ssrb"], "another sinogram geometry"),
        (["--mu", study["hu"]], "Hounsfield"),
        (["--scatter", "tail-fit"], "--mu"),
        (["--randoms", "singles"], "--singles"),
        (["--deadtime-ns", "100"], "--singles"),
        (["--norm", tmp / "missing.h5"], "does not exist"),
        (["--norm", study["emission"]], "HDF5"),
        (["--randoms", "fancy"], "fancy"),
    ):
        code, _, err = run(capsys, "sinogram", study["emission"], "-o", out, *argv)
        one_error_line(code, err)
        assert match in err, (argv, err)
    code, _, err = run(capsys, "sinogram", study["no_delayed"], "-o", out, "--randoms", "delayed")
    one_error_line(code, err)
    assert "delayed" in err
    assert not out.exists()
    assert digest(study["emission"]) == before


def test_normalize_errors_are_one_line(capsys, study):
    tmp = study["tmp"]
    for argv, match in (
        ([study["emission"], "-o", tmp / "n.h5"], "normalization_source"),
        ([study["norm_scan"], "-o", study["norm_scan"]], "overwrite"),
        ([study["emission"], "-o", tmp / "n.h5", "--source-shape", "flood"], "--source-radius-mm"),
        ([tmp / "nothing.parquet", "-o", tmp / "n.h5"], "does not exist"),
    ):
        code, _, err = run(capsys, "normalize", *argv)
        one_error_line(code, err)
        assert match in err, (argv, err)
    # An explicit source makes any scan usable.
    code, _, err = run(capsys, "normalize", study["emission"], "-o", tmp / "n.h5", "--source-shape", "flood",
                       "--source-radius-mm", "40", "-q")
    assert code == 0, err
