"""Dead-time models: measured rate m from true rate n, and back.

Non-paralysable (the detector is dead for tau after each recorded event):
``m = n / (1 + n*tau)``, inverse ``n = m / (1 - m*tau)``.
Paralysable (every event, recorded or not, extends the dead period):
``m = n * exp(-n*tau)``, which peaks at ``m = 1/(e*tau)`` for ``n = 1/tau``;
inverse on the lower branch ``n = -W0(-m*tau)/tau`` (principal Lambert W).

A coincidence is lost when either of its photons is lost, so the live
fraction of crystal pair (a, b) is ``L_a * L_b`` with ``L = m/n`` of each
crystal's singles (common practice); the bin's dead-time correction factor is
``pairs / sum over its pairs of L_a L_b``.

References
----------
G. F. Knoll, Radiation Detection and Measurement, 4th ed., Wiley 2010,
ch. 4 (dead time; section numbers from memory). Test vector from
/work/shared/references.md s.13: n = 1e6 cps, tau = 100 ns gives
909 090.9 cps (non-paralysable) and 904 837.4 cps (paralysable).
"""

from __future__ import annotations

import numpy as np

from ..errors import TwinrayInputError
from ..geometry import SinogramGeometry

DEADTIME_MODELS = ("nonparalysable", "paralysable")


def measured_rate(true_rate, tau_s, model: str = "nonparalysable"):
    """Recorded rate m for a true rate n (counts/s) and dead time tau (s)."""
    n = np.asarray(true_rate, dtype=np.float64)
    if model == "nonparalysable":
        out = n / (1.0 + n * tau_s)
    elif model == "paralysable":
        out = n * np.exp(-n * tau_s)
    else:
        raise TwinrayInputError(f"unknown dead-time model {model!r}; choose {' or '.join(DEADTIME_MODELS)}")
    return float(out) if out.ndim == 0 else out


def true_rate(measured, tau_s, model: str = "nonparalysable"):
    """True rate n from a recorded rate m (counts/s) and dead time tau (s).

    Raises
    ------
    TwinrayInputError
        When ``m*tau >= 1`` (non-paralysable) or ``m*tau > 1/e``
        (paralysable): no true rate gives that recorded rate.
    """
    from scipy.special import lambertw

    m = np.asarray(measured, dtype=np.float64)
    x = m * tau_s
    if model == "nonparalysable":
        if np.any(x >= 1.0):
            raise TwinrayInputError(f"a recorded rate of {m.max():g}/s with dead time {tau_s:g} s is impossible "
                                    "for the non-paralysable model (m*tau must be < 1)")
        out = m / (1.0 - x)
    elif model == "paralysable":
        if np.any(x > 1.0 / np.e):
            raise TwinrayInputError(f"a recorded rate of {m.max():g}/s with dead time {tau_s:g} s exceeds the "
                                    "paralysable model's maximum 1/(e*tau)")
        out = np.where(x > 0, -np.real(lambertw(-x, 0)) / tau_s, 0.0)
    else:
        raise TwinrayInputError(f"unknown dead-time model {model!r}; choose {' or '.join(DEADTIME_MODELS)}")
    return float(out) if out.ndim == 0 else out


def live_fraction(measured, tau_s, model: str = "nonparalysable") -> np.ndarray:
    """Fraction ``m/n`` of true events that are recorded, from the recorded rates."""
    m = np.asarray(measured, dtype=np.float64)
    n = np.asarray(true_rate(m, tau_s, model))
    return np.where(n > 0, m / np.where(n > 0, n, 1.0), 1.0)


def deadtime_factors(singles_rate_cps, tau_s: float, geometry: SinogramGeometry,
                     model: str = "nonparalysable") -> np.ndarray:
    """Dead-time correction factor of every sinogram bin from measured singles rates.

    Parameters
    ----------
    singles_rate_cps : ndarray, shape (n_crystals,)
        Recorded singles rate of each crystal during the frame, counts/s.
    tau_s : float
        Dead time per single event, s.
    geometry : SinogramGeometry
    model : {"nonparalysable", "paralysable"}

    Returns
    -------
    ndarray of float32, shape ``geometry.shape``
        ``>= 1``; multiply recorded coincidences by it.
    """
    from .pairs import pair_product_sinogram, pairs_per_bin

    if not (np.isfinite(tau_s) and tau_s >= 0):
        raise TwinrayInputError(f"dead time must be >= 0 s, got {tau_s!r}")
    live = live_fraction(singles_rate_cps, tau_s, model)
    live_pairs = pair_product_sinogram(geometry, live)
    pairs = pairs_per_bin(geometry)
    return np.where(live_pairs > 0, pairs / np.where(live_pairs > 0, live_pairs, 1.0), 1.0).astype(np.float32)
