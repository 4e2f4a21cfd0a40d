"""Decay-correction factors of frames (twinray.decay)."""

import math

import numpy as np
import pytest

from twinray.decay import decay_constant, frame_decay_factor, frame_reference_time
from twinray.errors import TwinrayInputError

# Half-lives from NNDC/ENSDF (NuDat), as listed in shared/references.md section 2:
# F-18 109.77 min, C-11 20.364 min, O-15 122.24 s.
F18_S = 109.77 * 60.0
C11_S = 20.364 * 60.0
O15_S = 122.24
# Decay constants listed beside them in references.md section 2 ([V-calc], ln2/T_half).
LAMBDA_TABLE = {F18_S: 1.052424e-4, C11_S: 5.672978e-4, O15_S: 5.670379e-3}


def closed_form(half_life, t0, dt, ref=0.0):
    """DCF = lambda*dt/(1 - exp(-lambda*dt)) * exp(lambda*(t0 - ref)), written out with math."""
    lam = math.log(2) / half_life
    return lam * dt / (1 - math.exp(-lam * dt)) * math.exp(lam * (t0 - ref))


@pytest.mark.parametrize("half_life", [F18_S, C11_S, O15_S])
def test_decay_constants_match_nndc_table(half_life):
    """lambda = ln2/T_half against the table of references.md s.2 (NNDC half-lives)."""
    assert decay_constant(half_life) == pytest.approx(LAMBDA_TABLE[half_life], rel=1e-6)


@pytest.mark.parametrize("half_life", [F18_S, C11_S, O15_S])
@pytest.mark.parametrize("t0,dt", [(0.0, 10.0), (0.0, 600.0), (300.0, 60.0), (3000.0, 1200.0), (7.5, 0.25)])
def test_dcf_matches_closed_form_for_nndc_half_lives(half_life, t0, dt):
    """DCF against the closed form of the frame integral (references.md s.8) for NNDC half-lives."""
    # rel 1e-9: the naive closed form loses digits to cancellation in 1 - exp(-x) for short frames.
    assert frame_decay_factor(half_life, t0, dt) == pytest.approx(closed_form(half_life, t0, dt), rel=1e-9)


def test_dcf_one_half_life_later_is_two():
    """A frame of vanishing length one half-life after the reference: exactly 2 (definition of T_half)."""
    for half_life in (F18_S, C11_S, O15_S):
        assert frame_decay_factor(half_life, half_life, 0.0) == pytest.approx(2.0, rel=1e-14)
        assert frame_decay_factor(half_life, half_life, 1e-9) == pytest.approx(2.0, rel=1e-9)


@pytest.mark.parametrize("t0,dt,expected", [
    (0.0, 600.0, 1.031905),
    (3000.0, 600.0, 1.415006),
    (0.0, 60.0, 1.003161),
    (0.0, 3600.0, 1.201370),
])
def test_reference_vectors_f18(t0, dt, expected):
    """Test vectors of references.md s.8 (F-18 with T_half = 6586.2 s, ICRP-107/ENSDF)."""
    assert frame_decay_factor(6586.2, t0, dt) == pytest.approx(expected, abs=1e-6)


def test_reference_vector_ga68():
    """references.md s.8: Ga-68 (67.71 min), t0 = 0, dt = 600 s -> 1.052058."""
    assert frame_decay_factor(67.71 * 60, 0.0, 600.0) == pytest.approx(1.052058, abs=1e-6)


@pytest.mark.parametrize("dt,expected", [(600.0, 298.421), (60.0, 29.984), (3600.0, 1743.237)])
def test_time_of_average_activity_vectors(dt, expected):
    """DICOM PS3.3 C.8.9.4.1.5 example 2, values of references.md s.8 (F-18, 6586.2 s)."""
    assert frame_reference_time(6586.2, dt) == pytest.approx(expected, abs=1e-3)


def test_dcf_equals_exp_of_average_activity_time():
    """DCF = exp(lambda*(t0 + T_ave)) (DICOM PS3.3 C.8.9.4.1.5; references.md s.8)."""
    t0 = np.array([0.0, 10.0, 100.0, 1000.0, 5000.0])
    dt = np.array([1e-6, 5.0, 60.0, 600.0, 3600.0])
    for half_life in (F18_S, C11_S, O15_S):
        lam = math.log(2) / half_life
        np.testing.assert_allclose(frame_decay_factor(half_life, t0, dt),
                                   np.exp(lam * (t0 + frame_reference_time(half_life, dt))), rtol=1e-12)


def test_small_frames_are_continuous_with_the_limit():
    """Across the series/closed-form switch the factor is smooth and tends to exp(lambda*t0)."""
    dts = np.geomspace(1e-9, 1.0, 200)
    f = frame_decay_factor(O15_S, 0.0, dts)
    lam = math.log(2) / O15_S
    # Taylor series of x/(1-e^-x) to second order (common practice): 1 + x/2 + x^2/12.
    np.testing.assert_allclose(f, 1 + lam * dts / 2 + (lam * dts) ** 2 / 12, rtol=1e-10)
    assert frame_decay_factor(O15_S, 0.0, 0.0) == 1.0
    np.testing.assert_allclose(frame_reference_time(O15_S, dts), dts / 2, rtol=1e-3)
    assert frame_reference_time(O15_S, 0.0) == 0.0


def test_vectorised_and_reference_shift():
    """Arrays broadcast; moving the reference earlier by d multiplies the factor by exp(lambda*d)."""
    starts = np.array([0.0, 60.0, 120.0])
    f0 = frame_decay_factor(C11_S, starts, 60.0)
    f_inj = frame_decay_factor(C11_S, starts, 60.0, reference_s=-300.0)
    assert f0.shape == (3,)
    np.testing.assert_allclose(f_inj / f0, math.exp(math.log(2) / C11_S * 300.0), rtol=1e-13)
    assert isinstance(frame_decay_factor(C11_S, 0.0, 60.0), float)


def test_bad_values_are_refused():
    for bad in (0.0, -5.0, float("nan"), float("inf")):
        with pytest.raises(TwinrayInputError, match="half-life"):
            frame_decay_factor(bad, 0.0, 10.0)
    with pytest.raises(TwinrayInputError, match="duration"):
        frame_decay_factor(F18_S, 0.0, -1.0)
    with pytest.raises(TwinrayInputError, match="finite"):
        frame_decay_factor(F18_S, float("nan"), 1.0)
