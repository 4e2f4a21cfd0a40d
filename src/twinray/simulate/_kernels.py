"""Numba kernels of the simulator: emission, photon transport, randoms.

Only arithmetic lives here; :mod:`twinray.simulate.simulator` validates the
inputs and documents the physics. Every kernel draws from numba's own
Mersenne-Twister state, which :func:`seed_rng` sets once per chunk, so the
output of a chunk depends only on its seed and its inputs.

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


@njit(cache=True)
def seed_rng(seed):
    """Seed numba's random state (one call per chunk)."""
    np.random.seed(seed)


# ---------------------------------------------------------------- geometry

@njit(cache=True, inline="always")
def _to_local(prm, x, y, z):
    dx = x - prm[0]
    dy = y - prm[1]
    return dx * prm[6] + dy * prm[7], -dx * prm[7] + dy * prm[6], z - prm[2]


@njit(cache=True, inline="always")
def _dir_to_local(prm, dx, dy, dz):
    return dx * prm[6] + dy * prm[7], -dx * prm[7] + dy * prm[6], dz


@njit(cache=True)
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


@njit(cache=True)
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


@njit(cache=True)
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
def sample_klein_nishina_511():
    """cos(theta) of a Compton scatter of a 511 keV photon (Klein-Nishina, by rejection)."""
    while True:
        cos_t = 2.0 * np.random.random() - 1.0
        p = 1.0 / (2.0 - cos_t)
        f = p * p * (p + 1.0 / p - (1.0 - cos_t * cos_t))
        if 2.0 * np.random.random() < f:
            return cos_t


@njit(cache=True)
def _rotate_direction(dx, dy, dz, cos_t, phi):
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
    cp = math.cos(phi) * sin_t
    sp = math.sin(phi) * sin_t
    return (cos_t * dx + cp * ex + sp * fx,
            cos_t * dy + cp * ey + sp * fy,
            cos_t * dz + cp * ez + sp * fz)


# ---------------------------------------------------------------- attenuation

@njit(cache=True)
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
def _distance_at_depth(mode, kinds, params, mus, grid, origin, voxel, px, py, pz, dx, dy, dz, t_end,
                       target, seg_t, seg_mu, t_in, t_out):
    """Distance along the path where the optical depth reaches ``target`` (< total)."""
    if mode == 1:
        n = path_segments(kinds, params, mus, px, py, pz, dx, dy, dz, t_end, seg_t, seg_mu, t_in, t_out)
        acc = 0.0
        for i in range(n):
            piece = 0.1 * seg_mu[i] * (seg_t[i + 1] - seg_t[i])
            if acc + piece >= target and seg_mu[i] > 0.0:
                return seg_t[i] + (target - acc) / (0.1 * seg_mu[i])
            acc += piece
        return t_end
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
def transport_photon(mode, kinds, params, mus, grid, origin, voxel, px, py, pz, dx, dy, dz,
                     radius, half_length, attenuate, scatter, seg_t, seg_mu, t_in, t_out):
    """Follow one 511 keV photon from its origin to the detector cylinder.

    Returns ``(status, hx, hy, hz, path_mm, energy_kev)`` with status 0 =
    unscattered hit, 1 = hit after one Compton scatter, -1 = left the axial
    extent or travels along the axis, -2 = absorbed or scattered more than once.
    """
    t_hit = cylinder_exit(px, py, dx, dy, radius)
    if t_hit < 0.0:
        return -1, 0.0, 0.0, 0.0, 0.0, 0.0
    hz = pz + t_hit * dz
    if not attenuate or mode == 0:
        if abs(hz) >= half_length:
            return -1, 0.0, 0.0, 0.0, 0.0, 0.0
        return 0, px + t_hit * dx, py + t_hit * dy, hz, t_hit, 511.0
    tau = _optical_depth(mode, kinds, params, mus, grid, origin, voxel, px, py, pz, dx, dy, dz, t_hit,
                         seg_t, seg_mu, t_in, t_out)
    depth = -math.log(1.0 - np.random.random())   # exponential(1) optical depth to the next interaction
    if depth >= tau:
        if abs(hz) >= half_length:
            return -1, 0.0, 0.0, 0.0, 0.0, 0.0
        return 0, px + t_hit * dx, py + t_hit * dy, hz, t_hit, 511.0
    if not scatter:
        return -2, 0.0, 0.0, 0.0, 0.0, 0.0
    # one Compton scatter (all interactions at 511 keV treated as Compton)
    t_s = _distance_at_depth(mode, kinds, params, mus, grid, origin, voxel, px, py, pz, dx, dy, dz, t_hit,
                             depth, seg_t, seg_mu, t_in, t_out)
    sx = px + t_s * dx
    sy = py + t_s * dy
    sz = pz + t_s * dz
    cos_t = sample_klein_nishina_511()
    phi = 2.0 * math.pi * np.random.random()
    ux, uy, uz = _rotate_direction(dx, dy, dz, cos_t, phi)
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
    tau2 = ratio * _optical_depth(mode, kinds, params, mus, grid, origin, voxel, sx, sy, sz, ux, uy, uz, t2,
                                  seg_t, seg_mu, t_in, t_out)
    if -math.log(1.0 - np.random.random()) < tau2:
        return -2, 0.0, 0.0, 0.0, 0.0, 0.0
    return 1, sx + t2 * ux, sy + t2 * uy, hz, t_s + t2, energy


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
def _decay_time(t0_s, dt_s, decay_constant):
    """A time in [t0, t0 + dt) drawn with density proportional to exp(-lambda t) (inverse CDF)."""
    u = np.random.random()
    x = decay_constant * dt_s
    if x < 1e-12:
        return t0_s + dt_s * u
    return t0_s - math.log1p(u * math.expm1(-x)) / decay_constant


