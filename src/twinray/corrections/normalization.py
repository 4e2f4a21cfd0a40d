"""Normalization: crystal efficiencies (fan sums) and geometric factors.

Model (component-based normalization). The expected number of true
coincidences of a normalization scan on crystal pair (a, b) is

    n_ab = eps_a * eps_b * g[dr, radial] * src[dr, radial]

with ``eps`` the crystal efficiencies, ``g`` the geometric efficiency of a
LOR at that ring difference and radial position (solid angle, incidence,
obliqueness; the same for every view by rotational symmetry and every axial
position by translational symmetry) and ``src`` the known line integral of
the normalization source (from the scan's ``normalization_source``
metadata). For this Poisson model the sufficient statistics are the crystal
fan sums ``F_a = sum_b n_ab`` and the table sums ``M[dr, radial]``, so the
scan is streamed once into these small arrays (memory independent of the
scan length) and the maximum-likelihood ``eps`` and ``g`` are found by
alternating the two closed-form updates

    eps_a <- F_a / sum_b eps_b g src        (the fan-sum step)
    g     <- M / sum_(a,b in cell) eps_a eps_b src

``g`` is taken to have the mirror symmetry of a ring scanner (the same for
``s`` and ``-s`` and for ring difference ``d`` and ``-d``), so each value is
fitted to the pooled counts of four cells. Randoms are removed by
subtracting the delayed fan and table sums.

The normalization factor of a bin is ``norm = 1 / sum over its crystal pairs
of eps_a eps_b g`` (so it also holds the axial-compression factor, 1/number
of ring pairs, when span > 1). ``eps`` has mean 1 and ``g`` mean 1 over the
crystal pairs of the covered cells, so ``norm`` is about 1 for span 1.

References
----------
M. E. Casey and E. J. Hoffman, "Quantitation in positron emission computed
tomography: 7. A technique to reduce noise in accidental coincidence
measurements and coincidence efficiency calibration", J Comput Assist Tomogr
10(5):845-850, 1986 (fan sums; bibliographic details from memory).
M. Defrise, D. W. Townsend, D. Bailey, A. Geissbuhler, C. Michel and
T. Jones, "A normalization technique for 3D PET data", Phys Med Biol
36(7):939-952, 1991.
R. D. Badawi and P. K. Marsden, "Developments in component-based
normalization for 3D PET", Phys Med Biol 44(2):571-594, 1999 (from memory).
"""

from __future__ import annotations

import dataclasses
import math

import numpy as np

from ..accounting import FIELDS, Accounting
from ..errors import TwinrayInputError
from ..geometry import SinogramGeometry
from . import _kernels
from .pairs import (kernel_arguments, pair_product_sinogram, pair_ring_difference_mm, pairs_per_bin,
                    ring_difference_count)

SOURCE_SHAPES = ("flood", "cylinder", "rotating-line")


@dataclasses.dataclass(frozen=True)
class NormalizationSource:
    """The known source of a normalization scan (event metadata ``normalization_source``).

    Attributes
    ----------
    shape : {"flood", "cylinder", "rotating-line"}
    radius_mm : float
        Flood: half-width of the swept region; cylinder: its radius; rotating
        line: radius of its orbit.
    mu_per_cm : float
        Linear attenuation coefficient of the cylinder, 1/cm (ignored for the
        other shapes).
    """

    shape: str
    radius_mm: float
    mu_per_cm: float = 0.0


def source_from_metadata(metadata: dict, where: str) -> NormalizationSource:
    """Read and check the ``normalization_source`` object of a scan's metadata."""
    src = metadata.get("normalization_source")
    if src is None:
        raise TwinrayInputError(f"{where} has no 'normalization_source' in its twinray metadata; "
                                "it is not a normalization scan (or give --source-shape and --source-radius-mm)")
    if not isinstance(src, dict):
        raise TwinrayInputError(f"{where}: 'normalization_source' must be an object")
    shape = src.get("shape")
    if shape not in SOURCE_SHAPES:
        raise TwinrayInputError(f"{where}: normalization_source shape {shape!r} is not one of {', '.join(SOURCE_SHAPES)}")
    return check_source(NormalizationSource(shape, src.get("radius_mm"), src.get("mu_per_cm", 0.0) or 0.0), where)


