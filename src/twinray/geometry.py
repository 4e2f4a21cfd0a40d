"""Sinogram geometry: which (plane, view, radial) bin each crystal pair lands in.

Conventions (documented in DEVELOPERS.md):

* In-plane, crystals ``ja`` and ``jb`` at angles ``ta``, ``tb`` on radius
  ``R`` define a line whose normal points at ``(ta + tb)/2`` and whose signed
  distance from the axis is ``R*cos((ta - tb)/2)`` (plane geometry, common
  practice). A point (x, y) is on the LOR of view angle phi and radial
  position s when ``x*cos(phi) + y*sin(phi) = s``.
* Views: ``crystals_per_ring/2`` of them, spaced ``2*pi/crystals_per_ring``.
  Pairs with an even index sum ``ja + jb`` and those with an odd sum are
  interleaved into the same view (half a crystal pitch apart radially), so the
  view angle is the mean of the two, ``offset + (2v + 1/2)*pi/N``; each LOR is
  within a quarter of a view step of it.
* Radial positions are not arc-corrected: bin ``m`` (``m = 0`` at the centre)
  holds the LORs at ``s = R*sin(pi*m/N)`` exactly, the same for every view.
  Near the centre they are half a crystal pitch apart (common practice).
* The end of a LOR at in-plane parameter ``+sqrt(R^2 - s^2)`` along
  ``(-sin(phi), cos(phi))`` is "end 1"; ``plane_ring_difference`` is
  ring(end 1) - ring(end 2).
* Planes: every ordered ring pair with ``|ring difference| <= max_ring_difference``
  goes to a segment (ring differences ``n*span - (span-1)/2 ... n*span + (span-1)/2``)
  and, within it, to the plane of its axial mid-point ``(r1 + r2)/2``
  (michelogram with span). Segments are stored from the most negative ring
  difference to the most positive, planes within a segment by increasing z.
  With ``rebin="ssrb"`` every pair goes to the direct or cross plane of its
  mid-point, 2*rings - 1 planes with ring difference 0 (Daube-Witherspoon &
  Muehllehner 1987).
"""

from __future__ import annotations

import dataclasses
import functools
import json

import numpy as np

from .errors import TwinrayInputError
from .scanner import Scanner, scanner_from_dict

# Marks in the in-plane lookup table.
NO_LOR = -1          # both photons in the same transaxial crystal position
OUTSIDE_RADIAL = -2  # a valid LOR outside the radial field of view


