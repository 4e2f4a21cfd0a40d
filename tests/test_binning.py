"""Binning: exact counts, accounting, and invariance to order, batches and files.

Outside sources:
* Radon transform of a point: s(phi) = x0*cos(phi) + y0*sin(phi)
  (A. C. Kak and M. Slaney, Principles of Computerized Tomographic Imaging,
  IEEE Press 1988, ch. 3);
* a plain numpy reference binner (``np.add.at`` over the lookup tables,
  written independently of the numba kernels) for exact equality;
* accounting rules: data contract section 5 (order of reasons, inclusive
  energy window), section 6 (half-open frames).
"""

from __future__ import annotations

import tempfile
from pathlib import Path

import numpy as np
import pytest
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

from conftest import event_metadata, make_small_scanner, point_source_events, random_events
from twinray.accounting import FIELDS, Accounting
from twinray.binning import (BinningState, bin_event_arrays, bin_events, empty_state, seconds_to_ns,
                             sinograms_from_codes)
from twinray.errors import TwinrayInputError
from twinray.event_writer import write_events
from twinray.geometry import sinogram_geometry

SCANNER = make_small_scanner(max_ring_difference=2)  # some ring pairs rejected
GEOMETRY = sinogram_geometry(SCANNER)


def reference_bin(cols, g, frames=None, window=None):
    """Straightforward numpy binning of the same rules (the oracle)."""
    sc = g.scanner
    ca = np.asarray(cols["crystal_a"], np.int64)
    cb = np.asarray(cols["crystal_b"], np.int64)
    n = len(ca)
    n_frames = 1 if frames is None else len(frames)
    slot = np.zeros(n, np.int64)
    if frames is not None:
        t = np.asarray(cols["time_ns"], np.int64)
        slot[:] = n_frames
        for k, (a, b) in enumerate(frames):
            inside = (t >= seconds_to_ns(a)) & (t < seconds_to_ns(b))
            slot[inside] = k
    reason = np.full(n, -1)
    invalid = (ca < 0) | (ca >= sc.n_crystals) | (cb < 0) | (cb >= sc.n_crystals)
    reason[invalid] = FIELDS.index("rejected_invalid_crystal")
    open_ = reason < 0
    reason[open_ & (slot == n_frames)] = FIELDS.index("rejected_outside_frame")
    if window is not None:
        lo, hi = window
        ea, eb = cols["energy_a_kev"], cols["energy_b_kev"]
        ok = (ea >= lo) & (ea <= hi) & (eb >= lo) & (eb <= hi)
        reason[(reason < 0) & ~ok] = FIELDS.index("rejected_energy_window")
    cpr = sc.crystals_per_ring
    ra, ja = np.divmod(np.where(invalid, 0, ca), cpr)
    rb, jb = np.divmod(np.where(invalid, 0, cb), cpr)
    inplane = g.inplane_bin[ja, jb]
    reason[(reason < 0) & (inplane == -1)] = FIELDS.index("rejected_no_lor")
    end1 = g.inplane_end1_is_a[ja, jb]
    plane = np.where(end1, g.plane_of_rings[ra, rb], g.plane_of_rings[rb, ra])
    reason[(reason < 0) & (plane < 0)] = FIELDS.index("rejected_ring_difference")
    reason[(reason < 0) & (inplane == -2)] = FIELDS.index("rejected_radial_fov")
    binned = reason < 0
    delayed = np.asarray(cols.get("delayed", np.zeros(n, bool)), bool)
    shape = (n_frames,) + g.shape
    prompts = np.zeros(int(np.prod(shape)), np.int64)
    dl = np.zeros_like(prompts)
    flat = slot * g.n_bins + plane * (g.views * g.radial_bins) + inplane
    np.add.at(prompts, flat[binned & ~delayed], 1)
    np.add.at(dl, flat[binned & delayed], 1)
    counts = np.zeros((n_frames + 1, len(FIELDS)), np.int64)
    np.add.at(counts, (slot, 0), 1)
    np.add.at(counts, (slot[binned & ~delayed], 1), 1)
    np.add.at(counts, (slot[binned & delayed], 2), 1)
    np.add.at(counts, (slot[~binned], reason[~binned]), 1)
    return prompts.reshape(shape), dl.reshape(shape), counts


