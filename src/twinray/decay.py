"""Radioactive decay correction of time frames.

A frame that starts ``t0`` seconds after the reference time and lasts ``dt``
seconds collects counts proportional to

    integral_{t0}^{t0+dt} A_ref exp(-lambda t) dt = A_ref exp(-lambda t0) (1 - exp(-lambda dt)) / lambda,

so the activity at the reference time is the frame's mean count rate times

    DCF = lambda dt / (1 - exp(-lambda dt)) * exp(lambda t0),      lambda = ln 2 / T_half.

The same factor written with the DICOM "time of average activity" ``T_ave``
within the frame is ``DCF = exp(lambda (t0 + T_ave))``.

References
----------
DICOM PS3.3, section C.8.9.4.1.5, Frame Reference Time (0054,1300), example 2
(time of average activity in a frame).
Turku PET Centre, "Decay correction" (methods page): PET frames are
decay-corrected to scan start by default, accounting for decay during the frame.
"""

from __future__ import annotations

import math

import numpy as np

from .errors import TwinrayInputError

#: Below this lambda*dt the closed forms are replaced by their Taylor series
#: (the relative error of either branch is then below 1e-12).
_SMALL = 1e-4


def decay_constant(half_life_s) -> float | np.ndarray:
    """Decay constant ``lambda = ln 2 / T_half``, 1/s.

    Parameters
    ----------
    half_life_s : float or array_like
        Half-life, s (positive, finite).

    Returns
    -------
    float or ndarray
    """
    half_life = _check_half_life(half_life_s)
    out = math.log(2.0) / half_life
    return float(out) if np.ndim(out) == 0 else out


def _check_half_life(half_life_s) -> np.ndarray:
    half_life = np.asarray(half_life_s, dtype=np.float64)
    if not np.all(np.isfinite(half_life)) or np.any(half_life <= 0):
        raise TwinrayInputError(f"half-life must be a positive number of seconds, got {half_life_s!r}")
    return half_life


def _in_frame_factor(x: np.ndarray) -> np.ndarray:
    """``x / (1 - exp(-x))`` for ``x >= 0``, equal to 1 at ``x = 0``."""
    small = x < _SMALL
    safe = np.where(small, 1.0, x)
    exact = safe / -np.expm1(-safe)
    # Series x/(1-e^-x) = 1 + x/2 + x^2/12 - x^4/720 + ... (Bernoulli numbers).
    series = 1.0 + x / 2.0 + x * x / 12.0
    return np.where(small, series, exact)


def frame_decay_factor(half_life_s, frame_start_s, frame_duration_s, reference_s=0.0):
    """Decay-correction factor of a frame, from its mean rate to the activity at ``reference_s``.

    ``DCF = lambda*dt / (1 - exp(-lambda*dt)) * exp(lambda*(t0 - reference))``
    with ``lambda = ln 2 / half_life_s``; for ``dt -> 0`` the first factor
    tends to 1 and DCF to ``exp(lambda*(t0 - reference))``.

    Parameters
    ----------
    half_life_s : float
        Half-life of the radionuclide, s.
    frame_start_s : float or array_like
        Frame start ``t0``, s from acquisition start.
    frame_duration_s : float or array_like
        Frame length ``dt``, s (>= 0).
    reference_s : float, optional
        Time the activity is corrected to, s from acquisition start: 0 for the
        acquisition start, a negative number for an injection before it.

    Returns
    -------
    float or ndarray
        Dimensionless factor (>= 1 when the frame starts at or after the
        reference); an array when any input is an array (broadcast).

    Raises
    ------
    TwinrayInputError
        Non-positive half-life, negative duration or non-finite times.

    References
    ----------
    DICOM PS3.3 C.8.9.4.1.5 (Frame Reference Time, example 2): the factor equals
    ``exp(lambda*(t0 + T_ave))`` with ``T_ave`` from :func:`frame_reference_time`.
    """
    half_life = _check_half_life(half_life_s)
    start = np.asarray(frame_start_s, dtype=np.float64)
    duration = np.asarray(frame_duration_s, dtype=np.float64)
    reference = np.asarray(reference_s, dtype=np.float64)
    if not (np.all(np.isfinite(start)) and np.all(np.isfinite(duration)) and np.all(np.isfinite(reference))):
        raise TwinrayInputError("frame start, duration and decay reference must be finite numbers of seconds")
    if np.any(duration < 0):
        raise TwinrayInputError(f"frame duration must be >= 0 s, got {frame_duration_s!r}")
    lam = math.log(2.0) / half_life
    out = _in_frame_factor(lam * duration) * np.exp(lam * (start - reference))
    return float(out) if np.ndim(out) == 0 else out


def frame_reference_time(half_life_s, frame_duration_s):
    """Time of average activity within a frame, s after the frame start.

    ``T_ave = (1/lambda) * ln(lambda*T / (1 - exp(-lambda*T)))``; it lies
    before the frame mid-point and tends to ``T/2`` as ``lambda*T -> 0``.

    Parameters
    ----------
    half_life_s : float
        Half-life, s.
    frame_duration_s : float or array_like
        Frame length ``T``, s (>= 0).

    Returns
    -------
    float or ndarray
        s from the frame start.

    References
    ----------
    DICOM PS3.3 C.8.9.4.1.5, Frame Reference Time (0054,1300), example 2.
    """
    half_life = _check_half_life(half_life_s)
    duration = np.asarray(frame_duration_s, dtype=np.float64)
    if not np.all(np.isfinite(duration)) or np.any(duration < 0):
        raise TwinrayInputError(f"frame duration must be a number >= 0 s, got {frame_duration_s!r}")
    lam = math.log(2.0) / half_life
    x = lam * duration
    small = x < _SMALL
    safe = np.where(small, 1.0, x)
    exact = np.log(safe) - np.log(-np.expm1(-safe))
    # ln(x / (1 - e^-x)) = x/2 - x^2/24 + x^4/2880 - ...
    series = x / 2.0 - x * x / 24.0
    out = np.where(small, series, exact) / lam
    return float(out) if np.ndim(out) == 0 else out
