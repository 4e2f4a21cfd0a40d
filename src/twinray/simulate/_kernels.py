"""Numba kernels of the simulator: emission, photon transport, randoms.

Only arithmetic lives here; :mod:`twinray.simulate.simulator` validates the
inputs and documents the physics. Every kernel draws from the xoshiro256**
state ``rng`` it is given (:mod:`._rng`, filled once per chunk from the
chunk's seed), so the output of a chunk depends only on its seed and its
inputs. Poisson counts (candidates per shape, randoms per step) are drawn by
the caller with numpy.

Shape parameters are packed in rows of ``SHAPE_PARAMS`` floats:
``cx, cy, cz, a, b, c, cos_rot, sin_rot`` (centre in mm; half-extents a, b,
c in mm along the shape's own axes; rotation about z). Shape kinds are
``CYLINDER``, ``ELLIPSOID`` (spheres too) and ``BOX``.
"""

from __future__ import annotations

import math

import numpy as np
from numba import njit

from ..raytrace import siddon_line_integral
from ._rng import azimuth, below, exponential, in_ball, isotropic, normal_pair, uniform, unit_disk

CYLINDER = 0
ELLIPSOID = 1
BOX = 2
SHAPE_PARAMS = 8

#: Speed of light in mm/ns (exact, SI definition).
C_MM_PER_NS = 299.792458

# Event kinds in the truth column.
TRUE = 0
SCATTER = 1
RANDOM = 2

# Indices of the counters returned by detect_pairs.
N_ANNIHILATIONS = 0
N_PHOTONS_SCATTERED = 1
N_PHOTONS_ABSORBED = 2
N_COUNTERS = 3

_INF = np.inf


# ---------------------------------------------------------------- geometry

@njit(cache=True, inline="always")
def _to_local(prm, x, y, z):
    dx = x - prm[0]
    dy = y - prm[1]
    return dx * prm[6] + dy * prm[7], -dx * prm[7] + dy * prm[6], z - prm[2]


@njit(cache=True, inline="always")
def _dir_to_local(prm, dx, dy, dz):
    return dx * prm[6] + dy * prm[7], -dx * prm[7] + dy * prm[6], dz


@njit(cache=True, inline="always")
def inside_shape(kind, prm, x, y, z):
    """True when the point (mm) lies inside the shape (boundary included)."""
    u, v, w = _to_local(prm, x, y, z)
    if kind == BOX:
        return abs(u) <= prm[3] and abs(v) <= prm[4] and abs(w) <= prm[5]
    if kind == CYLINDER:
        return (u / prm[3]) ** 2 + (v / prm[4]) ** 2 <= 1.0 and abs(w) <= prm[5]
    return (u / prm[3]) ** 2 + (v / prm[4]) ** 2 + (w / prm[5]) ** 2 <= 1.0


@njit(cache=True)
def _quadric_interval(px, py, pz, dx, dy, dz):
    """Parameter interval of p + t d inside the unit sphere (or disk when dz = pz = 0)."""
    a = dx * dx + dy * dy + dz * dz
    b = px * dx + py * dy + pz * dz
    c = px * px + py * py + pz * pz - 1.0
    if a == 0.0:
        if c <= 0.0:
            return -_INF, _INF
        return _INF, -_INF
    disc = b * b - a * c
    if disc <= 0.0:
        return _INF, -_INF
    root = math.sqrt(disc)
    return (-b - root) / a, (-b + root) / a


@njit(cache=True)
def _slab(p, d, half):
    if d == 0.0:
        if abs(p) <= half:
            return -_INF, _INF
        return _INF, -_INF
    t1 = (-half - p) / d
    t2 = (half - p) / d
    if t1 > t2:
        return t2, t1
    return t1, t2


@njit(cache=True, inline="always")
def shape_interval(kind, prm, px, py, pz, dx, dy, dz):
    """Interval (t_in, t_out) of the line p + t d inside a convex shape.

    Returns t_in > t_out when the line misses the shape.
    """
    u, v, w = _to_local(prm, px, py, pz)
    du, dv, dw = _dir_to_local(prm, dx, dy, dz)
    a, b, c = prm[3], prm[4], prm[5]
    if kind == ELLIPSOID:
        return _quadric_interval(u / a, v / b, w / c, du / a, dv / b, dw / c)
    if kind == CYLINDER:
        t1, t2 = _quadric_interval(u / a, v / b, 0.0, du / a, dv / b, 0.0)
        s1, s2 = _slab(w, dw, c)
        return max(t1, s1), min(t2, s2)
    t1, t2 = _slab(u, du, a)
    s1, s2 = _slab(v, dv, b)
    r1, r2 = _slab(w, dw, c)
    return max(t1, max(s1, r1)), min(t2, min(s2, r2))