def assert_same_state(a: BinningState, b: BinningState):
    np.testing.assert_array_equal(a.prompts, b.prompts)
    if a.delayed is None or b.delayed is None:
        assert a.delayed is None and b.delayed is None
    else:
        np.testing.assert_array_equal(a.delayed, b.delayed)
    np.testing.assert_array_equal(a.counts, b.counts)


# ---- outside checks ---------------------------------------------------------------------------------------

@pytest.mark.parametrize("x0,y0", [(20.0, -10.0), (-35.0, 25.0)])
def test_point_source_lands_on_its_sinusoid(benchtop_scanner, rng, x0, y0):
    """Counts of a point source follow s(phi) = x0 cos(phi) + y0 sin(phi) (Kak & Slaney ch. 3).

    Per view, the count-weighted mean radial position is within half a radial
    bin of the sinusoid.
    """
    g = sinogram_geometry(benchtop_scanner)
    cols = point_source_events(benchtop_scanner, x0, y0, 60000, rng, ring=2)
    state = bin_event_arrays(cols, g)
    acc = state.accounting()
    assert acc.balances() and acc.prompts_binned == 60000 - acc.rejected_no_lor
    plane = g.plane_of_rings[2, 2]
    sino = state.prompts[0, plane].astype(float)        # (views, radial)
    assert state.prompts.sum() == sino.sum()             # a direct-plane source stays in its plane
    s = g.radial_positions_mm
    per_view = sino.sum(axis=1)
    assert (per_view > 50).all()
    centroid = (sino * s[None, :]).sum(axis=1) / per_view
    expected = x0 * np.cos(g.view_angles_rad) + y0 * np.sin(g.view_angles_rad)
    # Local radial bin width at the expected position (bins are not uniform).
    m = np.interp(expected, s, np.arange(len(s)))
    width = np.interp(m, np.arange(len(s) - 1) + 0.5, np.diff(s))
    assert np.all(np.abs(centroid - expected) <= width / 2), np.abs(centroid - expected).max()


@pytest.mark.parametrize("accumulate", ["lean", "direct", "partitioned"])
def test_matches_numpy_reference(rng, accumulate):
    """The numba kernels equal a plain numpy binner of the same rules, frames and energy window."""
    cols = random_events(SCANNER, 30000, rng, energies=True, invalid_fraction=0.05)
    frames = [(0.5, 2.25), (2.25, 4.0), (7.0, 9.5)]
    state = bin_event_arrays(cols, GEOMETRY, frames=frames, accumulate=accumulate)
    prompts, delayed, counts = reference_bin(cols, GEOMETRY, frames, SCANNER.energy_window_kev)
    np.testing.assert_array_equal(state.prompts, prompts)
    np.testing.assert_array_equal(state.delayed, delayed)
    np.testing.assert_array_equal(state.counts, counts)
    for name in FIELDS[3:]:
        assert counts[:, FIELDS.index(name)].sum() > 0, f"the test data should exercise {name}"


# ---- exact rules ------------------------------------------------------------------------------------------

def _one(ca, cb, **more):
    cols = {"crystal_a": np.array([ca], np.int32), "crystal_b": np.array([cb], np.int32)}
    cols.update({k: np.array([v]) for k, v in more.items()})
    return cols


def test_reasons_in_contract_order():
    """Each row is counted once, under the first reason that applies (data contract section 5)."""
    g = sinogram_geometry(make_small_scanner(max_ring_difference=1))
    cpr = 16
    frames = [(1.0, 2.0)]
    out_t = np.int64(5 * 10**9)
    in_t = np.int64(1 * 10**9)
    cases = {
        # invalid crystal beats outside frame and energy
        "rejected_invalid_crystal": _one(-1, 8, time_ns=out_t, energy_a_kev=np.float32(100), energy_b_kev=np.float32(100)),
        # outside frame beats energy and no-LOR
        "rejected_outside_frame": _one(3, 3, time_ns=out_t, energy_a_kev=np.float32(100), energy_b_kev=np.float32(511)),
        # energy beats no-LOR
        "rejected_energy_window": _one(3, 3, time_ns=in_t, energy_a_kev=np.float32(511), energy_b_kev=np.float32(700)),
        # no LOR beats ring difference: same transaxial position, rings 0 and 3
        "rejected_no_lor": _one(3, 3 * cpr + 3, time_ns=in_t, energy_a_kev=np.float32(511), energy_b_kev=np.float32(511)),
        # ring difference 3 > 1 beats radial FOV (adjacent crystals are outside 11 radial bins)
        "rejected_ring_difference": _one(0, 3 * cpr + 1, time_ns=in_t, energy_a_kev=np.float32(511), energy_b_kev=np.float32(511)),
        "rejected_radial_fov": _one(0, 1, time_ns=in_t, energy_a_kev=np.float32(511), energy_b_kev=np.float32(511)),
        "prompts_binned": _one(0, 8, time_ns=in_t, energy_a_kev=np.float32(511), energy_b_kev=np.float32(511)),
    }
    for reason, cols in cases.items():
        state = bin_event_arrays(cols, g, frames=frames)
        acc = state.accounting()
        assert acc.read == 1 and getattr(acc, reason) == 1, (reason, acc)
        assert acc.balances()


