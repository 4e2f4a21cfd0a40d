"""Shared helpers of the correction tests: every crystal pair of a geometry, in plain numpy.

Written independently of the numba pair kernels (numpy broadcasting over the
geometry's lookup tables), so the kernels are checked against it.
"""

import numpy as np

from twinray.scanner import scanner_from_dict


def small_scanner(rings=4, crystals=64, radius=60.0, pitch=4.0, radial_bins=None, span=1, mrd=None, window_ns=6.0):
    table = {"name": f"test-{rings}r{crystals}", "rings": rings, "crystals_per_ring": crystals, "radius_mm": radius,
             "axial_pitch_mm": pitch, "coincidence_window_ns": window_ns, "energy_window_kev": [425.0, 650.0]}
    sino = {"span": span}
    if radial_bins is not None:
        sino["radial_bins"] = radial_bins
    if mrd is not None:
        sino["max_ring_difference"] = mrd
    table["sinogram"] = sino
    return scanner_from_dict(table)


def all_pairs(geometry):
    """Every unordered crystal pair that lands in a bin.

    Returns a dict of arrays: ``a``, ``b`` (global ids), ``flat`` (flat bin),
    ``dr`` (ring(end 1) - ring(end 2) + rings - 1), ``radial``, ``plane``.
    """
    sc = geometry.scanner
    n, rings = sc.crystals_per_ring, sc.rings
    ja, jb = np.nonzero(np.triu(np.ones((n, n), bool), k=1))
    inplane = geometry.inplane_bin[ja, jb]
    keep = inplane >= 0
    ja, jb, inplane = ja[keep], jb[keep], inplane[keep]
    end1 = geometry.inplane_end1_is_a[ja, jb]
    ra, rb = (x.ravel() for x in np.meshgrid(np.arange(rings), np.arange(rings), indexing="ij"))
    A = (ra[:, None] * n + ja[None, :]).ravel()
    B = (rb[:, None] * n + jb[None, :]).ravel()
    RA = np.repeat(ra, len(ja))
    RB = np.repeat(rb, len(ja))
    E1 = np.tile(end1, len(ra))
    IN = np.tile(inplane, len(ra))
    r1 = np.where(E1, RA, RB)
    r2 = np.where(E1, RB, RA)
    plane = geometry.plane_of_rings[r1, r2]
    ok = plane >= 0
    bins = geometry.views * geometry.radial_bins
    return {"a": A[ok], "b": B[ok], "plane": plane[ok], "flat": plane[ok] * bins + IN[ok],
            "dr": (r1 - r2 + rings - 1)[ok], "radial": (IN % geometry.radial_bins)[ok]}


def sinogram_of(pairs, values, geometry):
    """Sum per-pair values into a sinogram."""
    return np.bincount(pairs["flat"], weights=values, minlength=geometry.n_bins).reshape(geometry.shape)


def events_of(pairs, counts, rng, delayed=None):
    """Event columns with ``counts[k]`` rows on pair k (order of a and b randomised)."""
    a = np.repeat(pairs["a"], counts)
    b = np.repeat(pairs["b"], counts)
    swap = rng.random(len(a)) < 0.5
    a, b = np.where(swap, b, a), np.where(swap, a, b)
    cols = {"crystal_a": a.astype(np.int32), "crystal_b": b.astype(np.int32)}
    if delayed is not None:
        cols["delayed"] = np.repeat(delayed, counts)
    return cols