@dataclasses.dataclass(frozen=True, eq=False)
class SinogramGeometry:
    """Layout of a sinogram and the lookup tables that fill it.

    Attributes
    ----------
    scanner : Scanner
    rebin : str
        ``"none"`` (3-D planes with span) or ``"ssrb"``.
    span, max_ring_difference, views, radial_bins : int
    view_angles_rad : ndarray, shape (views,)
    radial_positions_mm : ndarray, shape (radial_bins,)
    plane_z_mm : ndarray, shape (planes,)
        Axial mid-point of every plane, mm.
    plane_ring_difference : ndarray of int, shape (planes,)
        Nominal ring difference of every plane (segment centre; 0 after SSRB).
    plane_segment : ndarray of int, shape (planes,)
    inplane_bin : ndarray of int32, shape (N, N)
        ``view * radial_bins + radial`` for the crystal pair, or ``NO_LOR``
        or ``OUTSIDE_RADIAL``.
    inplane_end1_is_a : ndarray of bool, shape (N, N)
        True when the first crystal of the pair is end 1 of the LOR.
    plane_of_rings : ndarray of int32, shape (rings, rings)
        Plane index for (ring of end 1, ring of end 2), -1 when the ring
        difference exceeds ``max_ring_difference``.
    """

    scanner: Scanner
    rebin: str
    span: int
    max_ring_difference: int
    views: int
    radial_bins: int
    view_angles_rad: np.ndarray
    radial_positions_mm: np.ndarray
    plane_z_mm: np.ndarray
    plane_ring_difference: np.ndarray
    plane_segment: np.ndarray
    inplane_bin: np.ndarray
    inplane_end1_is_a: np.ndarray
    plane_of_rings: np.ndarray

    @property
    def planes(self) -> int:
        return len(self.plane_z_mm)

    @property
    def shape(self) -> tuple:
        """``(planes, views, radial_bins)``."""
        return (self.planes, self.views, self.radial_bins)

    @property
    def n_bins(self) -> int:
        return self.planes * self.views * self.radial_bins

    def description(self) -> dict:
        """What identifies this geometry (used to refuse mismatched files)."""
        return {
            "scanner": self.scanner.to_dict(),
            "rebin": self.rebin,
            "span": self.span,
            "max_ring_difference": self.max_ring_difference,
            "views": self.views,
            "radial_bins": self.radial_bins,
        }

    def same_layout(self, other: "SinogramGeometry") -> bool:
        """True when two geometries bin crystal pairs identically."""
        return (self.shape == other.shape and self.rebin == other.rebin
                and np.array_equal(self.inplane_bin, other.inplane_bin)
                and np.array_equal(self.plane_of_rings, other.plane_of_rings)
                and np.allclose(self.view_angles_rad, other.view_angles_rad)
                and np.allclose(self.radial_positions_mm, other.radial_positions_mm))

    def transaxial_endpoints_mm(self) -> np.ndarray:
        """In-plane (x, y) of both LOR ends per (view, radial) bin, mm.

        Returns
        -------
        ndarray, shape (views, radial_bins, 2, 2)
            ``[..., 0, :]`` is end 1, ``[..., 1, :]`` end 2.
        """
        phi = self.view_angles_rad[:, None]
        s = self.radial_positions_mm[None, :]
        half = np.sqrt(np.maximum(self.scanner.radius_mm ** 2 - s ** 2, 0.0))
        c, sn = np.cos(phi), np.sin(phi)
        out = np.empty((self.views, self.radial_bins, 2, 2))
        for k, sign in enumerate((1.0, -1.0)):
            out[:, :, k, 0] = s * c - sign * half * sn
            out[:, :, k, 1] = s * sn + sign * half * c
        return out

    def axial_endpoints_mm(self) -> np.ndarray:
        """z of end 1 and end 2 of every plane's LORs, mm, shape (planes, 2)."""
        half = 0.5 * self.plane_ring_difference * self.scanner.axial_pitch_mm
        return np.stack([self.plane_z_mm + half, self.plane_z_mm - half], axis=1)


def _segment_of(delta: np.ndarray, span: int) -> np.ndarray:
    """Segment number of ring difference ``delta`` for an odd ``span``."""
    half = (span - 1) // 2
    return np.floor((delta + half) / span).astype(np.int64)


def default_radial_bins(scanner: Scanner) -> int:
    """All radial positions a LOR can have: ``crystals_per_ring - 1`` (odd)."""
    return scanner.crystals_per_ring - 1