def test_energy_window_inclusive_and_nan():
    """Limits are inclusive; a NaN energy is outside; only applied when energy columns exist."""
    lo, hi = SCANNER.energy_window_kev
    ea = np.array([lo, hi, np.nextafter(np.float32(lo), 0), 511, np.nan, 511], np.float32)
    eb = np.array([511, 511, 511, np.nextafter(np.float32(hi), 1e9), 511, 511], np.float32)
    cols = {"crystal_a": np.zeros(6, np.int32), "crystal_b": np.full(6, 8, np.int32),
            "energy_a_kev": ea, "energy_b_kev": eb}
    acc = bin_event_arrays(cols, GEOMETRY).accounting()
    assert acc.prompts_binned == 3 and acc.rejected_energy_window == 3
    assert bin_event_arrays(cols, GEOMETRY, energy_window=False).accounting().prompts_binned == 6
    no_energy = {k: cols[k] for k in ("crystal_a", "crystal_b")}
    assert bin_event_arrays(no_energy, GEOMETRY).accounting().prompts_binned == 6


def test_frames_are_half_open_and_exact():
    """START*1e9 <= time_ns < END*1e9 (data contract section 6), exact for decimal seconds."""
    t = np.array([299_999_999, 300_000_000, 699_999_999, 700_000_000], np.int64)
    cols = {"time_ns": t, "crystal_a": np.zeros(4, np.int32), "crystal_b": np.full(4, 8, np.int32)}
    state = bin_event_arrays(cols, GEOMETRY, frames=[(0.3, 0.7)])
    assert state.accounting().prompts_binned == 2
    assert state.accounting().rejected_outside_frame == 2
    assert seconds_to_ns(0.3) == 300_000_000 and seconds_to_ns(1e-9) == 1


def test_bad_frames_are_refused():
    for frames in ([(2.0, 1.0)], [(0.0, 2.0), (1.0, 3.0)], [(-1.0, 1.0)], [], [(0, float("nan"))]):
        with pytest.raises(TwinrayInputError):
            empty_state(GEOMETRY, frames)


def test_merge_refuses_mismatches(rng):
    cols = random_events(SCANNER, 100, rng)
    a = bin_event_arrays(cols, GEOMETRY)
    with pytest.raises(TwinrayInputError):
        a + bin_event_arrays(cols, GEOMETRY, frames=[(0, 1)])
    with pytest.raises(TwinrayInputError):
        a + bin_event_arrays(cols, sinogram_geometry(SCANNER, "ssrb"))
    without = {k: v for k, v in cols.items() if k != "delayed"}
    with pytest.raises(TwinrayInputError):
        a + bin_event_arrays(without, GEOMETRY)


def test_no_delayed_column_means_no_delayed_sinogram(rng):
    cols = random_events(SCANNER, 500, rng, delayed_fraction=None)
    state = bin_event_arrays(cols, GEOMETRY)
    assert state.delayed is None and state.accounting().delayed_binned == 0
    assert state.prompts.sum() == state.accounting().prompts_binned


def test_bin_events_with_geometry_and_progress(tiny_event_file):
    seen = []
    state = bin_events(tiny_event_file, GEOMETRY, batch_size=300, progress=seen.append)
    assert sum(seen) == 2000 and max(seen) == 300
    assert state.rows_read == 2000 and state.accounting().balances()
    other = sinogram_geometry(make_small_scanner(radius_mm=60.0))
    with pytest.raises(TwinrayInputError, match="radius_mm"):
        bin_events(tiny_event_file, other)


