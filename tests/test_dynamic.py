"""Dynamic framing, decay correction and parallel reconstruction (twinray.dynamic, `twinray dynamic`)."""

import json
import math

import nibabel as nib
import numpy as np
import pytest

from conftest import event_metadata, make_small_scanner, random_events
from twinray.binning import bin_events
from twinray.corrections.apply import CorrectionOptions
from twinray.decay import frame_decay_factor
from twinray.dynamic import bin_schedule, decay_reference_s, make_dynamic
from twinray.errors import TwinrayInputError
from twinray.event_writer import write_events
from twinray.events import open_events
from twinray.geometry import sinogram_geometry
from twinray.reconstruct.pipeline import ReconOptions
from twinray.schedule import parse_schedule
from twinray.sinogram_io import read_sinogram_file

# NNDC/ENSDF half-life of O-15 (references.md s.2): 122.24 s.
O15_HALF_LIFE_S = 122.24
FAST_OSEM = ReconOptions(method="osem", iterations=2, subsets=4, mode="2d")


@pytest.fixture(scope="module")
def random_study(tmp_path_factory):
    """30 000 random events (with delayed flags and energies), 60 s, on the 4-ring test scanner."""
    scanner = make_small_scanner()
    cols = random_events(scanner, 30000, np.random.default_rng(5), energies=True, duration_s=60.0,
                         invalid_fraction=0.01)
    path = tmp_path_factory.mktemp("dyn") / "events.parquet"
    write_events(path, cols, event_metadata(scanner, duration_s=60.0))
    return path


@pytest.fixture(scope="module")
def o15_study(tmp_path_factory):
    """A uniform water cylinder of O-15 on the bench-top scanner, 240 s, simulated (no attenuation,
    scatter or efficiency spread, so that no normalization or mu-map is needed)."""
    from twinray.simulate.phantom import load_phantom
    from twinray.simulate.simulator import simulate

    folder = tmp_path_factory.mktemp("o15")
    phantom = folder / "o15.toml"
    scanner = (__import__("conftest").SCANNER_DIR / "benchtop.toml").as_posix()
    phantom.write_text(f'''name = "O-15 water cylinder"
isotope = "O-15"
scanner = "{scanner}"
duration_s = 240.0
acquisition_start = "2026-03-02T11:00:00+00:00"
injection_time = "2026-03-02T10:59:00+00:00"

[physics]
attenuation = false
scatter = false
efficiency_spread = 0.0

[[shape]]
name = "water"
type = "cylinder"
radius_mm = 30.0
length_mm = 24.0
activity_bq_per_ml = 400.0
mu_per_cm = 0.096
''')
    events = folder / "o15.parquet"
    simulate(load_phantom(phantom), events, seed=7, write_truth=False)
    return events


def test_frames_add_up_to_the_whole_study(random_study):
    """Prompts, delayed and accounting of the frames sum to those of the whole acquisition."""
    source = open_events(random_study)
    geometry = sinogram_geometry(source.scanner)
    state = bin_schedule(source, geometry, parse_schedule("6x5,2x15"))
    whole = bin_events(source, geometry)
    np.testing.assert_array_equal(state.prompts.sum(axis=0), whole.prompts[0])
    np.testing.assert_array_equal(state.delayed.sum(axis=0), whole.delayed[0])
    per_frame = sum((state.frame_accounting(k) for k in range(state.n_frames)), state.outside_accounting)
    assert per_frame == whole.accounting(0)
    assert per_frame.read == source.num_rows and per_frame.balances()
    assert state.outside_accounting.read == 0


def test_frame_tasks_carry_the_frame_sinograms(random_study):
    """A frame shipped to a worker as event codes rebuilds exactly the frame's binned sinograms."""
    from twinray.dynamic import _frame_task

    source = open_events(random_study)
    geometry = sinogram_geometry(source.scanner)
    schedule = parse_schedule("10x1,5x10")     # about 500 events in 1 s frames, 5000 in 10 s (1408 bins)
    state = bin_schedule(source, geometry, schedule)
    tasks = [_frame_task(state, k, schedule, None) for k in range(schedule.n_frames)]
    assert all(task.codes is not None for task in tasks[:10])    # short frames travel as codes
    assert all(task.codes is None for task in tasks[10:])        # long ones were made dense
    for k, task in enumerate(tasks):
        prompts, delayed = task.sinograms(geometry.shape)
        np.testing.assert_array_equal(prompts, state.prompts[k])
        np.testing.assert_array_equal(delayed, state.delayed[k])


