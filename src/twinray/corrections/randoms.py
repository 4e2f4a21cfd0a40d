"""Randoms estimates: delayed window with fan-sum variance reduction, or singles.

``delayed``: the delayed-window sinogram counts the random coincidences of
each bin without bias but with Poisson noise. Random coincidences of crystal
pair (a, b) are expected at ``R_ab = 2*tau*S_a*S_b``, a product of
per-crystal factors, so the model ``R_ab = r_a * r_b`` fitted to the delayed
data by maximum likelihood (each crystal factor estimated from its whole fan
of thousands of LORs) gives an estimate that is nearly noise-free while
keeping the total. The fit works on the binned delayed sinogram: each bin's
counts are shared among its crystal pairs (in proportion to ``r_a r_b``,
EM), so it holds for any span or view mashing, and the likelihood equations
of the crystal factors are solved with the fan written as a product of a
ring-pair mask and an in-plane mask (see :func:`fit_crystal_factors`).

``singles``: ``R_ab = 2*tau*S_a*S_b * T`` from measured singles rates (data
contract section 2 singles file), ``2*tau`` being the coincidence window
width ``coincidence_window_ns``.

References
----------
M. E. Casey and E. J. Hoffman, J Comput Assist Tomogr 10(5):845-850, 1986
(fan-sum variance reduction of delayed coincidences; details from memory).
G. F. Knoll, Radiation Detection and Measurement, 4th ed., Wiley 2010,
accidental coincidences ``r = 2*tau*r1*r2`` (chapter from memory);
S. R. Cherry, J. A. Sorenson and M. E. Phelps, Physics in Nuclear Medicine,
4th ed., Elsevier 2012, ch. 18.
"""

from __future__ import annotations

import json
from pathlib import Path

import numpy as np

from ..errors import TwinrayInputError
from ..geometry import SinogramGeometry
from . import _kernels
from .pairs import kernel_arguments, one_pair_per_bin, pair_product_sinogram, pairs_per_bin

RANDOMS_METHODS = ("delayed", "singles", "none")


def crystal_fan_sums(sinogram, geometry: SinogramGeometry, weights=None) -> np.ndarray:
    """Counts of a sinogram summed over each crystal's fan.

    Each bin's counts are shared among its crystal pairs in proportion to
    ``weights_a * weights_b`` (equally when no weights are given); exact
    when every bin holds one crystal pair (span 1, unmashed views).

    Returns
    -------
    ndarray of float64, shape (n_crystals,)
    """
    n_crystals = geometry.scanner.n_crystals
    w = np.ones(n_crystals) if weights is None else np.ascontiguousarray(weights, np.float64)
    model = (pairs_per_bin(geometry) if weights is None else pair_product_sinogram(geometry, w, dtype=np.float32))
    num = np.zeros(n_crystals)
    den = np.zeros(n_crystals)
    _kernels.binned_fan_em_sums(w, np.ascontiguousarray(sinogram, np.float32).reshape(-1), model.reshape(-1),
                                *kernel_arguments(geometry), geometry.views * geometry.radial_bins, num, den)
    return num


def _fan_operators(geometry: SinogramGeometry):
    """Ring-pair and in-plane masks whose product is the fan of every crystal.

    Crystal (ra, ja) is in coincidence with (rb, jb) when ``rings_ok[ra, rb]``
    and ``inplane_ok[ja, jb]``, so the sum of ``r`` over its fan is
    ``(rings_ok @ r @ inplane_ok)[ra, ja]`` with ``r`` shaped (rings,
    crystals_per_ring). None when the ring condition depends on which
    crystal is end 1 (then the pair kernels are used).
    """
    por = np.asarray(geometry.plane_of_rings)
    rings_ok = por >= 0
    if not np.array_equal(rings_ok, rings_ok.T):
        return None
    inplane_ok = np.asarray(geometry.inplane_bin) >= 0
    return rings_ok.astype(np.float64), inplane_ok.astype(np.float64)


def _solve_fan_equations(fan, rings_ok, inplane_ok, shape, iterations=200, tol=1e-10):
    """Solve ``r_a * sum_(b in fan a) r_b = D_a`` (the ML equations of the product model) by fixed point."""
    total = 0.5 * fan.sum()
    r = fan / np.sqrt(max(fan.sum(), 1e-300))
    for _ in range(iterations):
        fan_of_r = (rings_ok @ r.reshape(shape) @ inplane_ok).reshape(-1)
        new = np.where(fan_of_r > 0, fan / np.where(fan_of_r > 0, fan_of_r, 1.0), 0.0)
        # The plain update maps c*r to r/c; restoring the total (a property of the ML solution)
        # removes that oscillation.
        model_total = 0.5 * np.dot(new, (rings_ok @ new.reshape(shape) @ inplane_ok).reshape(-1))
        new *= np.sqrt(total / max(model_total, 1e-300))
        done = np.max(np.abs(new - r)) <= tol * max(np.max(np.abs(new)), 1e-300)
        r = new
        if done:
            break
    return r