# ---- properties -------------------------------------------------------------------------------------------

EVENTS = st.fixed_dictionaries({
    "n": st.integers(0, 400),
    "seed": st.integers(0, 2**32 - 1),
    "energies": st.booleans(),
    "delayed": st.booleans(),
    "invalid": st.sampled_from([0.0, 0.1]),
})
FRAMES = st.lists(st.integers(0, 100), min_size=2, max_size=7, unique=True).map(
    lambda edges: [(a / 10, b / 10) for a, b in zip(sorted(edges)[::2], sorted(edges)[1::2])]).filter(bool)
SETTINGS = settings(max_examples=25, deadline=None, suppress_health_check=[HealthCheck.too_slow])


def _events(spec):
    rng = np.random.default_rng(spec["seed"])
    return random_events(SCANNER, spec["n"], rng, energies=spec["energies"],
                         delayed_fraction=0.2 if spec["delayed"] else None, invalid_fraction=spec["invalid"])


@SETTINGS
@given(spec=EVENTS, frames=st.one_of(st.none(), FRAMES), accumulate=st.sampled_from(["lean", "direct", "partitioned"]))
def test_counts_conserved_and_accounting_exact(spec, frames, accumulate):
    cols = _events(spec)
    state = bin_event_arrays(cols, GEOMETRY, frames=frames, accumulate=accumulate)
    window = SCANNER.energy_window_kev if spec["energies"] else None
    prompts, delayed, counts = reference_bin(cols, GEOMETRY, frames, window)
    np.testing.assert_array_equal(state.counts, counts)
    np.testing.assert_array_equal(state.prompts, prompts)
    assert state.rows_read == spec["n"]
    for k in range(state.n_frames):
        acc = state.accounting(k)
        assert acc.balances() and acc.read == spec["n"]
        assert state.prompts[k].sum() == acc.prompts_binned
        assert (0 if state.delayed is None else state.delayed[k].sum()) == acc.delayed_binned
    # Frame accountings plus the events outside every frame add up to the rows read.
    total = sum((state.frame_accounting(k) for k in range(state.n_frames)), state.outside_accounting)
    assert total.read == spec["n"] and total.balances()


@SETTINGS
@given(spec=EVENTS, batch=st.integers(1, 500), pieces=st.integers(1, 4), frames=st.one_of(st.none(), FRAMES),
       shuffle_seed=st.integers(0, 1000))