@njit(cache=True, inline="always")
def path_segments(kinds, params, mus, px, py, pz, dx, dy, dz, t_end, seg_t, seg_mu, t_in, t_out):
    """Cut the segment p + t d, 0 <= t <= t_end, into pieces of constant mu.

    Where shapes overlap, the one listed last wins (replacement). Fills
    ``seg_t`` (piece boundaries) and ``seg_mu`` (mu of each piece, 1/cm) and
    returns the number of pieces. Scratch arrays need 2*len(kinds) + 2 slots.
    """
    n_shapes = kinds.shape[0]
    n_t = 0
    seg_t[n_t] = 0.0
    n_t += 1
    for s in range(n_shapes):
        a, b = shape_interval(kinds[s], params[s], px, py, pz, dx, dy, dz)
        t_in[s] = a
        t_out[s] = b
        if a < b:
            if 0.0 < a < t_end:
                seg_t[n_t] = a
                n_t += 1
            if 0.0 < b < t_end:
                seg_t[n_t] = b
                n_t += 1
    seg_t[n_t] = t_end
    n_t += 1
    # insertion sort: a handful of entries
    for i in range(1, n_t):
        key = seg_t[i]
        j = i - 1
        while j >= 0 and seg_t[j] > key:
            seg_t[j + 1] = seg_t[j]
            j -= 1
        seg_t[j + 1] = key
    for i in range(n_t - 1):
        mid = 0.5 * (seg_t[i] + seg_t[i + 1])
        mu = 0.0
        for s in range(n_shapes - 1, -1, -1):
            if t_in[s] <= mid <= t_out[s]:
                mu = mus[s]
                break
        seg_mu[i] = mu
    return n_t - 1


@njit(cache=True)
def cylinder_exit(px, py, dx, dy, radius):
    """Distance along (dx, dy, dz) from a point inside the ring to the detector cylinder.

    Returns -1 for a photon travelling parallel to the axis.
    """
    a = dx * dx + dy * dy
    if a <= 0.0:
        return -1.0
    b = px * dx + py * dy
    c = px * px + py * py - radius * radius
    disc = b * b - a * c
    if disc < 0.0:
        return -1.0
    return (-b + math.sqrt(disc)) / a


@njit(cache=True)
def _kn_total(k):
    """Klein-Nishina total cross-section over 2 pi r_e^2, at k = E / m_e c^2."""
    l2 = math.log(1.0 + 2.0 * k)
    return ((1.0 + k) / (k * k) * (2.0 * (1.0 + k) / (1.0 + 2.0 * k) - l2 / k)
            + l2 / (2.0 * k) - (1.0 + 3.0 * k) / ((1.0 + 2.0 * k) ** 2))


@njit(cache=True)
def sample_klein_nishina_511(rng):
    """cos(theta) of a Compton scatter of a 511 keV photon (Klein-Nishina, by rejection)."""
    while True:
        cos_t = 2.0 * uniform(rng) - 1.0
        p = 1.0 / (2.0 - cos_t)
        f = p * p * (p + 1.0 / p - (1.0 - cos_t * cos_t))
        if 2.0 * uniform(rng) < f:
            return cos_t


@njit(cache=True)
def _rotate_direction(dx, dy, dz, cos_t, cos_phi, sin_phi):
    """Unit vector at polar angle acos(cos_t) and azimuth phi about (dx, dy, dz)."""
    sin_t = math.sqrt(max(0.0, 1.0 - cos_t * cos_t))
    # an orthonormal pair perpendicular to d
    if abs(dz) < 0.9:
        ex, ey, ez = -dy, dx, 0.0
    else:
        ex, ey, ez = 0.0, -dz, dy
    norm = math.sqrt(ex * ex + ey * ey + ez * ez)
    ex /= norm
    ey /= norm
    ez /= norm
    fx = dy * ez - dz * ey
    fy = dz * ex - dx * ez
    fz = dx * ey - dy * ex
    cp = cos_phi * sin_t
    sp = sin_phi * sin_t
    return (cos_t * dx + cp * ex + sp * fx,
            cos_t * dy + cp * ey + sp * fy,
            cos_t * dz + cp * ez + sp * fz)


# ---------------------------------------------------------------- attenuation