def test_single_frame_equals_sinogram_command(random_study, tmp_path, capsys):
    """A one-frame schedule bins exactly what `twinray sinogram --frame` bins over the same window."""
    from twinray.cli.main import main

    out = tmp_path / "frame.h5"
    assert main(["sinogram", str(random_study), "-o", str(out), "--frame", "12.5:40"]) == 0
    capsys.readouterr()
    sino = read_sinogram_file(out)
    source = open_events(random_study)
    state = bin_schedule(source, sinogram_geometry(source.scanner), parse_schedule("27.5", start_s=12.5))
    np.testing.assert_array_equal(state.prompts[0], sino.arrays["prompts"])
    np.testing.assert_array_equal(state.delayed[0], sino.arrays["delayed"])
    assert state.accounting(0) == sino.accounting
    assert (sino.frame_start_s, sino.frame_duration_s) == (12.5, 27.5)


def test_decay_corrected_frames_are_constant(o15_study, tmp_path):
    """O-15 (NNDC half-life 122.24 s) decays to a third in 4 x 60 s; after the frame decay correction
    DCF = lambda*dt/(1-exp(-lambda*dt))*exp(lambda*(t0-t_ref)) (references.md s.8) the mean of a uniform
    region is the same in every frame (within 5 %), while the uncorrected rate falls as the decay law says."""
    result = make_dynamic(o15_study, tmp_path / "dyn", schedule="4x60", rebin="ssrb",
                          correction_options=CorrectionOptions(randoms="none"), recon_options=FAST_OSEM,
                          workers=0)
    data = nib.load(tmp_path / "dyn" / "dynamic.nii.gz")
    image = np.asarray(data.dataobj)
    assert image.shape[3] == 4
    side = json.loads((tmp_path / "dyn" / "dynamic.json").read_text())
    starts = np.array([0.0, 60.0, 120.0, 180.0])
    expected = frame_decay_factor(O15_HALF_LIFE_S, starts, 60.0)
    np.testing.assert_allclose(side["DecayCorrectionFactor"], expected, rtol=1e-12)
    lam = math.log(2) / O15_HALF_LIFE_S
    np.testing.assert_allclose(expected, lam * 60 / (1 - np.exp(-lam * 60)) * np.exp(lam * starts), rtol=1e-12)
    assert side["FrameTimesStart"] == list(starts) and side["FrameDuration"] == [60.0] * 4
    assert side["ImageDecayCorrected"] is True and side["ImageDecayCorrectionTime"] == 0.0
    assert side["TracerRadionuclide"] == "O-15" and side["Units"] == "counts/s/mL"
    # central region: 20 mm radius, middle slices
    x, y, z = (data.affine[k, k] * np.arange(image.shape[k]) + data.affine[k, 3] for k in range(3))
    inside = (x[:, None, None] ** 2 + y[None, :, None] ** 2 < 20.0 ** 2) & (np.abs(z)[None, None, :] < 8.0)
    means = np.array([image[..., k][inside].mean() for k in range(4)])
    np.testing.assert_allclose(means / means.mean(), 1.0, atol=0.05)
    raw = means / expected
    # uncorrected mean rates follow the frame-averaged decay curve
    np.testing.assert_allclose(raw / raw[0], expected[0] / expected, rtol=0.06)
    assert raw[3] / raw[0] < 0.4
    # the time-activity curve of a central sphere, from the written files, is flat too
    from twinray.tac import tac_from_image

    tac = tac_from_image(tmp_path / "dyn" / "dynamic.nii.gz", ["water=sphere:0,0,0,15"], tmp_path / "tac.csv",
                         tmp_path / "tac.png")["curves"]
    np.testing.assert_allclose(tac.frame_mid_s, [30.0, 90.0, 150.0, 210.0])
    np.testing.assert_allclose(tac.mean[0] / tac.mean[0].mean(), 1.0, atol=0.06)
    # frame accounting adds up to the whole run
    total = {k: sum(fa[k] for fa in side["twinray"]["frame_accounting"]) for k in side["twinray"]["accounting"]}
    assert total == side["twinray"]["accounting"] == result.accounting.to_dict()