def test_order_batches_and_files_do_not_matter(spec, batch, pieces, frames, shuffle_seed):
    """Shuffled rows, other batch sizes and a split into several files give identical states."""
    spec = {**spec, "n": max(spec["n"], 1)}
    cols = _events(spec)
    n = spec["n"]
    meta = event_metadata(SCANNER)
    with tempfile.TemporaryDirectory() as tmp:
        tmp = Path(tmp)
        whole = write_events(tmp / "whole.parquet", cols, meta)
        order = np.random.default_rng(shuffle_seed).permutation(n)
        shuffled = write_events(tmp / "shuffled.parquet", {k: v[order] for k, v in cols.items()}, meta,
                                row_group_size=max(1, n // 3))
        folder = tmp / "split"
        folder.mkdir()
        cuts = np.linspace(0, n, pieces + 1).astype(int)
        for i in range(pieces):
            part = {k: v[cuts[i]:cuts[i + 1]] for k, v in cols.items()}
            write_events(folder / f"part{i:02d}.parquet", part, meta)
        reference = bin_event_arrays(cols, GEOMETRY, frames=frames)
        for path, bs in ((whole, batch), (shuffled, max(1, batch // 2)), (folder, batch)):
            state = bin_events(path, GEOMETRY, frames=frames, batch_size=bs, prefetch=bs % 3)
            assert_same_state(state, reference)


@SETTINGS
@given(spec=EVENTS, cut=st.floats(0, 1), frames=st.one_of(st.none(), FRAMES))
def test_merge_of_halves_equals_whole(spec, cut, frames):
    cols = _events(spec)
    k = int(cut * spec["n"])
    first = bin_event_arrays({c: v[:k] for c, v in cols.items()}, GEOMETRY, frames=frames)
    second = bin_event_arrays({c: v[k:] for c, v in cols.items()}, GEOMETRY, frames=frames)
    assert_same_state(first + second, bin_event_arrays(cols, GEOMETRY, frames=frames))
    # Adding into an existing state is the same as merging.
    acc = bin_event_arrays({c: v[:k] for c, v in cols.items()}, GEOMETRY, frames=frames)
    bin_event_arrays({c: v[k:] for c, v in cols.items()}, GEOMETRY, frames=frames, state=acc)
    assert_same_state(acc, first + second)


@SETTINGS
@given(spec=EVENTS, frames=FRAMES)
def test_several_frames_equal_separate_runs(spec, frames):
    """Binning several frames in one pass equals one run per frame (arrays and accounting)."""
    cols = _events(spec)
    multi = bin_event_arrays(cols, GEOMETRY, frames=frames)
    for k, frame in enumerate(frames):
        single = bin_event_arrays(cols, GEOMETRY, frames=[frame])
        assert_same_state(multi.frame(k), single)
        assert multi.accounting(k) == single.accounting(0)
        assert isinstance(single.accounting(0), Accounting)


# ---- kernel internals -------------------------------------------------------------------------------------

@pytest.mark.parametrize("changes", [{}, {"views": 4}, {"angle_offset_rad": 0.4, "radial_bins": 3},
                                     {"crystals_per_ring": 18, "radial_bins": 17}])
def test_inplane_factors_reproduce_the_table(changes):
    """The small sum/difference tables give exactly the geometry's in-plane table for every pair."""
    from twinray import _binning_kernels as k

    g = sinogram_geometry(make_small_scanner(**changes))
    code = k.inplane_codes(g.inplane_bin, g.inplane_end1_is_a)
    factors = k.inplane_factors(code, g.radial_bins)
    assert factors is not None
    by_sum, half, by_diff = factors
    n = code.shape[0]
    ja, jb = np.meshgrid(np.arange(n), np.arange(n), indexing="ij")
    part = by_diff[half[ja + jb], ja - jb + n - 1]
    np.testing.assert_array_equal(np.where(part < 0, part, by_sum[ja + jb] + part), code)


def test_table_that_does_not_factor_falls_back(rng, monkeypatch):
    """A table without the sum/difference structure is used whole, with the same results as the oracle."""
    from twinray import _binning_kernels as k
    from twinray import binning

    code = k.inplane_codes(GEOMETRY.inplane_bin, GEOMETRY.inplane_end1_is_a).copy()
    valid = np.argwhere(code >= 0)
    i, j = valid[0]
    code[i, j] ^= 2          # move one pair to the neighbouring radial bin: no longer factors
    assert k.inplane_factors(code, GEOMETRY.radial_bins) is None
    monkeypatch.setattr(binning, "_TABLES_CACHE", {})
    monkeypatch.setattr(k, "inplane_factors", lambda code, radial_bins: None)
    cols = random_events(SCANNER, 5000, rng, energies=True)
    state = bin_event_arrays(cols, GEOMETRY)
    assert binning._inplane_tables(GEOMETRY)[1] is None  # the full table was used
    prompts, delayed, counts = reference_bin(cols, GEOMETRY, None, SCANNER.energy_window_kev)
    np.testing.assert_array_equal(state.prompts, prompts)
    np.testing.assert_array_equal(state.counts, counts)


@SETTINGS
@given(spec=EVENTS, frames=FRAMES, limit=st.integers(0, 40), cut=st.floats(0, 1))
def test_frame_storage_does_not_change_the_sinograms(spec, frames, limit, cut):
    """Frames held as event codes (made dense past ``limit`` codes) equal frames binned densely.

    ``limit`` is lowered from its default (half the bins) so that frames cross it while the events of
    the second half are added.
    """
    cols = _events(spec)
    with_delayed = "delayed" in cols
    dense = empty_state(GEOMETRY, frames, with_delayed, sparse=False)
    bin_event_arrays(cols, GEOMETRY, frames=frames, state=dense)
    held = empty_state(GEOMETRY, frames, with_delayed, sparse=True)
    assert not held.is_dense
    for store in held._stores:
        store.limit = limit
    k = int(cut * spec["n"])
    bin_event_arrays({c: v[:k] for c, v in cols.items()}, GEOMETRY, frames=frames, state=held)
    bin_event_arrays({c: v[k:] for c, v in cols.items()}, GEOMETRY, frames=frames, state=held)
    np.testing.assert_array_equal(held.counts, dense.counts)
    for f in range(len(frames)):
        prompts, delayed = held.frame_sinograms(f)
        np.testing.assert_array_equal(prompts, dense.prompts[f])
        if with_delayed:
            np.testing.assert_array_equal(delayed, dense.delayed[f])
        codes = held.frame_codes(f)
        if codes is not None:
            assert codes.dtype == np.uint32 and len(codes) <= limit
            rebuilt, rebuilt_delayed = sinograms_from_codes(codes, GEOMETRY.shape, with_delayed)
            np.testing.assert_array_equal(rebuilt, dense.prompts[f])
            assert (rebuilt_delayed is None) == (not with_delayed)
            if with_delayed:
                np.testing.assert_array_equal(rebuilt_delayed, dense.delayed[f])
        assert_same_state(held.frame(f), dense.frame(f))
    assert not held.is_dense                 # handing out frames leaves the storage as it is
    assert_same_state(held, dense)           # .prompts makes it dense
    assert held.is_dense


@SETTINGS
@given(spec=EVENTS, frames=st.one_of(st.none(), FRAMES), sparse=st.booleans())
def test_lean_kernels_on_two_threads_equal_the_reference(spec, frames, sparse):
    """The lean path split between two threads (forced here even for small batches) bins like the oracle."""
    from twinray import binning

    saved = binning._THREADED_BATCH, binning._usable_cores
    binning._THREADED_BATCH, binning._usable_cores = 1, (lambda: 2)
    try:
        cols = _events(spec)
        state = empty_state(GEOMETRY, frames, "delayed" in cols, sparse=sparse and frames is not None)
        bin_event_arrays(cols, GEOMETRY, frames=frames, accumulate="lean", state=state)
    finally:
        binning._THREADED_BATCH, binning._usable_cores = saved
    window = SCANNER.energy_window_kev if spec["energies"] else None
    prompts, delayed, counts = reference_bin(cols, GEOMETRY, frames, window)
    np.testing.assert_array_equal(state.prompts, prompts)
    if state.delayed is not None:
        np.testing.assert_array_equal(state.delayed, delayed)
    else:
        assert "delayed" not in cols and not np.any(delayed)
    np.testing.assert_array_equal(state.counts, counts)


def test_binning_in_a_forked_child_after_the_parent_binned(rng):
    """A child forked after the parent used the binning threads bins too (it gets its own threads)."""
    import multiprocessing

    from twinray import binning

    saved = binning._THREADED_BATCH, binning._usable_cores
    binning._THREADED_BATCH, binning._usable_cores = 1, (lambda: 2)
    try:
        cols = random_events(SCANNER, 3000, rng, delayed_fraction=0.1)
        parent = bin_event_arrays(cols, GEOMETRY)
        ctx = multiprocessing.get_context("fork")
        with ctx.Pool(1) as pool:
            child = pool.apply_async(_bin_in_child, (cols,)).get(timeout=120)
    finally:
        binning._THREADED_BATCH, binning._usable_cores = saved
    np.testing.assert_array_equal(child[0], parent.prompts)
    np.testing.assert_array_equal(child[1], parent.counts)


def _bin_in_child(cols):
    state = bin_event_arrays(cols, GEOMETRY)
    return state.prompts, state.counts


@SETTINGS
@given(spec=EVENTS, cut=st.floats(0, 1), frames=st.one_of(st.none(), FRAMES))
def test_binning_into_a_merged_state(spec, cut, frames):
    """A merged state (its own arrays, not one combined buffer) can be binned into like a new one."""
    cols = _events(spec)
    k = int(cut * spec["n"])
    first = {c: v[:k] for c, v in cols.items()}
    merged = bin_event_arrays(first, GEOMETRY, frames=frames) + empty_state(GEOMETRY, frames, "delayed" in cols)
    bin_event_arrays({c: v[k:] for c, v in cols.items()}, GEOMETRY, frames=frames, state=merged)
    assert_same_state(merged, bin_event_arrays(cols, GEOMETRY, frames=frames))
