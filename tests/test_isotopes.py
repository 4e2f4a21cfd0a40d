"""Tests of the radionuclide table against published values."""

import math

import numpy as np
import pytest

from twinray.errors import TwinrayInputError
from twinray.isotopes import (
    ISOTOPES,
    canonical_isotope_name,
    decay_constant_per_s,
    decay_factor,
    get_isotope,
    half_life_s,
    positron_fraction,
)


def test_f18_half_life_nndc():
    """F-18 T1/2 = 109.77 min (NNDC/ENSDF via Ph. Eur. 5.7; references.md s.2)."""
    assert half_life_s("F-18") == pytest.approx(109.77 * 60, rel=1e-9)


def test_c11_half_life_ensdf():
    """C-11 T1/2 = 20.364 min (current ENSDF, value from memory per references.md s.2)."""
    assert half_life_s("C-11") == pytest.approx(20.364 * 60, rel=1e-9)


def test_o15_n13_half_lives_nndc():
    """O-15 122.24 s, N-13 9.965 min (NNDC via Ph. Eur. 5.7; references.md s.2)."""
    assert half_life_s("O-15") == pytest.approx(122.24, rel=1e-9)
    assert half_life_s("N-13") == pytest.approx(9.965 * 60, rel=1e-9)


@pytest.mark.parametrize(
    "name, expected",
    [
        # Decay constants computed in references.md s.2 [V-calc].
        ("F-18", 1.052424e-4),
        ("C-11", 5.672978e-4),
        ("O-15", 5.670379e-3),
        ("N-13", 1.159303e-3),
        ("Ga-68", 1.706166e-4),
        ("Rb-82", 9.186841e-3),
        ("Cu-64", 1.516022e-5),
        ("Zr-89", 2.455565e-6),
    ],
)
def test_decay_constants_reference_table(name, expected):
    """lambda = ln2/T1/2 against the table of references.md s.2 (6 significant digits)."""
    assert decay_constant_per_s(name) == pytest.approx(expected, rel=1e-6)


def test_positron_fractions_published():
    """beta+ fractions: F-18 96.86 % (DDEP), C-11 99.8 % (NNDC), Ga-68 ~88.9 % (JNM 2022 Table 3)."""
    assert positron_fraction("F-18") == pytest.approx(0.9686)
    assert positron_fraction("C-11") == pytest.approx(0.998)
    assert positron_fraction("Ga-68") == pytest.approx(0.889)
    for iso in ISOTOPES.values():
        assert 0.0 < iso.positron_fraction <= 1.0
        assert iso.half_life_source and iso.positron_fraction_source


def test_decay_factor_halves_each_half_life():
    """exp(-lambda * k * T1/2) = 2**-k (definition of the half-life)."""
    t = half_life_s("F-18") * np.arange(4)
    assert np.allclose(decay_factor("F-18", t), 0.5 ** np.arange(4), rtol=1e-12)
    assert decay_constant_per_s("C-11") * half_life_s("C-11") == pytest.approx(math.log(2))


@pytest.mark.parametrize("spelling", ["F-18", "F18", "18F", "f-18", "18-F", " F_18 "])
def test_name_spellings(spelling):
    assert canonical_isotope_name(spelling) == "F-18"


def test_unknown_isotope_names_where():
    with pytest.raises(TwinrayInputError, match=r"unknown isotope 'Xx-99' in phantom.toml isotope"):
        get_isotope("Xx-99", where="phantom.toml isotope")
    with pytest.raises(TwinrayInputError):
        half_life_s("F-19")


def test_mean_positron_range_jnm_table():
    """Mean positron range in water, JNM 2022;63:649 Table 3: F-18 0.6 mm, O-15 3.0 mm, Rb-82 7.1 mm."""
    from twinray.isotopes import mean_positron_range_mm

    assert mean_positron_range_mm("F18") == 0.6
    assert mean_positron_range_mm("O-15") == 3.0
    assert mean_positron_range_mm("Rb-82") == 7.1
    assert set(ISOTOPES) == set(__import__("twinray.isotopes").isotopes.MEAN_POSITRON_RANGE_MM)