@njit(cache=True, inline="always")
def _optical_depth(mode, kinds, params, mus, grid, origin, voxel, px, py, pz, dx, dy, dz, t_end,
                   seg_t, seg_mu, t_in, t_out):
    """Dimensionless integral of mu (1/cm) along p + t d, 0 <= t <= t_end (mm)."""
    if mode == 1:
        n = path_segments(kinds, params, mus, px, py, pz, dx, dy, dz, t_end, seg_t, seg_mu, t_in, t_out)
        total = 0.0
        for i in range(n):
            total += seg_mu[i] * (seg_t[i + 1] - seg_t[i])
        return 0.1 * total
    if mode == 2:
        return 0.1 * siddon_line_integral(grid, origin, voxel, px, py, pz,
                                          px + t_end * dx, py + t_end * dy, pz + t_end * dz)
    return 0.0


@njit(cache=True)
def _depth_to_distance(n, seg_t, seg_mu, target, t_end):
    """Distance where the optical depth over the first ``n`` pieces reaches ``target``."""
    acc = 0.0
    for i in range(n):
        piece = 0.1 * seg_mu[i] * (seg_t[i + 1] - seg_t[i])
        if acc + piece >= target and seg_mu[i] > 0.0:
            return seg_t[i] + (target - acc) / (0.1 * seg_mu[i])
        acc += piece
    return t_end


@njit(cache=True, inline="always")
def _distance_at_depth(mode, kinds, params, mus, grid, origin, voxel, px, py, pz, dx, dy, dz, t_end,
                       target, seg_t, seg_mu, t_in, t_out):
    """Distance along the path where the optical depth reaches ``target`` (< total)."""
    if mode == 1:
        n = path_segments(kinds, params, mus, px, py, pz, dx, dy, dz, t_end, seg_t, seg_mu, t_in, t_out)
        return _depth_to_distance(n, seg_t, seg_mu, target, t_end)
    # voxel mu-map: bisection on the monotone cumulative depth
    lo = 0.0
    hi = t_end
    for _ in range(24):
        mid = 0.5 * (lo + hi)
        d = 0.1 * siddon_line_integral(grid, origin, voxel, px, py, pz,
                                       px + mid * dx, py + mid * dy, pz + mid * dz)
        if d < target:
            lo = mid
        else:
            hi = mid
    return 0.5 * (lo + hi)


@njit(cache=True)
def depth_bound(b_radius, b_zc, b_half_z, b_mu, px, py, pz, dx, dy, dz, t_end):
    """An upper bound of the optical depth along p + t d, 0 <= t <= t_end (mm).

    ``b_radius, b_zc, b_half_z`` (mm) describe a cylinder about the z axis
    that holds every attenuating shape or voxel, ``b_mu`` (1/cm) is the
    largest mu. The bound is b_mu times the path length inside that
    cylinder: scalars only, no walk through the shapes or the voxels, so a
    photon whose exponential depth exceeds it is known not to interact at a
    small fraction of the cost of the exact integral. Slightly inflated
    against rounding.
    """
    t1, t2 = _quadric_interval(px / b_radius, py / b_radius, 0.0, dx / b_radius, dy / b_radius, 0.0)
    s1, s2 = _slab(pz - b_zc, dz, b_half_z)
    lo = max(0.0, max(t1, s1))
    hi = min(t_end, min(t2, s2))
    if hi <= lo:
        return 0.0
    return 0.1 * b_mu * (hi - lo) * (1.0 + 1e-9) + 1e-12