def test_injection_reference(o15_study, tmp_path):
    """--decay-reference injection: the metadata's injection is 60 s before the scan, so every factor is
    multiplied by exp(lambda*60) (decay law) and ImageDecayCorrectionTime is -60 s."""
    source = open_events(o15_study)
    assert decay_reference_s(source.metadata, "injection") == -60.0
    result = make_dynamic(o15_study, tmp_path / "inj", schedule="2x30", rebin="ssrb", decay_reference="injection",
                          correction_options=CorrectionOptions(randoms="none", decay_reference_s=-60.0),
                          recon_options=ReconOptions(method="fbp"), workers=0)
    lam = math.log(2) / O15_HALF_LIFE_S
    np.testing.assert_allclose(result.decay_factors,
                               frame_decay_factor(O15_HALF_LIFE_S, np.array([0.0, 30.0]), 30.0) * math.exp(lam * 60),
                               rtol=1e-12)
    assert result.sidecar["ImageDecayCorrectionTime"] == -60.0
    assert result.sidecar["InjectionStart"] == -60.0
    with pytest.raises(TwinrayInputError, match="injection_time"):
        decay_reference_s({"acquisition_start": "2026-01-01T09:00:00"}, "injection")


def test_one_and_two_workers_give_identical_images(random_study, tmp_path):
    """The same frames reconstructed by a 2-worker and a 1-worker Dask cluster and in-process: identical bytes."""
    from twinray.parallel import dask_client

    kwargs = dict(schedule="4x15", correction_options=CorrectionOptions(randoms="delayed"),
                  recon_options=ReconOptions(method="osem", iterations=2, subsets=2))
    inline = make_dynamic(random_study, tmp_path / "w0", workers=0, **kwargs)
    with dask_client(workers=2) as client:
        address = client.scheduler.address
        two = make_dynamic(random_study, tmp_path / "w2", scheduler=address, **kwargs)
        workers = list(client.scheduler_info()["workers"])
        client.retire_workers(workers[1:])
        assert len(client.scheduler_info()["workers"]) == 1
        one = make_dynamic(random_study, tmp_path / "w1", scheduler=address, **kwargs)
    images = [np.asarray(nib.load(r.outputs[0]).dataobj) for r in (inline, two, one)]
    assert images[0].tobytes() == images[1].tobytes() == images[2].tobytes()
    assert images[0].shape[3] == 4 and np.abs(images[0]).sum() > 0


def test_cli_errors_and_truncation(random_study, tmp_path, capsys):
    """Data contract s.6: a schedule past the data is an error unless --truncate."""
    from twinray.cli.main import main

    out = tmp_path / "d"
    assert main(["dynamic", str(random_study), "-o", str(out), "--schedule", "3x30", "--workers", "0"]) == 1
    err = capsys.readouterr().err
    assert err.startswith("error:") and "--truncate" in err and err.count("\n") == 1
    assert not (out / "dynamic.nii.gz").exists()
    assert main(["dynamic", str(random_study), "-o", str(out), "--schedule", "3x25", "--truncate", "--workers",
                 "0", "--method", "fbp", "--json"]) == 0
    result = json.loads(capsys.readouterr().out)
    assert result["frames"] == 3 and result["schedule"] == "2x25,1x10"
    assert result["accounting"]["read"] == 30000
    side = json.loads((out / "dynamic.json").read_text())
    assert side["FrameDuration"] == [25.0, 25.0, 10.0]
    for bad, words in [(["--schedule", "3x"], "cannot read"), (["--schedule", "2x10", "--workers", "-1"], "workers"),
                       (["--schedule", "2x10", "--scheduler", "nowhere"], "Dask address"),
                       (["--schedule", "2x10", "--decay-reference", "injection"], "injection_time")]:
        code = main(["dynamic", str(random_study), "-o", str(tmp_path / "e"), *bad])
        err = capsys.readouterr().err
        assert code != 0 and err.startswith("error:") and words in err and "Traceback" not in err


def test_frame_memory_bound_counts_the_events():
    """30 frames of 1408 bins: 338 kB if all were dense; far less with few events (held as codes)."""
    from twinray.dynamic import check_frames_fit_memory

    geometry = sinogram_geometry(make_small_scanner())
    dense_frame = geometry.n_bins * 8                      # prompts + delayed, int32
    with pytest.raises(TwinrayInputError, match="30 frames"):
        check_frames_fit_memory(geometry, 30, True, 29 * dense_frame)
    check_frames_fit_memory(geometry, 30, True, 29 * dense_frame, n_events=1000)      # 4 kB of codes
    # Enough events for every frame to be dense: the dense bound again.
    with pytest.raises(TwinrayInputError, match="may need"):
        check_frames_fit_memory(geometry, 30, True, 29 * dense_frame, n_events=30 * geometry.n_bins)
