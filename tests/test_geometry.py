"""Sinogram geometry against plane geometry and michelogram counting.

Outside sources:
* plane geometry (common practice): crystals at angles ta, tb on a circle of
  radius R define a chord whose normal points at (ta + tb)/2 and whose
  distance from the centre is R*|cos((ta - tb)/2)|;
* michelogram / span / maximum ring difference: F. H. Fahey, "Data acquisition
  in PET imaging", J Nucl Med Technol 30(2):39-49, 2002 (definitions from
  memory, see references.md section 7), and SSRB plane count 2N - 1:
  Daube-Witherspoon & Muehllehner, J Nucl Med 28(11):1717-1724, 1987.
"""

from __future__ import annotations

import numpy as np
import pytest

from conftest import SCANNER_DIR, make_small_scanner, random_events
from twinray.binning import bin_event_arrays
from twinray.geometry import NO_LOR, OUTSIDE_RADIAL, sinogram_geometry
from twinray.scanner import load_scanner


def _every_pair(scanner):
    n = scanner.crystals_per_ring
    ja, jb = np.meshgrid(np.arange(n), np.arange(n), indexing="ij")
    keep = ja != jb
    return ja[keep], jb[keep]


@pytest.mark.parametrize("offset", [0.0, 0.3])
@pytest.mark.parametrize("views", [None, 4])
def test_every_pair_matches_plane_geometry(offset, views):
    """View angle (ta+tb)/2 mod pi within a quarter view step, |s| = R|cos((ta-tb)/2)| exactly.

    Source: plane geometry of a chord (common practice); the quarter-step
    bound is the interleaving convention of DEVELOPERS.md.
    """
    scanner = make_small_scanner(angle_offset_rad=offset, radial_bins=None, views=views)
    g = sinogram_geometry(scanner)
    n, R = scanner.crystals_per_ring, scanner.radius_mm
    theta = scanner.crystal_angles_rad()
    ja, jb = _every_pair(scanner)
    code = g.inplane_bin[ja, jb]
    assert (code >= 0).all(), "with the default radial bins every distinct pair has a LOR"
    view, radial = code // g.radial_bins, code % g.radial_bins
    ta, tb = theta[ja], theta[jb]
    phi_exact = (ta + tb) / 2.0
    phi_view = g.view_angles_rad[view]
    # Angle difference folded into (-pi/2, pi/2]: LOR directions are defined mod pi.
    d = (phi_exact - phi_view + np.pi / 2) % np.pi - np.pi / 2
    mash = (n // 2) // g.views
    view_step = np.pi / g.views
    # Fine views are 2*pi/N apart and each holds LORs within pi/(2N) of its angle (a quarter of
    # a view step without mashing); mashing `mash` of them adds up to (mash - 1)*pi/N.
    bound = (mash - 1) * np.pi / n + np.pi / (2 * n)
    if mash == 1:
        assert bound == pytest.approx(view_step / 4)
    assert np.abs(d).max() <= bound + 1e-12
    # |s| exact.
    s_stored = g.radial_positions_mm[radial]
    np.testing.assert_allclose(np.abs(s_stored), R * np.abs(np.cos((ta - tb) / 2)), rtol=0, atol=1e-9)
    if mash == 1:
        # Signed s along the exact normal turned to the view's half-turn: both crystals lie on the LOR.
        flip = np.abs(((phi_exact - phi_view) % (2 * np.pi)) - np.pi) < np.pi / 2
        phi = np.where(flip, phi_exact + np.pi, phi_exact)
        for j in (ja, jb):
            x, y = R * np.cos(theta[j]), R * np.sin(theta[j])
            np.testing.assert_allclose(x * np.cos(phi) + y * np.sin(phi), s_stored, atol=1e-9)
        # End 1 is at +sqrt(R^2 - s^2) along (-sin phi, cos phi).
        xa, ya = R * np.cos(ta), R * np.sin(ta)
        tau_a = -xa * np.sin(phi) + ya * np.cos(phi)
        assert np.array_equal(tau_a > 0, g.inplane_end1_is_a[ja, jb])


def test_radial_positions_and_view_angles():
    """s_m = R sin(pi m / N) (not arc-corrected), views spaced pi/views; half a pitch at the centre."""
    scanner = load_scanner(SCANNER_DIR / "benchtop.toml")
    g = sinogram_geometry(scanner)
    n, R = scanner.crystals_per_ring, scanner.radius_mm
    m = np.arange(g.radial_bins) - (g.radial_bins - 1) // 2
    np.testing.assert_allclose(g.radial_positions_mm, R * np.sin(np.pi * m / n), atol=1e-12)
    centre = (g.radial_bins - 1) // 2
    np.testing.assert_allclose(g.radial_positions_mm[centre + 1] - g.radial_positions_mm[centre],
                               scanner.crystal_pitch_mm / 2, rtol=1e-3)
    np.testing.assert_allclose(np.diff(g.view_angles_rad), np.pi / g.views, atol=1e-12)
    assert g.views == n // 2


def test_same_crystal_has_no_lor_and_radial_fov_marks(small_scanner):
    g = sinogram_geometry(small_scanner)
    n = small_scanner.crystals_per_ring
    assert (np.diag(g.inplane_bin) == NO_LOR).all()
    # 11 of the 15 possible radial positions are kept: the 4 outermost (|m| = 6, 7) are outside.
    ja, jb = _every_pair(small_scanner)
    # |s| = R|cos(pi (ja - jb)/N)| = R sin(pi |m|/N) with |m| = |N/2 - |ja - jb||.
    outside = g.inplane_bin[ja, jb] == OUTSIDE_RADIAL
    assert np.array_equal(outside, np.abs(np.abs(ja - jb) - n // 2) > 5)


def test_ring_pairs_span1(small_scanner):
    """Span 1: one plane per ordered ring pair, at the pair's mid z, with difference ring(end1) - ring(end2)."""
    g = sinogram_geometry(small_scanner)
    rings = small_scanner.rings
    z = small_scanner.ring_z_mm()
    seen = set()
    for r1 in range(rings):
        for r2 in range(rings):
            p = g.plane_of_rings[r1, r2]
            assert p >= 0
            assert g.plane_ring_difference[p] == r1 - r2
            assert g.plane_z_mm[p] == pytest.approx((z[r1] + z[r2]) / 2)
            seen.add(int(p))
    # Michelogram oracle: span 1 and MRD N-1 give N^2 ring-pair sinograms.
    assert g.planes == rings ** 2 == len(seen)
    # With span 1, ring difference d has N - |d| planes.
    for d in range(-(rings - 1), rings):
        assert np.count_nonzero(g.plane_ring_difference == d) == rings - abs(d)
    # Segments ordered from the most negative difference, planes by increasing z inside each.
    order = np.lexsort((g.plane_z_mm, g.plane_segment))
    assert np.array_equal(order, np.arange(g.planes))


def _michelogram_planes(rings: int, span: int, mrd: int) -> int:
    """Plane count of a michelogram, counted directly from the ring pairs.

    Segment n holds ring differences n*S - (S-1)/2 .. n*S + (S-1)/2 (Fahey 2002);
    its planes are the distinct axial sums r1 + r2 of the pairs it holds.
    """
    half = (span - 1) // 2
    planes = set()
    for r1 in range(rings):
        for r2 in range(rings):
            d = r1 - r2
            if abs(d) <= mrd:
                planes.add((int(np.floor((d + half) / span)), r1 + r2))
    return len(planes)


@pytest.mark.parametrize("rings,span,mrd", [(4, 1, 3), (6, 3, 5), (8, 3, 4), (9, 5, 8), (8, 1, 2)])
def test_plane_counts_match_michelogram(rings, span, mrd):
    scanner = make_small_scanner(rings=rings, span=span, max_ring_difference=mrd)
    g = sinogram_geometry(scanner)
    assert g.planes == _michelogram_planes(rings, span, mrd)
    # Segment 0 holds the 2N - 1 direct and cross planes when span > 1 (N when span = 1).
    assert np.count_nonzero(g.plane_segment == 0) == (2 * rings - 1 if span > 1 else rings)
    assert set(np.unique(g.plane_ring_difference)) == {s * span for s in np.unique(g.plane_segment)}


def test_wholebody_plane_count():
    """The whole-body config: 36 rings, span 3, MRD 17 -> 659 planes by the michelogram count."""
    scanner = load_scanner(SCANNER_DIR / "wholebody.toml")
    g = sinogram_geometry(scanner)
    assert g.planes == _michelogram_planes(36, 3, 17) == 659
    assert g.shape == (659, 288, 323)


def test_ssrb_planes(small_scanner):
    """SSRB: 2N - 1 planes, ring difference 0, each at the ring pair's axial mid-point."""
    g = sinogram_geometry(small_scanner, rebin="ssrb")
    rings = small_scanner.rings
    assert g.planes == 2 * rings - 1
    assert (g.plane_ring_difference == 0).all()
    z = small_scanner.ring_z_mm()
    for r1 in range(rings):
        for r2 in range(rings):
            assert g.plane_z_mm[g.plane_of_rings[r1, r2]] == pytest.approx((z[r1] + z[r2]) / 2)


def test_axial_compression_conserves_counts(rng):
    """Span 1, span 3 and SSRB of the same events bin the same total (axial compression conserves counts)."""
    base = make_small_scanner(rings=6, max_ring_difference=4, span=1)
    cols = random_events(base, 20000, rng, delayed_fraction=None)
    totals = []
    for span in (1, 3, 5):
        g = sinogram_geometry(make_small_scanner(rings=6, max_ring_difference=4, span=span))
        state = bin_event_arrays(cols, g)
        totals.append((int(state.prompts.sum()), state.accounting().to_dict()))
    g = sinogram_geometry(base, rebin="ssrb")
    state = bin_event_arrays(cols, g)
    totals.append((int(state.prompts.sum()), state.accounting().to_dict()))
    assert all(t == totals[0] for t in totals)
    assert totals[0][0] > 10000
