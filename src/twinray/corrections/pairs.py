"""Crystal pairs behind every sinogram bin.

Corrections that are products of per-crystal factors (crystal efficiencies,
randoms singles factors, dead-time live fractions) are computed at the
crystal-pair level and summed into the bins, so they stay exact when a bin
holds several pairs (axial span, view mashing). The pair list is factored
like the binning lookup tables: an in-plane list crossed with ring pairs.
"""

from __future__ import annotations

import functools

import numpy as np

from ..geometry import SinogramGeometry
from . import _kernels


@functools.lru_cache(maxsize=8)
def _inplane_pairs_cached(key, inplane_bin_bytes, end1_bytes, n):
    inplane = np.frombuffer(inplane_bin_bytes, dtype=np.int32).reshape(n, n)
    end1 = np.frombuffer(end1_bytes, dtype=np.bool_).reshape(n, n)
    ja, jb = np.nonzero(np.triu(inplane >= 0, k=1))
    out = (np.ascontiguousarray(ja, dtype=np.int64), np.ascontiguousarray(jb, dtype=np.int64),
           np.ascontiguousarray(inplane[ja, jb], dtype=np.int64), np.ascontiguousarray(end1[ja, jb]))
    for arr in out:
        arr.setflags(write=False)
    return out


def inplane_pairs(geometry: SinogramGeometry):
    """In-plane crystal pairs ``ja < jb`` that fall in the radial field of view.

    Returns
    -------
    ja, jb : ndarray of int64
        In-ring crystal positions.
    inplane : ndarray of int64
        ``view * radial_bins + radial`` of the pair.
    end1_is_a : ndarray of bool
        True when crystal ``ja`` is end 1 of the LOR.
    """
    n = geometry.scanner.crystals_per_ring
    inplane = np.ascontiguousarray(geometry.inplane_bin, dtype=np.int32)
    end1 = np.ascontiguousarray(geometry.inplane_end1_is_a, dtype=np.bool_)
    return _inplane_pairs_cached(geometry.scanner.to_json() + geometry.rebin, inplane.tobytes(), end1.tobytes(), n)


def kernel_arguments(geometry: SinogramGeometry) -> tuple:
    """The geometry arguments shared by the crystal-pair kernels.

    ``(ja, jb, inplane, end1_is_a, radial, crystals_per_ring, rings, plane_of_rings)``.
    """
    ja, jb, inplane, end1 = inplane_pairs(geometry)
    sc = geometry.scanner
    plane_of_rings = np.ascontiguousarray(geometry.plane_of_rings, dtype=np.int32)
    radial = np.ascontiguousarray(inplane % geometry.radial_bins)
    return ja, jb, inplane, end1, radial, sc.crystals_per_ring, sc.rings, plane_of_rings


def ring_difference_count(geometry: SinogramGeometry) -> int:
    """Rows of a (ring difference, radial) table: ``2*rings - 1``."""
    return 2 * geometry.scanner.rings - 1


def pair_product_sinogram(geometry: SinogramGeometry, crystal_factor=None, pair_table=None, dtype=None) -> np.ndarray:
    """Sum over the crystal pairs of each bin of ``f_a * f_b * table[ring difference, radial]``.

    Parameters
    ----------
    geometry : SinogramGeometry
    crystal_factor : ndarray, shape (n_crystals,), optional
        Per-crystal factor ``f`` (default 1).
    pair_table : ndarray, shape (2*rings - 1, radial_bins), optional
        Factor per ring difference (end 1 minus end 2, offset by rings - 1)
        and radial bin (default 1).
    dtype : numpy dtype, optional
        Of the result (default float64; float32 halves the memory of large
        sinograms).

    Returns
    -------
    ndarray, shape ``geometry.shape``
        With both defaults: the number of crystal pairs in each bin.
    """
    sc = geometry.scanner
    f = np.ones(sc.n_crystals) if crystal_factor is None else np.ascontiguousarray(crystal_factor, np.float64)
    table = (np.ones((ring_difference_count(geometry), geometry.radial_bins)) if pair_table is None
             else np.ascontiguousarray(pair_table, np.float64))
    if f.shape != (sc.n_crystals,):
        raise ValueError(f"crystal factor has shape {f.shape}, expected ({sc.n_crystals},)")
    if table.shape != (ring_difference_count(geometry), geometry.radial_bins):
        raise ValueError(f"pair table has shape {table.shape}")
    out = np.zeros(geometry.n_bins, dtype=np.float64 if dtype is None else dtype)
    _kernels.pair_product_sinogram(f, table, *kernel_arguments(geometry), geometry.views * geometry.radial_bins, out)
    return out.reshape(geometry.shape)


@functools.lru_cache(maxsize=4)
def pairs_per_bin(geometry: SinogramGeometry) -> np.ndarray:
    """Number of crystal pairs in each bin (1 everywhere for span 1 and unmashed views); read-only, cached."""
    out = pair_product_sinogram(geometry, dtype=np.float32)
    out.setflags(write=False)
    return out


@functools.lru_cache(maxsize=4)
def one_pair_per_bin(geometry: SinogramGeometry) -> bool:
    """True when no bin holds more than one crystal pair (then per-bin and per-pair data are the same)."""
    return float(pairs_per_bin(geometry).max()) <= 1.0


def pair_ring_difference_mm(geometry: SinogramGeometry) -> np.ndarray:
    """Axial distance between the two ends for each row of a pair table, mm (end 1 minus end 2)."""
    rings = geometry.scanner.rings
    return (np.arange(2 * rings - 1) - (rings - 1)) * geometry.scanner.axial_pitch_mm