def fit_crystal_factors(sinogram, geometry: SinogramGeometry, iterations: int = 5) -> np.ndarray:
    """Maximum-likelihood per-crystal factors ``r`` of ``sinogram ~ Poisson(sum over the bin's pairs of r_a r_b)``.

    Parameters
    ----------
    sinogram : ndarray, shape ``geometry.shape``
        Counts (e.g. delayed coincidences).
    geometry : SinogramGeometry
    iterations : int
        Outer EM iterations (sharing each bin's counts among its crystal
        pairs in proportion to the current ``r_a r_b``); when every bin holds
        one pair the first is exact and no more are made.

    Returns
    -------
    ndarray of float64, shape (n_crystals,)

    Notes
    -----
    For per-pair data the likelihood equations are ``r_a * sum_(b in fan
    a) r_b = D_a`` with ``D_a`` the fan sum of crystal a (Casey & Hoffman
    1986). The fan of a crystal is a product of a ring-pair mask and an
    in-plane mask, so the fan sums of ``r`` are two small matrix products
    and the equations are solved by a fixed-point iteration in
    milliseconds; only the fan sums of the data need a pass over every
    crystal pair.
    """
    data = np.asarray(sinogram)
    n_crystals = geometry.scanner.n_crystals
    if data.sum() <= 0:
        return np.zeros(n_crystals)
    ops = _fan_operators(geometry)
    exact = one_pair_per_bin(geometry)
    outer = 1 if exact else max(1, int(iterations))
    r = None
    for _ in range(outer):
        fan = crystal_fan_sums(data, geometry, r)
        if ops is None:
            r = _fit_with_pair_kernels(data, geometry, fan)
        else:
            shape = (geometry.scanner.rings, geometry.scanner.crystals_per_ring)
            r = _solve_fan_equations(fan, ops[0], ops[1], shape)
    return r


def _fit_with_pair_kernels(data, geometry: SinogramGeometry, fan, iterations: int = 20) -> np.ndarray:
    """Fallback EM over crystal pairs for geometries whose fans do not factor."""
    n_crystals = geometry.scanner.n_crystals
    total = float(np.sum(data))
    flat = np.ascontiguousarray(data, np.float32).reshape(-1)
    r = fan / np.sqrt(max(fan.sum(), 1e-300))
    for _ in range(iterations):
        model = pair_product_sinogram(geometry, r, dtype=np.float32).reshape(-1)
        num = np.zeros(n_crystals)
        den = np.zeros(n_crystals)
        _kernels.binned_fan_em_sums(r, flat, model, *kernel_arguments(geometry),
                                    geometry.views * geometry.radial_bins, num, den)
        r = np.where(den > 0, num / np.where(den > 0, den, 1.0), 0.0)
        r *= np.sqrt(total / max(float(pair_product_sinogram(geometry, r).sum()), 1e-300))
    return r


def randoms_from_delayed(delayed, geometry: SinogramGeometry, iterations: int = 5) -> np.ndarray:
    """Variance-reduced randoms sinogram from the delayed-window sinogram.

    Parameters
    ----------
    delayed : ndarray, shape ``geometry.shape``
        Delayed-window counts of the frame.
    geometry : SinogramGeometry
    iterations : int

    Returns
    -------
    ndarray of float32, shape ``geometry.shape``
        Expected random coincidences per bin (same total as ``delayed``).

    References
    ----------
    Casey and Hoffman, J Comput Assist Tomogr 10:845-850, 1986.
    """
    r = fit_crystal_factors(delayed, geometry, iterations)
    return pair_product_sinogram(geometry, r, dtype=np.float32)


def randoms_from_singles(singles_rate_cps, geometry: SinogramGeometry, frame_duration_s: float) -> np.ndarray:
    """Randoms sinogram ``2*tau*S_a*S_b*T`` from per-crystal singles rates.

    Parameters
    ----------
    singles_rate_cps : ndarray, shape (n_crystals,)
        Singles rate of every crystal during the frame, counts/s.
    geometry : SinogramGeometry
        Its scanner's ``coincidence_window_ns`` is the window width 2*tau.
    frame_duration_s : float
        Frame length T, s.

    Returns
    -------
    ndarray of float32, shape ``geometry.shape``
        Expected random coincidences per bin in the frame.

    References
    ----------
    Knoll, Radiation Detection and Measurement, 4th ed., 2010 (accidental
    coincidence rate 2*tau*r1*r2).
    """
    rates = np.asarray(singles_rate_cps, dtype=np.float64)
    if rates.shape != (geometry.scanner.n_crystals,):
        raise TwinrayInputError(f"singles rates have shape {rates.shape}, the scanner has "
                                f"{geometry.scanner.n_crystals} crystals")
    window_s = geometry.scanner.coincidence_window_ns * 1e-9
    factor = rates * np.sqrt(window_s * float(frame_duration_s))
    return pair_product_sinogram(geometry, factor, dtype=np.float32)