def check_source(source: NormalizationSource, where: str) -> NormalizationSource:
    """Validate the numbers of a normalization source."""
    r, mu = source.radius_mm, source.mu_per_cm
    if isinstance(r, bool) or not isinstance(r, (int, float)) or not math.isfinite(r) or r <= 0:
        raise TwinrayInputError(f"{where}: normalization source radius_mm must be a positive number, got {r!r}")
    if isinstance(mu, bool) or not isinstance(mu, (int, float)) or not math.isfinite(mu) or mu < 0:
        raise TwinrayInputError(f"{where}: normalization source mu_per_cm must be >= 0 (1/cm), got {mu!r}")
    if mu > 3.0:
        raise TwinrayInputError(f"{where}: normalization source mu_per_cm = {mu:g} is not a 511 keV "
                                "attenuation coefficient in 1/cm (water is 0.096)")
    return NormalizationSource(source.shape, float(r), float(mu))


def radial_bin_edges_mm(geometry: SinogramGeometry) -> np.ndarray:
    """Edges of the radial bins (mid-points between positions), mm, shape (radial_bins + 1,)."""
    s = np.asarray(geometry.radial_positions_mm, dtype=np.float64)
    if len(s) == 1:
        half = geometry.scanner.crystal_pitch_mm / 4
        return np.array([s[0] - half, s[0] + half])
    mid = 0.5 * (s[1:] + s[:-1])
    return np.concatenate([[s[0] - (mid[0] - s[0])], mid, [s[-1] + (s[-1] - mid[-1])]])


def source_line_integrals(geometry: SinogramGeometry, source: NormalizationSource) -> np.ndarray:
    """Activity line integral (relative) of the normalization source per (ring difference, radial).

    Parameters
    ----------
    geometry : SinogramGeometry
    source : NormalizationSource

    Returns
    -------
    ndarray, shape (2*rings - 1, radial_bins)
        ``flood``: 1 for ``|s| < r0`` (data contract: every such LOR sees the
        same line integral, no attenuation). ``cylinder``: chord length
        ``L = 2*sqrt(r0^2 - s^2)/cos(theta)`` times the attenuation
        ``exp(-mu*L)`` (uniform activity and attenuation, plane geometry).
        ``rotating-line``: the time-averaged thin shell of radius r0 gives
        ``2*r0/sqrt(r0^2 - s^2)/cos(theta)``, averaged over the width of the
        radial bin (its integral is an arcsine, so the edge singularity is
        integrable). 0 where the LOR misses the source. ``theta`` is the
        LOR's angle to the transaxial plane.
    """
    s = np.asarray(geometry.radial_positions_mm, dtype=np.float64)[None, :]
    dz = pair_ring_difference_mm(geometry)[:, None]
    R = geometry.scanner.radius_mm
    transaxial = 2.0 * np.sqrt(np.maximum(R * R - s * s, 0.0))
    inv_cos = np.sqrt(transaxial ** 2 + dz ** 2) / transaxial
    r0 = source.radius_mm
    if source.shape == "flood":
        out = (np.abs(s) < r0).astype(np.float64) * np.ones_like(inv_cos)
    elif source.shape == "cylinder":
        chord = 2.0 * np.sqrt(np.maximum(r0 * r0 - s * s, 0.0)) * inv_cos
        out = chord * np.exp(-source.mu_per_cm / 10.0 * chord)
    else:
        edges = np.clip(radial_bin_edges_mm(geometry), -r0, r0)
        width = np.diff(radial_bin_edges_mm(geometry))
        shell = 2.0 * r0 * np.diff(np.arcsin(edges / r0)) / width
        out = shell[None, :] * inv_cos
    return np.ascontiguousarray(out)


@dataclasses.dataclass(frozen=True)
class FanSums:
    """What a normalization scan contributes to the fit (small, mergeable).

    Attributes
    ----------
    fan_prompts, fan_delayed : ndarray of int64, shape (n_crystals,)
        Binned prompts / delayed events on each crystal.
    table_prompts, table_delayed : ndarray of int64, shape (2*rings - 1, radial_bins)
        Binned events per (ring difference, radial bin).
    accounting : Accounting
    """

    fan_prompts: np.ndarray
    fan_delayed: np.ndarray
    table_prompts: np.ndarray
    table_delayed: np.ndarray
    accounting: Accounting

    def __add__(self, other: "FanSums") -> "FanSums":
        return FanSums(self.fan_prompts + other.fan_prompts, self.fan_delayed + other.fan_delayed,
                       self.table_prompts + other.table_prompts, self.table_delayed + other.table_delayed,
                       self.accounting + other.accounting)