def _inplane_tables(n: int, views: int, radial_bins: int, offset: float):
    """In-plane lookup tables (see the module docstring for the conventions)."""
    ja = np.arange(n)[:, None]
    jb = np.arange(n)[None, :]
    total = ja + jb                      # 0 .. 2n-2
    diff = ja - jb                       # -(n-1) .. n-1
    # Fine view over a half turn: floor(total/2) covers 0 .. n-1, i.e. up to 2*pi.
    fine = total // 2
    flipped = fine >= n // 2
    fine = np.where(flipped, fine - n // 2, fine)
    # s = R*cos(pi*diff/n) = R*sin(pi*m/n) with m = n/2 - |diff| folded into (-n/2, n/2).
    m = n // 2 - np.abs(diff)
    m = np.where(flipped, -m, m)
    # End 1 is the end at +sqrt(R^2-s^2) along (-sin phi, cos phi): tau_a = R*sin(pi*diff/n).
    end1_is_a = (np.sin(np.pi * diff / n) > 0) ^ flipped
    mash = (n // 2) // views
    view = fine // mash
    half_r = (radial_bins - 1) // 2
    radial = m + half_r
    inplane = view * radial_bins + radial
    inplane = np.where((radial < 0) | (radial >= radial_bins), OUTSIDE_RADIAL, inplane)
    inplane = np.where(diff == 0, NO_LOR, inplane)
    # Mean angle of the pairs merged into a view: fine views f (sums 2f, 2f+1) have mean
    # offset + (2f + 1/2)*pi/n; a mashed view averages its `mash` fine views.
    fine_angles = offset + (2 * np.arange(n // 2) + 0.5) * np.pi / n
    view_angles = fine_angles.reshape(views, mash).mean(axis=1)
    return inplane.astype(np.int32), end1_is_a, view_angles


@functools.lru_cache(maxsize=16)
def _geometry_cached(scanner_json: str, rebin: str) -> SinogramGeometry:
    scanner = scanner_from_dict(json.loads(scanner_json), source="scanner")
    n, rings = scanner.crystals_per_ring, scanner.rings
    views = scanner.views or n // 2
    radial_bins = scanner.radial_bins or default_radial_bins(scanner)
    span = scanner.span or 1
    mrd = scanner.max_ring_difference if scanner.max_ring_difference is not None else rings - 1

    inplane, end1_is_a, view_angles = _inplane_tables(n, views, radial_bins, scanner.angle_offset_rad)
    m = np.arange(radial_bins) - (radial_bins - 1) // 2
    radial_positions = scanner.radius_mm * np.sin(np.pi * m / n)

    r1 = np.arange(rings)[:, None] * np.ones((1, rings), dtype=np.int64)
    r2 = r1.T
    delta = r1 - r2
    axial_sum = r1 + r2
    allowed = np.abs(delta) <= mrd
    plane_of = np.full((rings, rings), -1, dtype=np.int32)
    if rebin == "ssrb":
        plane_of[allowed] = axial_sum[allowed]
        n_planes = 2 * rings - 1
        plane_sum = np.arange(n_planes)
        plane_delta = np.zeros(n_planes, dtype=np.int64)
        plane_segment = np.zeros(n_planes, dtype=np.int64)
    elif rebin == "none":
        seg = _segment_of(delta, span)
        keys = sorted({(int(s), int(a)) for s, a in zip(seg[allowed], axial_sum[allowed])})
        index = {k: i for i, k in enumerate(keys)}
        for i, j in zip(*np.nonzero(allowed)):
            plane_of[i, j] = index[(int(seg[i, j]), int(axial_sum[i, j]))]
        plane_segment = np.array([k[0] for k in keys], dtype=np.int64)
        plane_sum = np.array([k[1] for k in keys], dtype=np.int64)
        plane_delta = plane_segment * span
        if span == 1:
            plane_delta = plane_segment.copy()
    else:
        raise TwinrayInputError(f"unknown rebinning '{rebin}'; choose none or ssrb")
    plane_z = (plane_sum / 2.0 - (rings - 1) / 2.0) * scanner.axial_pitch_mm

    for arr in (view_angles, radial_positions, plane_z, plane_delta, plane_segment, inplane, end1_is_a, plane_of):
        arr.setflags(write=False)
    return SinogramGeometry(
        scanner=scanner, rebin=rebin, span=span if rebin == "none" else 1, max_ring_difference=mrd,
        views=views, radial_bins=radial_bins, view_angles_rad=view_angles,
        radial_positions_mm=radial_positions, plane_z_mm=plane_z, plane_ring_difference=plane_delta,
        plane_segment=plane_segment, inplane_bin=inplane, inplane_end1_is_a=end1_is_a,
        plane_of_rings=plane_of)


def sinogram_geometry(scanner: Scanner, rebin: str = "none") -> SinogramGeometry:
    """The sinogram geometry of a scanner (built once, then cached in memory).

    Parameters
    ----------
    scanner : Scanner
        Crystal geometry plus the optional ``[sinogram]`` table (``radial_bins``,
        ``max_ring_difference``, ``span``, ``views``).
    rebin : {"none", "ssrb"}
        ``"none"`` keeps every ring pair in 3-D planes mashed by ``span``;
        ``"ssrb"`` gives the 2*rings - 1 direct and cross planes of single-slice
        rebinning.

    Returns
    -------
    SinogramGeometry

    Notes
    -----
    The lookup tables are factored into an in-plane table (crystals_per_ring^2
    entries) and a ring-pair table (rings^2 entries), so they are small and
    cheap to build (well under a second for the whole-body scanner); no
    on-disk cache is needed.

    References
    ----------
    M. E. Daube-Witherspoon and G. Muehllehner, "Treatment of axial data in
    three-dimensional PET", J Nucl Med 28(11):1717-1724, 1987.
    """
    return _geometry_cached(scanner.to_json(), rebin)