@njit(cache=True)
def interact_photon(rng, mode, kinds, params, mus, grid, origin, voxel, bound, depth, t_hit,
                    px, py, pz, dx, dy, dz, radius, half_length, scatter, seg_t, seg_mu, t_in, t_out):
    """The rest of :func:`transport_photon` for a photon whose exponential optical depth
    ``depth`` is below the bound of :func:`depth_bound` (``t_hit``: distance to the
    cylinder, mm). Same returns."""
    if mode == 1:
        # the pieces stay in seg_t / seg_mu for the interaction point below
        n_pieces = path_segments(kinds, params, mus, px, py, pz, dx, dy, dz, t_hit, seg_t, seg_mu, t_in, t_out)
        tau = 0.0
        for i in range(n_pieces):
            tau += seg_mu[i] * (seg_t[i + 1] - seg_t[i])
        tau *= 0.1
    else:
        n_pieces = 0
        tau = _optical_depth(mode, kinds, params, mus, grid, origin, voxel, px, py, pz, dx, dy, dz, t_hit,
                             seg_t, seg_mu, t_in, t_out)
    if depth >= tau:
        hz = pz + t_hit * dz
        if abs(hz) >= half_length:
            return -1, 0.0, 0.0, 0.0, 0.0, 0.0
        return 0, px + t_hit * dx, py + t_hit * dy, hz, t_hit, 511.0
    if not scatter:
        return -2, 0.0, 0.0, 0.0, 0.0, 0.0
    # one Compton scatter (all interactions at 511 keV treated as Compton)
    if mode == 1:
        t_s = _depth_to_distance(n_pieces, seg_t, seg_mu, depth, t_hit)
    else:
        t_s = _distance_at_depth(mode, kinds, params, mus, grid, origin, voxel, px, py, pz, dx, dy, dz, t_hit,
                                 depth, seg_t, seg_mu, t_in, t_out)
    sx = px + t_s * dx
    sy = py + t_s * dy
    sz = pz + t_s * dz
    cos_t = sample_klein_nishina_511(rng)
    cos_phi, sin_phi = azimuth(rng)
    ux, uy, uz = _rotate_direction(dx, dy, dz, cos_t, cos_phi, sin_phi)
    energy = 511.0 / (2.0 - cos_t)
    t2 = cylinder_exit(sx, sy, ux, uy, radius)
    if t2 < 0.0:
        return -1, 0.0, 0.0, 0.0, 0.0, 0.0
    hz = sz + t2 * uz
    if abs(hz) >= half_length:
        return -1, 0.0, 0.0, 0.0, 0.0, 0.0
    # survive the second leg at the lower energy: mu scales with the
    # Klein-Nishina total cross-section (Compton-dominated medium)
    k = energy / 511.0
    ratio = _kn_total(k) / _kn_total(1.0)
    depth2 = exponential(rng)
    if depth2 < ratio * depth_bound(bound[0], bound[1], bound[2], bound[3], sx, sy, sz, ux, uy, uz, t2):
        tau2 = ratio * _optical_depth(mode, kinds, params, mus, grid, origin, voxel, sx, sy, sz, ux, uy, uz, t2,
                                      seg_t, seg_mu, t_in, t_out)
        if depth2 < tau2:
            return -2, 0.0, 0.0, 0.0, 0.0, 0.0
    return 1, sx + t2 * ux, sy + t2 * uy, hz, t_s + t2, energy


@njit(cache=True)
def transport_photon(rng, mode, kinds, params, mus, grid, origin, voxel, bound, px, py, pz, dx, dy, dz,
                     radius, half_length, attenuate, scatter, seg_t, seg_mu, t_in, t_out):
    """Follow one 511 keV photon from its origin to the detector cylinder.

    Returns ``(status, hx, hy, hz, path_mm, energy_kev)`` with status 0 =
    unscattered hit, 1 = hit after one Compton scatter, -1 = left the axial
    extent (unscattered or after its scatter) or travels along the axis,
    -2 = interacted and was removed (no scatter simulated, or absorbed or
    scattered again on the way out).

    The exponential optical depth to the first interaction is compared with
    :func:`depth_bound` first; the exact integral (shape chords or Siddon)
    is computed only when the depth is below the bound, which leaves every
    outcome's probability unchanged. :func:`detect_pairs` does the same
    steps inline (numba passes array arguments with reference counting, a
    cost it pays here per call).
    """
    t_hit = cylinder_exit(px, py, dx, dy, radius)
    if t_hit < 0.0:
        return -1, 0.0, 0.0, 0.0, 0.0, 0.0
    hz = pz + t_hit * dz
    if attenuate and mode != 0:
        depth = exponential(rng)   # exponential(1) optical depth to the next interaction
        if depth < depth_bound(bound[0], bound[1], bound[2], bound[3], px, py, pz, dx, dy, dz, t_hit):
            return interact_photon(rng, mode, kinds, params, mus, grid, origin, voxel, bound, depth, t_hit,
                                   px, py, pz, dx, dy, dz, radius, half_length, scatter, seg_t, seg_mu, t_in, t_out)
    if abs(hz) >= half_length:
        return -1, 0.0, 0.0, 0.0, 0.0, 0.0
    return 0, px + t_hit * dx, py + t_hit * dy, hz, t_hit, 511.0


@njit(cache=True)
def crystal_at(hx, hy, hz, crystals_per_ring, rings, pitch, half_length, angle_offset):
    """Global id of the crystal nearest in angle and ring to a point on the cylinder."""
    angle = math.atan2(hy, hx) - angle_offset
    j = int(math.floor(angle * crystals_per_ring / (2.0 * math.pi) + 0.5)) % crystals_per_ring
    ring = int(math.floor((hz + half_length) / pitch))
    if ring < 0:
        ring = 0
    if ring > rings - 1:
        ring = rings - 1
    return ring * crystals_per_ring + j