def empty_fan_sums(geometry: SinogramGeometry) -> FanSums:
    sc = geometry.scanner
    table = (ring_difference_count(geometry), geometry.radial_bins)
    return FanSums(np.zeros(sc.n_crystals, np.int64), np.zeros(sc.n_crystals, np.int64),
                   np.zeros(table, np.int64), np.zeros(table, np.int64), Accounting())


def fan_sums_of_batch(columns: dict, geometry: SinogramGeometry, energy_window=None) -> FanSums:
    """Fan sums of one batch of events (the same selection as binning, accounting included).

    Parameters
    ----------
    columns : dict of str to ndarray
        ``crystal_a``, ``crystal_b``, optionally ``delayed``,
        ``energy_a_kev``, ``energy_b_kev``.
    geometry : SinogramGeometry
    energy_window : (lo, hi) keV or None
        Applied when given (both photons, limits inclusive).
    """
    sc = geometry.scanner
    ca = np.ascontiguousarray(np.clip(np.asarray(columns["crystal_a"]), -1, np.iinfo(np.int32).max), np.int32)
    cb = np.ascontiguousarray(np.clip(np.asarray(columns["crystal_b"]), -1, np.iinfo(np.int32).max), np.int32)
    delayed = np.ascontiguousarray(columns["delayed"], np.bool_) if "delayed" in columns else np.zeros(0, np.bool_)
    use_energy = energy_window is not None
    if use_energy:
        ea = np.ascontiguousarray(columns["energy_a_kev"], np.float32)
        eb = np.ascontiguousarray(columns["energy_b_kev"], np.float32)
        lo, hi = energy_window
    else:
        ea = eb = np.zeros(0, np.float32)
        lo = hi = 0.0
    counts = np.zeros(len(FIELDS), np.int64)
    inplane = np.ascontiguousarray(geometry.inplane_bin, dtype=np.int32)
    end1 = np.ascontiguousarray(geometry.inplane_end1_is_a, dtype=np.bool_)
    por = np.ascontiguousarray(geometry.plane_of_rings, dtype=np.int32)
    out = empty_fan_sums(geometry)
    _kernels.fan_sums_batch(ca, cb, delayed, delayed.size > 0, ea, eb, use_energy, np.float32(lo), np.float32(hi),
                            sc.crystals_per_ring, sc.rings, geometry.radial_bins, inplane, end1, por, counts,
                            out.fan_prompts, out.fan_delayed, out.table_prompts, out.table_delayed)
    return dataclasses.replace(out, accounting=Accounting.from_counts(counts))


def stream_fan_sums(source, geometry: SinogramGeometry, batch_size: int = 1 << 20, progress=None) -> FanSums:
    """Stream an event study into fan sums (memory independent of its length).

    Parameters
    ----------
    source : EventSource
        From :func:`twinray.events.open_events`.
    geometry : SinogramGeometry
    batch_size : int
        Rows per decoded batch.
    progress : callable, optional
        Called with the number of rows of every batch.
    """
    from ..events import iter_event_batches

    columns = ["crystal_a", "crystal_b"]
    if source.has_delayed:
        columns.append("delayed")
    window = None
    if source.has_energy:
        columns += ["energy_a_kev", "energy_b_kev"]
        window = tuple(float(v) for v in geometry.scanner.energy_window_kev)
    total = empty_fan_sums(geometry)
    for _, arrays in iter_event_batches(source, columns, batch_size, prefetch=2):
        total = total + fan_sums_of_batch(arrays, geometry, window)
        if progress is not None:
            progress(len(arrays["crystal_a"]))
    return total


