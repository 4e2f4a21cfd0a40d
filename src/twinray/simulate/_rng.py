"""The simulator's random numbers: xoshiro256** inlined in the numba kernels.

numba's ``np.random`` functions reach a thread-local Mersenne-Twister state
through a call that cannot be inlined (about 19 ns per uniform on the
development machine, most of a photon pair's cost). xoshiro256** keeps its
256-bit state in a small ``uint64`` array passed to every kernel; a draw is
a few shifts, xors and two multiplications (1-2 ns). The state of a step is
filled from numpy's ``SeedSequence``, so steps are independent and the same
seed gives the same stream.

References
----------
D. Blackman and S. Vigna, "Scrambled linear pseudorandom number
generators", ACM Transactions on Mathematical Software 47(4):36, 2021.
G. Marsaglia and T. A. Bray, "A convenient method for generating normal
variables", SIAM Review 6(3):260-264, 1964 (polar method).
G. Marsaglia, "Choosing a point from the surface of a sphere", Annals of
Mathematical Statistics 43(2):645-646, 1972.
J. von Neumann, "Various techniques used in connection with random digits",
NBS Applied Mathematics Series 12:36-38, 1951 (random angle without
trigonometry).

The samplers below avoid sin, cos, atan2 and pow, which cost 15-25 ns each
with the system libm here (several times a draw): a point in the unit disk
by rejection from the square (acceptance pi/4) replaces an angle.
"""

from __future__ import annotations

import math

import numpy as np
from numba import njit

_INV_2_53 = 1.0 / 9007199254740992.0   # 2**-53


def state_from_seed(seed) -> np.ndarray:
    """A xoshiro256** state (4 x uint64) from an int or a ``numpy.random.SeedSequence``."""
    ss = seed if isinstance(seed, np.random.SeedSequence) else np.random.SeedSequence(int(seed))
    state = ss.generate_state(4, np.uint64)
    if not state.any():   # the one forbidden state (probability 2**-256)
        state[0] = np.uint64(1)
    return state


@njit(cache=True, inline="always")
def _rotl(x, k):
    return (x << np.uint64(k)) | (x >> np.uint64(64 - k))


@njit(cache=True, inline="always")
def next_u64(state):
    """Next 64-bit output of xoshiro256** (advances ``state`` in place)."""
    s0 = state[0]
    s1 = state[1]
    s2 = state[2]
    s3 = state[3]
    result = _rotl(s1 * np.uint64(5), 7) * np.uint64(9)
    t = s1 << np.uint64(17)
    s2 ^= s0
    s3 ^= s1
    s1 ^= s2
    s0 ^= s3
    s2 ^= t
    s3 = _rotl(s3, 45)
    state[0] = s0
    state[1] = s1
    state[2] = s2
    state[3] = s3
    return result


@njit(cache=True, inline="always")
def uniform(state):
    """Uniform on [0, 1): the top 53 bits of one output, so every double is a multiple of 2**-53."""
    return float(next_u64(state) >> np.uint64(11)) * _INV_2_53


@njit(cache=True, inline="always")
def below(state, n):
    """Uniform integer in [0, n) for 0 < n < 2**53 (bias below n / 2**53)."""
    return int(float(next_u64(state) >> np.uint64(11)) * _INV_2_53 * n)


@njit(cache=True, inline="always")
def exponential(state):
    """Exponential(1) by inverse CDF; 1 - u lies in (0, 1], so the log is finite."""
    return -math.log(1.0 - uniform(state))


@njit(cache=True, inline="always")
def unit_disk(state):
    """A uniform point (u, v) inside the unit disk, and s = u^2 + v^2 in (0, 1)."""
    while True:
        u = 2.0 * uniform(state) - 1.0
        v = 2.0 * uniform(state) - 1.0
        s = u * u + v * v
        if 0.0 < s < 1.0:
            return u, v, s


@njit(cache=True, inline="always")
def normal_pair(state):
    """Two independent standard normal deviates (polar method, Marsaglia & Bray 1964)."""
    u, v, s = unit_disk(state)
    f = math.sqrt(-2.0 * math.log(s) / s)
    return u * f, v * f


@njit(cache=True, inline="always")
def azimuth(state):
    """cos and sin of an angle uniform on [0, 2 pi) (von Neumann 1951: the doubled angle of a disk point)."""
    u, v, s = unit_disk(state)
    return (u * u - v * v) / s, 2.0 * u * v / s


@njit(cache=True, inline="always")
def isotropic(state):
    """A unit vector uniform on the sphere (Marsaglia 1972): z = 1 - 2s is uniform on [-1, 1]."""
    u, v, s = unit_disk(state)
    f = 2.0 * math.sqrt(1.0 - s)
    return u * f, v * f, 1.0 - 2.0 * s


@njit(cache=True, inline="always")
def in_ball(state):
    """A uniform point inside the unit ball (rejection from the cube, acceptance pi/6)."""
    while True:
        u = 2.0 * uniform(state) - 1.0
        v = 2.0 * uniform(state) - 1.0
        w = 2.0 * uniform(state) - 1.0
        if u * u + v * v + w * w <= 1.0:
            return u, v, w