def read_singles_rates(path, n_crystals: int, frames_s, batch_size: int = 1 << 20) -> np.ndarray:
    """Mean singles rate of every crystal in each frame, from a singles Parquet file.

    Parameters
    ----------
    path : path-like
        Singles file (data contract section 2): columns ``time_ns`` (int64,
        interval start), ``crystal`` (int32), ``counts`` (int64) and
        ``interval_ns`` in its ``twinray`` metadata object.
    n_crystals : int
    frames_s : sequence of (start_s, end_s)
        Frames, seconds from acquisition start.
    batch_size : int
        Rows per decoded batch (the file is streamed).

    Returns
    -------
    ndarray of float64, shape (n_frames, n_crystals)
        counts/s; intervals that straddle a frame edge count in proportion to
        their overlap.

    Raises
    ------
    TwinrayInputError
        Missing file, column or ``interval_ns``; crystal ids outside the
        scanner; negative counts; a frame not covered by singles intervals.
    """
    import pyarrow as pa
    import pyarrow.parquet as pq

    path = Path(path)
    if not path.is_file():
        raise TwinrayInputError(f"singles file {path} does not exist")
    try:
        pf = pq.ParquetFile(path, pre_buffer=False)
    except (pa.ArrowException, OSError):
        raise TwinrayInputError(f"singles file {path} is not a readable Parquet file") from None
    schema = pf.schema_arrow
    expected = {"time_ns": pa.int64(), "crystal": pa.int32(), "counts": pa.int64()}
    for name, kind in expected.items():
        if name not in schema.names:
            raise TwinrayInputError(f"singles file {path} has no column '{name}'")
        if schema.field(name).type != kind:
            raise TwinrayInputError(f"column '{name}' of singles file {path} has type "
                                    f"{schema.field(name).type}, expected {kind}")
    meta = (schema.metadata or {}).get(b"twinray")
    try:
        interval_ns = json.loads(meta)["interval_ns"] if meta else None
    except (ValueError, KeyError, TypeError):
        interval_ns = None
    if isinstance(interval_ns, bool) or not isinstance(interval_ns, (int, float)) or not interval_ns > 0:
        raise TwinrayInputError(f"singles file {path} needs a positive 'interval_ns' in its twinray metadata")
    starts = np.array([round(a * 1e9) for a, _ in frames_s], dtype=np.float64)
    ends = np.array([round(b * 1e9) for _, b in frames_s], dtype=np.float64)
    sums = np.zeros((len(frames_s), n_crystals))
    interval_starts = np.zeros(0)
    bad = np.zeros(2, np.int64)
    try:
        for batch in pf.iter_batches(batch_size=batch_size, columns=["time_ns", "crystal", "counts"]):
            t = np.ascontiguousarray(batch.column(0).to_numpy(zero_copy_only=False), np.float64)
            c = np.ascontiguousarray(batch.column(1).to_numpy(zero_copy_only=False), np.int64)
            k = np.ascontiguousarray(batch.column(2).to_numpy(zero_copy_only=False), np.float64)
            _kernels.singles_sums(t, c, k, float(interval_ns), starts, ends, n_crystals, sums, bad)
            interval_starts = np.union1d(interval_starts, t)
    except (pa.ArrowException, OSError) as exc:
        raise TwinrayInputError(f"singles file {path} could not be decoded ({' '.join(str(exc).split())[:100]})") from None
    if bad[0]:
        raise TwinrayInputError(f"singles file {path}: {bad[0]} row(s) have a crystal id outside 0..{n_crystals - 1}")
    if bad[1]:
        raise TwinrayInputError(f"singles file {path}: {bad[1]} row(s) have negative counts")
    durations = (ends - starts)
    u = interval_starts[None, :]
    covered = np.clip(np.minimum(u + interval_ns, ends[:, None]) - np.maximum(u, starts[:, None]), 0, None).sum(1)
    for i, (frame, cov) in enumerate(zip(frames_s, covered)):
        if cov < 0.99 * durations[i]:
            raise TwinrayInputError(f"singles file {path} covers only {cov * 1e-9:g} s of the frame "
                                    f"{frame[0]:g}:{frame[1]:g} s")
    return sums / (durations[:, None] * 1e-9)