# ---------------------------------------------------------------- emission

@njit(cache=True)
def _tac_value(times, values, n, t):
    if n == 0:
        return 1.0
    if t <= times[0]:
        return values[0]
    if t >= times[n - 1]:
        return values[n - 1]
    lo = 0
    hi = n - 1
    while hi - lo > 1:
        mid = (lo + hi) // 2
        if times[mid] <= t:
            lo = mid
        else:
            hi = mid
    w = (t - times[lo]) / (times[hi] - times[lo])
    return values[lo] + w * (values[hi] - values[lo])


@njit(cache=True, inline="always")
def _decay_time(rng, t0_s, dt_s, decay_constant, em1):
    """A time in [t0, t0 + dt) drawn with density proportional to exp(-lambda t) (inverse CDF);
    ``em1`` is expm1(-lambda dt), computed once per step."""
    u = uniform(rng)
    if decay_constant * dt_s < 1e-12:
        return t0_s + dt_s * u
    return t0_s - math.log1p(u * em1) / decay_constant


@njit(cache=True)
def emit_from_shapes(rng, kinds, params, counts, envelope, tac_times, tac_values, tac_len,
                     decay_constant, t0_s, dt_s, range_mean_mm, range_min_mm):
    """Annihilation points of one time step for an analytic phantom.

    For each shape, ``counts[s]`` candidates (a Poisson number drawn by the
    caller, mean ``C V f integral(exp(-lambda t) dt)`` or, with a curve,
    ``C V f envelope[s] dt``) are drawn uniformly inside the whole shape; a
    candidate is kept only where no later shape covers it (replacement).
    Without a time-activity curve the time follows exp(-lambda t) within the
    step exactly (inverse CDF); with a curve the time is uniform and the
    candidate is kept with probability ``tac(t) exp(-lambda t) / envelope[s]``
    (thinning of an inhomogeneous Poisson process, Lewis & Shedler 1979).
    Positron ranges are ``range_min_mm`` plus an exponential of mean
    ``range_mean_mm`` (the caller's split of the exponential at a threshold).

    Returns x, y, z (mm), t (s), shape index.
    """
    n_shapes = kinds.shape[0]
    em1 = math.expm1(-decay_constant * dt_s)
    total = 0
    for s in range(n_shapes):
        total += counts[s]
    xs = np.empty(total)
    ys = np.empty(total)
    zs = np.empty(total)
    ts = np.empty(total)
    which = np.empty(total, dtype=np.int32)
    k = 0
    for s in range(n_shapes):
        prm = params[s]
        kind = kinds[s]
        has_tac = tac_len[s] > 0
        for _ in range(counts[s]):
            if has_tac:
                t = t0_s + dt_s * uniform(rng)
                keep_p = _tac_value(tac_times[s], tac_values[s], tac_len[s], t) * math.exp(-decay_constant * t)
                if uniform(rng) * envelope[s] >= keep_p:
                    continue
            else:
                t = _decay_time(rng, t0_s, dt_s, decay_constant, em1)
            # a uniform point inside the shape, in its own frame
            if kind == BOX:
                u = (2.0 * uniform(rng) - 1.0) * prm[3]
                v = (2.0 * uniform(rng) - 1.0) * prm[4]
                w = (2.0 * uniform(rng) - 1.0) * prm[5]
            elif kind == CYLINDER:
                u, v, _ = unit_disk(rng)
                u *= prm[3]
                v *= prm[4]
                w = (2.0 * uniform(rng) - 1.0) * prm[5]
            else:
                u, v, w = in_ball(rng)
                u *= prm[3]
                v *= prm[4]
                w *= prm[5]
            x = prm[0] + u * prm[6] - v * prm[7]
            y = prm[1] + u * prm[7] + v * prm[6]
            z = prm[2] + w
            covered = False
            for later in range(s + 1, n_shapes):
                if inside_shape(kinds[later], params[later], x, y, z):
                    covered = True
                    break
            if covered:
                continue
            xs[k] = x
            ys[k] = y
            zs[k] = z
            ts[k] = t
            which[k] = s
            k += 1
    _positron_range(rng, xs, ys, zs, k, range_mean_mm, range_min_mm)
    return xs[:k], ys[:k], zs[:k], ts[:k], which[:k]


