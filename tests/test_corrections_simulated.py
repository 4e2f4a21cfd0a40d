"""Corrections on data from the project's simulator (efficiencies, randoms, attenuation, scatter).

A small 4-ring scanner keeps this to two short simulations: a normalization
scan (water cylinder source, radius 50 mm) and an emission scan of a water
cylinder of radius 30 mm, both filling the axial field of view.
"""

import json
import math
from pathlib import Path

import numpy as np
import pytest

from twinray.corrections.apply import CorrectionOptions
from twinray.corrections.normalization import make_normalization
from twinray.simulate import load_phantom
from twinray.simulate.simulator import simulate
from twinray.sinogram import make_sinogram
from twinray.sinogram_io import read_sinogram_file

SCANNER = """
name = "test-4r96"
rings = 4
crystals_per_ring = 96
radius_mm = 70.0
axial_pitch_mm = 4.0
coincidence_window_ns = 6.0
energy_window_kev = [425.0, 650.0]
[sinogram]
radial_bins = 63
"""

PHANTOM = """
name = "{name}"
isotope = "F-18"
scanner = "scanner.toml"
duration_s = {duration}
acquisition_start = "2026-03-01T18:00:00+00:00"
{extra}
[[shape]]
name = "water"
type = "cylinder"
radius_mm = {radius}
length_mm = 16.0
activity_bq_per_ml = {activity}
mu_per_cm = 0.096
"""


@pytest.fixture(scope="module")
def simulated(tmp_path_factory):
    tmp = tmp_path_factory.mktemp("simulated")
    (tmp / "scanner.toml").write_text(SCANNER)
    (tmp / "norm.toml").write_text(PHANTOM.format(
        name="norm cylinder", duration=2.0, radius=50.0, activity=20000.0,
        extra='normalization_source = { shape = "cylinder", radius_mm = 50.0, mu_per_cm = 0.096 }'))
    (tmp / "scan.toml").write_text(PHANTOM.format(name="water cylinder", duration=2.0, radius=30.0,
                                                  activity=90000.0, extra=""))
    simulate(load_phantom(tmp / "norm.toml"), tmp / "norm.parquet", seed=11)
    simulate(load_phantom(tmp / "scan.toml"), tmp / "scan.parquet", seed=12)
    return tmp


def test_fan_sum_efficiencies_reach_the_poisson_limit(simulated):
    """Fan-sum estimate vs the simulator's crystal efficiencies (Defrise 1991; references.md s.3).

    With relative efficiency spread s and about F counts per crystal fan the
    estimate's noise is 1/sqrt(F), so the best possible correlation is
    s / sqrt(s^2 + 1/F); the estimate must come within 0.03 of it.
    """
    result = make_normalization(simulated / "norm.parquet", simulated / "norm.h5")
    truth = np.array(json.loads((simulated / "norm_truth.json").read_text())["crystal_efficiency"])
    est = result.fit.crystal_efficiency
    fan = 2.0 * result.accounting.prompts_binned / truth.size
    spread = np.std(truth / truth.mean())
    best = spread / math.sqrt(spread ** 2 + 1.0 / fan)
    assert np.corrcoef(est, truth)[0, 1] >= best - 0.03


def test_corrected_cylinder_matches_analytic_projection(simulated):
    """Corrected profile vs 2*sqrt(r^2 - s^2) (Kak & Slaney ch. 3), within 5 % inside the object.

    Averaged over views and planes, folded about s = 0, and compared after one
    scale factor (the simulation's absolute sensitivity is not modelled by the
    corrections). About 130 000 prompts keep the noise of a profile point
    near 1.5 %.
    """
    if not (simulated / "norm.h5").exists():
        make_normalization(simulated / "norm.parquet", simulated / "norm.h5")
    res = make_sinogram(simulated / "scan.parquet", simulated / "scan.h5",
                        corrections=CorrectionOptions(randoms="delayed", scatter="tail-fit"),
                        norm=simulated / "norm.h5", mu=simulated / "scan_truth_mu.nii.gz")
    f = read_sinogram_file(res.output)
    s = f.geometry.radial_positions_mm
    profile = f.arrays["corrected"].mean(axis=(0, 1))
    # The cylinder is centred: fold the profile (radial positions are symmetric about 0).
    profile = 0.5 * (profile + profile[::-1])
    inside = np.abs(s) < 0.9 * 30.0
    analytic = 2 * np.sqrt(30.0 ** 2 - s[inside] ** 2)
    k = profile[inside].sum() / analytic.sum()
    assert np.max(np.abs(profile[inside] / (k * analytic) - 1)) < 0.05
    # Outside the object nothing is left but noise.
    outside = np.abs(s) > 40.0
    assert abs(profile[outside].mean()) < 0.01 * profile[inside].mean()


DEMO = Path(__file__).resolve().parents[1] / "simulated_events"


@pytest.mark.skipif(not (DEMO / "normalization_cylinder.parquet").exists(), reason="no shipped demo data")
def test_shipped_normalization_scan(tmp_path):
    """The shipped benchtop normalization scan: efficiencies at the Poisson limit of its counts.

    Issue 4 asks for a correlation >= 0.95; with 10 % efficiency spread that
    needs about 1000 counts per crystal fan (the shipped 24 s scan has about
    1600). Also checked against the limit s / sqrt(s^2 + 1/F) the counts
    allow (references.md s.3 fan-sum oracle).
    """
    result = make_normalization(DEMO / "normalization_cylinder.parquet", tmp_path / "norm.h5")
    truth = np.array(json.loads((DEMO / "normalization_cylinder_truth.json").read_text())["crystal_efficiency"])
    fan = 2.0 * result.accounting.prompts_binned / truth.size
    spread = np.std(truth / truth.mean())
    best = spread / math.sqrt(spread ** 2 + 1.0 / fan)
    correlation = np.corrcoef(result.fit.crystal_efficiency, truth)[0, 1]
    assert correlation >= best - 0.02
    assert correlation >= 0.95