@njit(cache=True)
def emit_from_shapes(kinds, params, means, envelope, tac_times, tac_values, tac_len,
                     decay_constant, t0_s, dt_s, range_mean_mm):
    """Annihilation points of one time step for an analytic phantom.

    For each shape, a Poisson number of candidates with mean ``means[s]`` is
    drawn uniformly inside the whole shape; a candidate is kept only where
    no later shape covers it (replacement). Without a time-activity curve the
    time follows exp(-lambda t) within the step exactly (inverse CDF) and
    ``means[s]`` is ``C V f integral(exp(-lambda t) dt)``; with a curve the
    time is uniform and the candidate is kept with probability
    ``tac(t) exp(-lambda t) / envelope[s]`` (thinning of an inhomogeneous
    Poisson process, Lewis & Shedler 1979), ``means[s]`` being
    ``C V f envelope[s] dt``.

    Returns x, y, z (mm), t (s), shape index.
    """
    n_shapes = kinds.shape[0]
    counts = np.empty(n_shapes, dtype=np.int64)
    total = 0
    for s in range(n_shapes):
        counts[s] = np.random.poisson(means[s]) if means[s] > 0.0 else 0
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
                t = t0_s + dt_s * np.random.random()
                keep_p = _tac_value(tac_times[s], tac_values[s], tac_len[s], t) * math.exp(-decay_constant * t)
                if np.random.random() * envelope[s] >= keep_p:
                    continue
            else:
                t = _decay_time(t0_s, dt_s, decay_constant)
            # a uniform point inside the shape, in its own frame
            if kind == BOX:
                u = (2.0 * np.random.random() - 1.0) * prm[3]
                v = (2.0 * np.random.random() - 1.0) * prm[4]
                w = (2.0 * np.random.random() - 1.0) * prm[5]
            elif kind == CYLINDER:
                rho = math.sqrt(np.random.random())
                phi = 2.0 * math.pi * np.random.random()
                u = prm[3] * rho * math.cos(phi)
                v = prm[4] * rho * math.sin(phi)
                w = (2.0 * np.random.random() - 1.0) * prm[5]
            else:
                rho = np.random.random() ** (1.0 / 3.0)
                cz = 2.0 * np.random.random() - 1.0
                phi = 2.0 * math.pi * np.random.random()
                sz = math.sqrt(1.0 - cz * cz)
                u = prm[3] * rho * sz * math.cos(phi)
                v = prm[4] * rho * sz * math.sin(phi)
                w = prm[5] * rho * cz
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
    _positron_range(xs, ys, zs, k, range_mean_mm)
    return xs[:k], ys[:k], zs[:k], ts[:k], which[:k]


