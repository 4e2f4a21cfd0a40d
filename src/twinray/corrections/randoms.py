"""Randoms estimates: delayed window with fan-sum variance reduction, or singles.

``delayed``: the delayed-window sinogram counts the random coincidences of
each bin without bias but with Poisson noise. Random coincidences of crystal
pair (a, b) are expected at ``R_ab = 2*tau*S_a*S_b``, a product of
per-crystal factors, so the model ``R_ab = r_a * r_b`` fitted to the delayed
data by maximum likelihood (each crystal factor estimated from its whole fan
of thousands of LORs) gives an estimate that is nearly noise-free while
keeping the total. The fit works on the binned delayed sinogram (EM for the
product model: each bin's counts are shared among its crystal pairs in
proportion to ``r_a r_b``), so it is exact for any span or view mashing.

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
from .pairs import kernel_arguments, pair_product_sinogram

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
    model = pair_product_sinogram(geometry, w).reshape(-1)
    num = np.zeros(n_crystals)
    den = np.zeros(n_crystals)
    ja, jb, inplane, end1, n, rings, por = kernel_arguments(geometry)
    _kernels.binned_fan_em_sums(w, np.ascontiguousarray(sinogram, np.float64).reshape(-1), model, ja, jb, inplane,
                                end1, n, rings, por, geometry.views * geometry.radial_bins, num, den)
    return num


def fit_crystal_factors(sinogram, geometry: SinogramGeometry, iterations: int = 10) -> np.ndarray:
    """Maximum-likelihood per-crystal factors ``r`` of ``sinogram ~ Poisson(sum_pairs r_a r_b)``.

    Parameters
    ----------
    sinogram : ndarray, shape ``geometry.shape``
        Counts (e.g. delayed coincidences).
    geometry : SinogramGeometry
    iterations : int
        EM iterations after the closed-form start.

    Returns
    -------
    ndarray of float64, shape (n_crystals,)

    Notes
    -----
    Start: ``r_a = D_a / sqrt(sum D)`` from the fan sums ``D`` (exact when
    every crystal sees the same fan), then EM updates
    ``r_a <- (share of the counts on a's fan) / sum_(b in fan a) r_b``, each
    followed by a common rescaling so the model total equals the total count
    (a property of the ML solution; it stops the scale from oscillating).
    """
    data = np.ascontiguousarray(sinogram, np.float64).reshape(-1)
    total = data.sum()
    n_crystals = geometry.scanner.n_crystals
    if total <= 0:
        return np.zeros(n_crystals)
    ja, jb, inplane, end1, n, rings, por = kernel_arguments(geometry)
    bins_per_plane = geometry.views * geometry.radial_bins
    fan = crystal_fan_sums(sinogram, geometry)
    # Closed-form start (exact for complete, identical fans); EM fixes the rest.
    r = fan / np.sqrt(fan.sum())
    for _ in range(int(iterations)):
        model = pair_product_sinogram(geometry, r).reshape(-1)
        num = np.zeros(n_crystals)
        den = np.zeros(n_crystals)
        _kernels.binned_fan_em_sums(r, data, model, ja, jb, inplane, end1, n, rings, por, bins_per_plane, num, den)
        r = np.where(den > 0, num / np.where(den > 0, den, 1.0), 0.0)
        # The simultaneous update overshoots the overall scale (scaling every r by c maps to 1/c);
        # the ML solution reproduces the total count, so restore it.
        r *= np.sqrt(total / max(pair_product_sinogram(geometry, r).sum(), 1e-300))
    return r


def randoms_from_delayed(delayed, geometry: SinogramGeometry, iterations: int = 10) -> np.ndarray:
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
    return pair_product_sinogram(geometry, r).astype(np.float32)


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
    return pair_product_sinogram(geometry, factor).astype(np.float32)


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