@dataclasses.dataclass(frozen=True)
class NormalizationFit:
    """Result of :func:`fit_normalization`.

    Attributes
    ----------
    crystal_efficiency : ndarray, shape (n_crystals,)
        Relative efficiency per global crystal id, mean 1.
    geometric_factor : ndarray, shape (2*rings - 1, radial_bins)
        Relative geometric efficiency per (ring difference + rings - 1,
        radial bin); cells the source did not cover are copied from the
        nearest covered radial bin of the same ring difference.
    norm : ndarray, shape (planes, view, radial)
        1 / detection efficiency of each bin (0 where it is 0).
    covered : ndarray of bool, shape of geometric_factor
        Cells the source illuminated.
    iterations : int
    notes : tuple of str
        Warnings for the user (dead crystals, uncovered radial bins).
    """

    crystal_efficiency: np.ndarray
    geometric_factor: np.ndarray
    norm: np.ndarray
    covered: np.ndarray
    iterations: int
    notes: tuple


def fit_normalization(fan: FanSums, geometry: SinogramGeometry, source: NormalizationSource,
                      iterations: int = 10) -> NormalizationFit:
    """Maximum-likelihood crystal efficiencies and geometric factors from fan sums.

    Parameters
    ----------
    fan : FanSums
        From :func:`stream_fan_sums` (prompts minus delayed are used).
    geometry : SinogramGeometry
    source : NormalizationSource
    iterations : int
        Alternations of the fan-sum and geometric-factor updates.

    Returns
    -------
    NormalizationFit

    Raises
    ------
    TwinrayInputError
        When the scan has too few counts to estimate anything.

    References
    ----------
    Defrise et al., Phys Med Biol 36:939-952, 1991; Casey and Hoffman, J
    Comput Assist Tomogr 10:845-850, 1986; Badawi and Marsden, Phys Med
    Biol 44:571-594, 1999.
    """
    F = np.maximum(fan.fan_prompts - fan.fan_delayed, 0).astype(np.float64)
    M = np.maximum(fan.table_prompts - fan.table_delayed, 0).astype(np.float64)
    if F.sum() <= 0:
        raise TwinrayInputError("the normalization scan has no binned true coincidences (prompts minus delayed)")
    src = source_line_integrals(geometry, source)
    args = kernel_arguments(geometry)
    n_pairs_table = np.zeros_like(src)
    scratch_fan = np.zeros_like(F)
    _kernels.fan_and_table_sums(np.ones_like(F), np.ones_like(src), *args, scratch_fan, n_pairs_table)
    covered = (src > 1e-9 * src.max()) & (n_pairs_table > 0)
    if not covered.any():
        raise TwinrayInputError(f"the normalization source ({source.shape}, radius {source.radius_mm:g} mm) "
                                "covers no LOR of this sinogram geometry")
    eps = np.ones_like(F)
    g = np.where(covered, 1.0, 0.0)
    M_sym = _mirror_sum(M)
    for _ in range(int(iterations)):
        fan_model = np.zeros_like(F)
        table_model = np.zeros_like(src)
        _kernels.fan_and_table_sums(eps, np.ascontiguousarray(g * src), *args, fan_model, table_model)
        eps = np.where(fan_model > 0, F / np.where(fan_model > 0, fan_model, 1.0), 0.0)
        fan_model[:] = 0.0
        table_model[:] = 0.0
        _kernels.fan_and_table_sums(eps, np.ascontiguousarray(g * src), *args, fan_model, table_model)
        # Mirror symmetry of a ring scanner (s -> -s, ring difference -> -ring difference): one g for
        # the four mirror cells, fitted to their pooled counts (four times the counts per value).
        denom = _mirror_sum(table_model * src)
        g = np.where(covered & (denom > 0), M_sym / np.where(denom > 0, denom, 1.0), 0.0)
    notes = []
    dead = int(np.count_nonzero(eps == 0))
    if dead:
        notes.append(f"{dead} crystal(s) recorded no true coincidence; their efficiency is 0 and the LORs "
                     "through them get norm 0")
    mean_eps = eps.mean()
    eps = eps / mean_eps
    g = g * mean_eps ** 2
    g = g / (np.sum(g * n_pairs_table * covered) / np.sum(n_pairs_table * covered))
    g = _fill_uncovered(g, covered, n_pairs_table > 0)
    if not covered[n_pairs_table > 0].all():
        notes.append(f"the source (radius {source.radius_mm:g} mm) does not cover every radial bin; the "
                     "geometric factors outside it are copied from the nearest covered radial bin")
    norm = norm_from_factors(geometry, eps, g)
    return NormalizationFit(crystal_efficiency=eps, geometric_factor=g, norm=norm,
                            covered=covered, iterations=int(iterations), notes=tuple(notes))