@njit(cache=True)
def emit_from_voxels(cdf, shape, origin, voxel, mean_count, decay_constant, t0_s, dt_s, range_mean_mm):
    """Annihilation points of one time step for a voxel phantom.

    A Poisson number of annihilations with mean ``mean_count``
    (``A f integral(exp(-lambda t) dt)``); each picks a voxel with
    probability proportional to its activity (inverse CDF), a uniform point
    inside it, and a time following exp(-lambda t) within the step.
    """
    n = np.random.poisson(mean_count) if mean_count > 0.0 else 0
    xs = np.empty(n)
    ys = np.empty(n)
    zs = np.empty(n)
    ts = np.empty(n)
    ny = shape[1]
    nz = shape[2]
    for k in range(n):
        ts[k] = _decay_time(t0_s, dt_s, decay_constant)
        flat = np.searchsorted(cdf, np.random.random() * cdf[-1], side="right")
        if flat >= cdf.shape[0]:
            flat = cdf.shape[0] - 1
        ix = flat // (ny * nz)
        iy = (flat // nz) % ny
        iz = flat % nz
        xs[k] = origin[0] + (ix + np.random.random() - 0.5) * voxel[0]
        ys[k] = origin[1] + (iy + np.random.random() - 0.5) * voxel[1]
        zs[k] = origin[2] + (iz + np.random.random() - 0.5) * voxel[2]
    _positron_range(xs, ys, zs, n, range_mean_mm)
    return xs, ys, zs, ts, np.zeros(n, dtype=np.int32)


@njit(cache=True)
def _positron_range(xs, ys, zs, n, mean_mm):
    """Displace annihilation points isotropically by an exponential distance of mean ``mean_mm``."""
    if mean_mm <= 0.0:
        return
    for i in range(n):
        r = -mean_mm * math.log(1.0 - np.random.random())
        cz = 2.0 * np.random.random() - 1.0
        phi = 2.0 * math.pi * np.random.random()
        sz = math.sqrt(1.0 - cz * cz)
        xs[i] += r * sz * math.cos(phi)
        ys[i] += r * sz * math.sin(phi)
        zs[i] += r * cz


# ---------------------------------------------------------------- detection

@njit(cache=True)
def detect_pairs(xs, ys, zs, ts, mode, kinds, params, mus, grid, origin, voxel,
                 radius, half_length, pitch, rings, crystals_per_ring, angle_offset,
                 attenuate, scatter, noncollinearity_sigma_rad, detection_probability,
                 energy_sigma_511_kev, lld_kev, uld_kev, tof_sigma_ps):
    """Send a back-to-back photon pair from every annihilation point.

    Returns the coincidences (time_ns, crystal_a, crystal_b, tof_ps,
    energy_a_kev, energy_b_kev, kind), the singles (crystal, energy_kev) of
    every photon detected, and the counters.
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
    for i in range(n):
        px = xs[i]
        py = ys[i]
        pz = zs[i]
        # isotropic direction in 3-D
        cz = 2.0 * np.random.random() - 1.0
        phi = 2.0 * math.pi * np.random.random()
        sz = math.sqrt(1.0 - cz * cz)
        dx = sz * math.cos(phi)
        dy = sz * math.sin(phi)
        dz = cz
        ex, ey, ez = -dx, -dy, -dz
        if noncollinearity_sigma_rad > 0.0:
            # small Gaussian tilt of the second photon in two perpendicular directions
            d1 = noncollinearity_sigma_rad * np.random.standard_normal()
            d2 = noncollinearity_sigma_rad * np.random.standard_normal()
            tilt = math.sqrt(d1 * d1 + d2 * d2)
            if tilt > 0.0:
                ex, ey, ez = _rotate_direction(ex, ey, ez, math.cos(tilt), math.atan2(d2, d1))
        st_a, ax, ay, az, path_a, en_a = transport_photon(
            mode, kinds, params, mus, grid, origin, voxel, px, py, pz, dx, dy, dz,
            radius, half_length, attenuate, scatter, seg_t, seg_mu, t_in, t_out)
        st_b, bx, by, bz, path_b, en_b = transport_photon(
            mode, kinds, params, mus, grid, origin, voxel, px, py, pz, ex, ey, ez,
            radius, half_length, attenuate, scatter, seg_t, seg_mu, t_in, t_out)
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
            if np.random.random() < detection_probability[crystal_a]:
                meas_a = en_a + energy_sigma_511_kev * math.sqrt(en_a / 511.0) * np.random.standard_normal()
                if lld_kev <= meas_a <= uld_kev:
                    got_a = True
                    single_crystal[n_single] = crystal_a
                    single_energy[n_single] = meas_a
                    n_single += 1
        if st_b >= 0:
            crystal_b = crystal_at(bx, by, bz, crystals_per_ring, rings, pitch, half_length, angle_offset)
            if np.random.random() < detection_probability[crystal_b]:
                meas_b = en_b + energy_sigma_511_kev * math.sqrt(en_b / 511.0) * np.random.standard_normal()
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
                tof += tof_sigma_ps * np.random.standard_normal()
            out_tof[n_coinc] = tof
            out_ea[n_coinc] = meas_a
            out_eb[n_coinc] = meas_b
            out_kind[n_coinc] = SCATTER if (st_a == 1 or st_b == 1) else TRUE
            n_coinc += 1
    return (out_time[:n_coinc], out_a[:n_coinc], out_b[:n_coinc], out_tof[:n_coinc],
            out_ea[:n_coinc], out_eb[:n_coinc], out_kind[:n_coinc],
            single_crystal[:n_single], single_energy[:n_single], counters)


@njit(cache=True)
def draw_randoms(single_crystal, single_energy, n_crystals, tau_s, t0_s, dt_s, window_ns):
    """Accidental coincidences of one time step from its singles.

    With S_c the singles rate of crystal c (counts / dt), the rate of
    accidental pairs (a, b), a != b, is 2 tau S_a S_b (Cherry, Sorenson &
    Phelps), so the expected number in the step is
    ``tau/dt * ((sum n)^2 - sum n^2)``. Each accidental pair takes two
    distinct-crystal singles drawn at random from the step's singles list
    (crystal probability proportional to its singles count), with their
    energies; its time is uniform in the step and its arrival-time
    difference uniform within the window.

    Returns time_ns, crystal_a, crystal_b, tof_ps, energy_a_kev,
    energy_b_kev and the expected count.
    """
    n_single = single_crystal.shape[0]
    per_crystal = np.zeros(n_crystals, dtype=np.float64)
    for i in range(n_single):
        per_crystal[single_crystal[i]] += 1.0
    total = float(n_single)
    sum_sq = 0.0
    for c in range(n_crystals):
        sum_sq += per_crystal[c] * per_crystal[c]
    expected = tau_s / dt_s * (total * total - sum_sq) if dt_s > 0.0 else 0.0
    n = np.random.poisson(expected) if expected > 0.0 else 0
    times = np.empty(n, dtype=np.int64)
    ca = np.empty(n, dtype=np.int32)
    cb = np.empty(n, dtype=np.int32)
    tof = np.empty(n, dtype=np.float32)
    ea = np.empty(n, dtype=np.float32)
    eb = np.empty(n, dtype=np.float32)
    for k in range(n):
        # redraw both until the crystals differ, so P(a, b) ~ n_a * n_b for a != b
        while True:
            i = np.random.randint(0, n_single)
            j = np.random.randint(0, n_single)
            if single_crystal[j] != single_crystal[i]:
                break
        times[k] = np.int64(math.floor((t0_s + dt_s * np.random.random()) * 1e9))
        ca[k] = single_crystal[i]
        cb[k] = single_crystal[j]
        tof[k] = (np.random.random() - 0.5) * window_ns * 1000.0
        ea[k] = single_energy[i]
        eb[k] = single_energy[j]
    return times, ca, cb, tof, ea, eb, expected