@njit(cache=True)
def emit_from_voxels(rng, cdf, shape, origin, voxel, count, decay_constant, t0_s, dt_s, range_mean_mm):
    """Annihilation points of one time step for a voxel phantom.

    ``count`` annihilations (a Poisson number drawn by the caller, mean
    ``A f integral(exp(-lambda t) dt)``); each picks a voxel with
    probability proportional to its activity (inverse CDF), a uniform point
    inside it, and a time following exp(-lambda t) within the step.
    """
    n = count
    xs = np.empty(n)
    ys = np.empty(n)
    zs = np.empty(n)
    ts = np.empty(n)
    ny = shape[1]
    nz = shape[2]
    em1 = math.expm1(-decay_constant * dt_s)
    for k in range(n):
        ts[k] = _decay_time(rng, t0_s, dt_s, decay_constant, em1)
        flat = np.searchsorted(cdf, uniform(rng) * cdf[-1], side="right")
        if flat >= cdf.shape[0]:
            flat = cdf.shape[0] - 1
        ix = flat // (ny * nz)
        iy = (flat // nz) % ny
        iz = flat % nz
        xs[k] = origin[0] + (ix + uniform(rng) - 0.5) * voxel[0]
        ys[k] = origin[1] + (iy + uniform(rng) - 0.5) * voxel[1]
        zs[k] = origin[2] + (iz + uniform(rng) - 0.5) * voxel[2]
    _positron_range(rng, xs, ys, zs, n, range_mean_mm, 0.0)
    return xs, ys, zs, ts, np.zeros(n, dtype=np.int32)


@njit(cache=True)
def _positron_range(rng, xs, ys, zs, n, mean_mm, min_mm):
    """Displace annihilation points isotropically by ``min_mm`` plus an exponential distance of
    mean ``mean_mm`` (min_mm = 0: the plain model; > 0: the tail beyond min_mm, memoryless)."""
    if mean_mm <= 0.0:
        return
    for i in range(n):
        r = min_mm + mean_mm * exponential(rng)
        ux, uy, uz = isotropic(rng)
        xs[i] += r * ux
        ys[i] += r * uy
        zs[i] += r * uz


# ---------------------------------------------------------------- detection

@njit(cache=True, inline="always")
def _cos_small(x):
    """cos(x); below 0.05 rad by its Taylor series to x^8 (remainder < 3e-20), faster than libm."""
    if abs(x) >= 0.05:
        return math.cos(x)
    x2 = x * x
    return 1.0 - x2 / 2.0 * (1.0 - x2 / 12.0 * (1.0 - x2 / 30.0 * (1.0 - x2 / 56.0)))


@njit(cache=True)
def detect_pairs(rng, xs, ys, zs, ts, mode, kinds, params, mus, grid, origin, voxel, bound,
                 radius, half_length, pitch, rings, crystals_per_ring, angle_offset,
                 attenuate, scatter, noncollinearity_sigma_rad, detection_probability,
                 energy_sigma_511_kev, lld_kev, uld_kev, tof_sigma_ps, cos_lo, cos_hi):
    """Send a back-to-back photon pair from every annihilation point.

    ``bound`` is the attenuation bound of :func:`depth_bound`. The first
    photon's |cos| of polar angle is uniform on [cos_lo, cos_hi] with a
    random sign: isotropic for (0, 1), isotropic restricted to a cone or to
    its outside for the caller's Poisson split. Returns the
    coincidences (time_ns, crystal_a, crystal_b, tof_ps, energy_a_kev,
    energy_b_kev, kind), the singles (crystal, energy_kev) of every photon
    detected, and the counters.
    """
    n = xs.shape[0]
    out_time = np.empty(n, dtype=np.int64)
    out_a = np.empty(n, dtype=np.int32)
    out_b = np.empty(n, dtype=np.int32)
    out_tof = np.empty(n, dtype=np.float32)
    out_ea = np.empty(n, dtype=np.float32)
    out_eb = np.empty(n, dtype=np.float32)
    out_kind = np.empty(n, dtype=np.int8)
    single_crystal = np.empty(2 * n, dtype=np.int32)
    single_energy = np.empty(2 * n, dtype=np.float32)
    counters = np.zeros(N_COUNTERS, dtype=np.int64)
    n_scratch = 2 * kinds.shape[0] + 2
    seg_t = np.empty(n_scratch)
    seg_mu = np.empty(n_scratch)
    t_in = np.empty(max(1, kinds.shape[0]))
    t_out = np.empty(max(1, kinds.shape[0]))
    n_coinc = 0
    n_single = 0
    counters[N_ANNIHILATIONS] = n
    use_depth = attenuate and mode != 0
    status = np.empty(2, dtype=np.int64)
    hit = np.empty((2, 5))
    b_r = bound[0]
    b_zc = bound[1]
    b_hz = bound[2]
    b_mu = bound[3]
    # the polar method gives normal deviates in pairs: the second is kept for the next use
    spare = 0.0
    have_spare = False
    for i in range(n):
        px = xs[i]
        py = ys[i]
        pz = zs[i]
        if cos_lo > 0.0 or cos_hi < 1.0:
            w = 2.0 * uniform(rng) - 1.0
            dz = cos_lo + (cos_hi - cos_lo) * abs(w)
            if w < 0.0:
                dz = -dz
            cos_phi, sin_phi = azimuth(rng)
            sz = math.sqrt(1.0 - dz * dz)
            dx = sz * cos_phi
            dy = sz * sin_phi
        else:
            dx, dy, dz = isotropic(rng)
        ex, ey, ez = -dx, -dy, -dz
        if noncollinearity_sigma_rad > 0.0:
            # small Gaussian tilt of the second photon in two perpendicular directions
            d1, d2 = normal_pair(rng)
            d1 *= noncollinearity_sigma_rad
            d2 *= noncollinearity_sigma_rad
            tilt = math.sqrt(d1 * d1 + d2 * d2)
            if tilt > 0.0:
                ex, ey, ez = _rotate_direction(ex, ey, ez, _cos_small(tilt), d1 / tilt, d2 / tilt)
        # transport_photon inline, once for both photons (one copy of the inlined walk): geometry
        # and the attenuation bound take scalars only; the exact walk runs only for a photon
        # whose depth is below the bound
        for ph in range(2):
            if ph == 0:
                ux, uy, uz = dx, dy, dz
            else:
                ux, uy, uz = ex, ey, ez
            st = -1
            hx = hy = hz = path = en = 0.0
            t_c = cylinder_exit(px, py, ux, uy, radius)
            if t_c >= 0.0:
                depth = 0.0
                interacts = False
                if use_depth:
                    depth = exponential(rng)
                    interacts = depth < depth_bound(b_r, b_zc, b_hz, b_mu, px, py, pz, ux, uy, uz, t_c)
                if interacts:
                    st, hx, hy, hz, path, en = interact_photon(
                        rng, mode, kinds, params, mus, grid, origin, voxel, bound, depth, t_c, px, py, pz,
                        ux, uy, uz, radius, half_length, scatter, seg_t, seg_mu, t_in, t_out)
                elif abs(pz + t_c * uz) < half_length:
                    st = 0
                    hx = px + t_c * ux
                    hy = py + t_c * uy
                    hz = pz + t_c * uz
                    path = t_c
                    en = 511.0
            status[ph] = st
            hit[ph, 0] = hx
            hit[ph, 1] = hy
            hit[ph, 2] = hz
            hit[ph, 3] = path
            hit[ph, 4] = en
        st_a = status[0]
        st_b = status[1]
        ax, ay, az, path_a, en_a = hit[0, 0], hit[0, 1], hit[0, 2], hit[0, 3], hit[0, 4]
        bx, by, bz, path_b, en_b = hit[1, 0], hit[1, 1], hit[1, 2], hit[1, 3], hit[1, 4]
        if st_a < 0 and st_b < 0:
            if st_a == -2:
                counters[N_PHOTONS_ABSORBED] += 1
            if st_b == -2:
                counters[N_PHOTONS_ABSORBED] += 1
            continue
        if st_a == 1:
            counters[N_PHOTONS_SCATTERED] += 1
        if st_b == 1:
            counters[N_PHOTONS_SCATTERED] += 1
        if st_a == -2:
            counters[N_PHOTONS_ABSORBED] += 1
        if st_b == -2:
            counters[N_PHOTONS_ABSORBED] += 1
        got_a = False
        got_b = False
        crystal_a = 0
        crystal_b = 0
        meas_a = 0.0
        meas_b = 0.0
        if st_a >= 0:
            crystal_a = crystal_at(ax, ay, az, crystals_per_ring, rings, pitch, half_length, angle_offset)
            if uniform(rng) < detection_probability[crystal_a]:
                if have_spare:
                    g = spare
                    have_spare = False
                else:
                    g, spare = normal_pair(rng)
                    have_spare = True
                meas_a = en_a + energy_sigma_511_kev * math.sqrt(en_a / 511.0) * g
                if lld_kev <= meas_a <= uld_kev:
                    got_a = True
                    single_crystal[n_single] = crystal_a
                    single_energy[n_single] = meas_a
                    n_single += 1
        if st_b >= 0:
            crystal_b = crystal_at(bx, by, bz, crystals_per_ring, rings, pitch, half_length, angle_offset)
            if uniform(rng) < detection_probability[crystal_b]:
                if have_spare:
                    g = spare
                    have_spare = False
                else:
                    g, spare = normal_pair(rng)
                    have_spare = True
                meas_b = en_b + energy_sigma_511_kev * math.sqrt(en_b / 511.0) * g
                if lld_kev <= meas_b <= uld_kev:
                    got_b = True
                    single_crystal[n_single] = crystal_b
                    single_energy[n_single] = meas_b
                    n_single += 1
        if got_a and got_b:
            t_a_ns = ts[i] * 1e9 + path_a / C_MM_PER_NS
            t_b_ns = ts[i] * 1e9 + path_b / C_MM_PER_NS
            out_time[n_coinc] = np.int64(math.floor(min(t_a_ns, t_b_ns)))
            out_a[n_coinc] = crystal_a
            out_b[n_coinc] = crystal_b
            tof = (t_b_ns - t_a_ns) * 1000.0
            if tof_sigma_ps > 0.0:
                if have_spare:
                    g = spare
                    have_spare = False
                else:
                    g, spare = normal_pair(rng)
                    have_spare = True
                tof += tof_sigma_ps * g
            out_tof[n_coinc] = tof
            out_ea[n_coinc] = meas_a
            out_eb[n_coinc] = meas_b
            out_kind[n_coinc] = SCATTER if (st_a == 1 or st_b == 1) else TRUE
            n_coinc += 1
    return (out_time[:n_coinc], out_a[:n_coinc], out_b[:n_coinc], out_tof[:n_coinc],
            out_ea[:n_coinc], out_eb[:n_coinc], out_kind[:n_coinc],
            single_crystal[:n_single], single_energy[:n_single], counters)


@njit(cache=True)
def expected_randoms(single_crystal, n_crystals, tau_s, dt_s):
    """Expected accidental coincidences of one step from its singles list.

    With S_c the singles rate of crystal c (counts / dt), accidental pairs
    (a, b), a != b, occur at rate 2 tau S_a S_b (Cherry, Sorenson & Phelps),
    so the step expects ``tau/dt * ((sum n)^2 - sum n^2)``.
    """
    if dt_s <= 0.0:
        return 0.0
    per_crystal = np.zeros(n_crystals, dtype=np.float64)
    for i in range(single_crystal.shape[0]):
        per_crystal[single_crystal[i]] += 1.0
    total = float(single_crystal.shape[0])
    sum_sq = 0.0
    for c in range(n_crystals):
        sum_sq += per_crystal[c] * per_crystal[c]
    return tau_s / dt_s * (total * total - sum_sq)


@njit(cache=True)
def draw_randoms(rng, n, single_crystal, single_energy, t0_s, dt_s, window_ns):
    """``n`` accidental coincidences of one step from its singles.

    ``n`` is a Poisson number of mean :func:`expected_randoms`, drawn by the
    caller. Each accidental pair takes two distinct-crystal singles drawn at
    random from the step's singles list (crystal probability proportional to
    its singles count), with their energies; its time is uniform in the step
    and its arrival-time difference uniform within the window.

    Returns time_ns, crystal_a, crystal_b, tof_ps, energy_a_kev, energy_b_kev.
    """
    n_single = single_crystal.shape[0]
    times = np.empty(n, dtype=np.int64)
    ca = np.empty(n, dtype=np.int32)
    cb = np.empty(n, dtype=np.int32)
    tof = np.empty(n, dtype=np.float32)
    ea = np.empty(n, dtype=np.float32)
    eb = np.empty(n, dtype=np.float32)
    for k in range(n):
        # redraw both until the crystals differ, so P(a, b) ~ n_a * n_b for a != b
        while True:
            i = below(rng, n_single)
            j = below(rng, n_single)
            if single_crystal[j] != single_crystal[i]:
                break
        times[k] = np.int64(math.floor((t0_s + dt_s * uniform(rng)) * 1e9))
        ca[k] = single_crystal[i]
        cb[k] = single_crystal[j]
        tof[k] = (uniform(rng) - 0.5) * window_ns * 1000.0
        ea[k] = single_energy[i]
        eb[k] = single_energy[j]
    return times, ca, cb, tof, ea, eb