def _mirror_sum(table):
    """Sum of a (ring difference, radial) table and its mirror images in s and in ring difference."""
    return table + table[::-1, :] + table[:, ::-1] + table[::-1, ::-1]


def _fill_uncovered(g, covered, has_pairs):
    """Copy each row's nearest covered radial value into cells the source did not reach."""
    out = g.copy()
    for row in range(g.shape[0]):
        idx = np.nonzero(covered[row])[0]
        if idx.size == 0:
            # A ring difference with no covered cell: use the mean profile of the covered rows.
            continue
        need = np.nonzero(has_pairs[row] & ~covered[row])[0]
        if need.size:
            nearest = idx[np.argmin(np.abs(need[:, None] - idx[None, :]), axis=1)]
            out[row, need] = g[row, nearest]
    rows_missing = has_pairs.any(axis=1) & ~covered.any(axis=1)
    if rows_missing.any() and covered.any(axis=1).any():
        ok = covered.any(axis=1)
        out[rows_missing] = out[ok].mean(axis=0)
    return out


def norm_from_factors(geometry: SinogramGeometry, crystal_efficiency=None, geometric_factor=None) -> np.ndarray:
    """``1 / sum over the bin's crystal pairs of eps_a eps_b g`` (0 where that is 0).

    With no factors this is ``1 / (number of crystal pairs in the bin)``: the
    axial-compression (span) and view-mashing part of the normalization,
    used when no normalization file is given.
    """
    # In place, in float32: a whole-body sinogram has 6e7 bins.
    if crystal_efficiency is None and geometric_factor is None:
        norm = np.array(pairs_per_bin(geometry), dtype=np.float32)  # cached: the same for every frame
    else:
        norm = pair_product_sinogram(geometry, crystal_efficiency, geometric_factor, dtype=np.float32)
    positive = norm > 0
    np.divide(1.0, norm, out=norm, where=positive)
    norm[~positive] = 0.0
    return norm


# ---- normalization files ---------------------------------------------------------------------------------

@dataclasses.dataclass(frozen=True)
class NormalizationResult:
    """What :func:`make_normalization` did.

    Attributes
    ----------
    output : Path
    fit : NormalizationFit
    source : NormalizationSource
    accounting : Accounting
    warnings : tuple of str
    timings_s : dict
    """

    output: object
    fit: NormalizationFit
    source: NormalizationSource
    accounting: Accounting
    warnings: tuple
    timings_s: dict


def make_normalization(events, output, *, scanner=None, rebin: str = "none", source: NormalizationSource | None = None,
                       iterations: int = 10, batch_size: int = 1 << 20, progress=None) -> NormalizationResult:
    """Normalization file (data contract section 3) from a normalization scan.

    Parameters
    ----------
    events : path-like or EventSource
        The normalization scan (Parquet file or folder). Its metadata
        ``normalization_source`` describes the source unless ``source`` is
        given.
    output : path-like
        NORM.h5 to write (atomically; never one of the inputs).
    scanner : Scanner or path-like, optional
        ``--scanner`` geometry (must agree with the embedded one).
    rebin : {"none", "ssrb"}
        Sinogram layout the ``norm`` dataset is made for.
    source : NormalizationSource, optional
        Overrides the metadata.
    iterations : int
    batch_size : int
    progress : callable, optional
        ``progress(rows_in_batch, total_rows)`` after every batch.

    Returns
    -------
    NormalizationResult
    """
    import time
    from pathlib import Path

    from ..atomic import refuse_overwriting_inputs
    from ..events import EventSource, open_events
    from ..geometry import sinogram_geometry
    from ..sinogram_io import write_sinogram_file

    t0 = time.perf_counter()
    src_events = events if isinstance(events, EventSource) else open_events(events, scanner)
    scanner_path = scanner if scanner is not None and not hasattr(scanner, "crystals_per_ring") else None
    refuse_overwriting_inputs(output, [src_events.path, *src_events.paths, scanner_path])
    where = f"normalization scan {src_events.path}"
    if source is None:
        source = source_from_metadata(src_events.metadata, where)
    else:
        source = check_source(source, where)
    if src_events.num_rows == 0:
        raise TwinrayInputError(f"{where} contains no events")
    geometry = sinogram_geometry(src_events.scanner, rebin)
    total = src_events.num_rows
    report = (lambda n: progress(n, total)) if progress is not None else None
    t1 = time.perf_counter()
    fan = stream_fan_sums(src_events, geometry, batch_size=batch_size, progress=report)
    if fan.accounting.read != total:
        raise TwinrayInputError(f"{where}: read {fan.accounting.read} rows but the files declare {total}")
    t2 = time.perf_counter()
    fit = fit_normalization(fan, geometry, source, iterations=iterations)
    t3 = time.perf_counter()
    warnings = list(fit.notes)
    if not src_events.has_delayed:
        warnings.append("the normalization scan has no delayed coincidences; randoms were not subtracted")
    trues = int(max(fan.fan_prompts.sum() - fan.fan_delayed.sum(), 0) // 2)
    attrs = {
        "normalization_source": dataclasses.asdict(source),
        "normalization_scan": [p.name for p in src_events.paths],
        "normalization_method": "fan-sum crystal efficiencies and (ring difference, radial) geometric factors, "
                                "maximum likelihood (Defrise 1991; Casey & Hoffman 1986; Badawi & Marsden 1999)",
        "normalization_iterations": fit.iterations,
        "normalization_true_counts": trues,
    }
    if "isotope" in src_events.metadata:
        attrs["isotope"] = src_events.metadata["isotope"]
    path = write_sinogram_file(output, {"norm": fit.norm}, geometry, accounting=fan.accounting, attrs=attrs,
                               frame_duration_s=float(src_events.duration_s or 0.0),
                               extra_arrays={"crystal_efficiency": fit.crystal_efficiency.astype(np.float32),
                                             "geometric_factor": fit.geometric_factor.astype(np.float32)})
    t4 = time.perf_counter()
    return NormalizationResult(output=Path(path), fit=fit, source=source, accounting=fan.accounting,
                               warnings=tuple(warnings),
                               timings_s={"open": round(t1 - t0, 4), "fan_sums": round(t2 - t1, 4),
                                          "fit": round(t3 - t2, 4), "write": round(t4 - t3, 4)})


def read_norm_file(path, geometry: SinogramGeometry) -> np.ndarray:
    """The ``norm`` sinogram of a normalization file, refused unless made for ``geometry``.

    Raises
    ------
    TwinrayInputError
        Missing or unreadable file, no ``norm`` dataset, or a file made for
        another sinogram geometry (scanner, span, ring difference, views,
        radial bins or rebinning differ).
    """
    from ..sinogram_io import read_sinogram_file

    f = read_sinogram_file(path, datasets=("norm", "crystal_efficiency"))
    if "norm" not in f.arrays:
        raise TwinrayInputError(f"normalization file {path} has no 'norm' dataset")
    if "crystal_efficiency" not in f.arrays:
        # Data contract s.3: a normalization file has crystal_efficiency and norm; a corrected
        # sinogram file also holds a `norm` dataset but is not one.
        raise TwinrayInputError(f"{path} is not a normalization file (no 'crystal_efficiency' dataset); "
                                "make one with twinray normalize")
    other = f.geometry
    if not (other.same_layout(geometry) and _same_crystals(other, geometry)):
        raise TwinrayInputError(
            f"normalization file {path} was made for another sinogram geometry "
            f"({other.scanner.name}: {other.planes}x{other.views}x{other.radial_bins}, rebin {other.rebin}, "
            f"span {other.span}) but the events give {geometry.scanner.name}: "
            f"{geometry.planes}x{geometry.views}x{geometry.radial_bins}, rebin {geometry.rebin}, span {geometry.span}; "
            "run twinray normalize with the same --scanner and --rebin")
    norm = np.asarray(f.arrays["norm"], dtype=np.float32)
    if not np.all(np.isfinite(norm)) or np.any(norm < 0):
        raise TwinrayInputError(f"normalization file {path}: 'norm' has negative or non-finite values")
    return norm


def _same_crystals(a: SinogramGeometry, b: SinogramGeometry) -> bool:
    sa, sb = a.scanner, b.scanner
    return all(math.isclose(float(getattr(sa, k)), float(getattr(sb, k)), rel_tol=1e-6, abs_tol=1e-12)
               for k in ("rings", "crystals_per_ring", "radius_mm", "axial_pitch_mm", "angle_offset_rad"))
