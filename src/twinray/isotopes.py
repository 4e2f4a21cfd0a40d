"""Half-lives and positron branching fractions of PET radionuclides.

One source is pinned per entry (named in :data:`ISOTOPES`, ``half_life_source``
and ``positron_fraction_source``), because editions of the nuclear data tables
differ by up to about 1 % (Rb-82: 1.2 % between ICRP-107 and current ENSDF).

Names are accepted as ``"F-18"``, ``"F18"``, ``"18F"`` or ``"f-18"``; the
canonical form is ``"F-18"``.

References
----------
.. [1] NNDC NuDat / ENSDF, Brookhaven National Laboratory, as reproduced in
   European Pharmacopoeia 01/2008:50700, "5.7 Table of physical
   characteristics of radionuclides".
.. [2] K. Eckerman and A. Endo, "Nuclear Decay Data for Dosimetric
   Calculations", ICRP Publication 107, Ann. ICRP 38(3), 2008.
.. [3] M.-M. Be et al., "Table of Radionuclides", Monographie BIPM-5 (DDEP),
   BIPM, 2004-2016.
.. [4] "Properties of SPECT and PET Radionuclides with Existing or Potential
   Applications in Cardiovascular Imaging", J Nucl Med 63(5):649-658, 2022,
   Table 3 (positron branching percentages).
"""

from __future__ import annotations

import math
import re
from dataclasses import dataclass

from .errors import TwinrayInputError

_MIN = 60.0
_HOUR = 3600.0
_DAY = 86400.0
_JULIAN_YEAR = 365.25 * _DAY


@dataclass(frozen=True)
class Isotope:
    """A positron-emitting radionuclide.

    Attributes
    ----------
    name : str
        Canonical name, e.g. ``"F-18"``.
    half_life_s : float
        Physical half-life in seconds.
    positron_fraction : float
        Positrons emitted per decay (beta+ branching fraction, 0..1).
    half_life_source, positron_fraction_source : str
        Where each number comes from.
    """

    name: str
    half_life_s: float
    positron_fraction: float
    half_life_source: str
    positron_fraction_source: str

    @property
    def decay_constant_per_s(self) -> float:
        """lambda = ln 2 / T_half, in 1/s."""
        return math.log(2.0) / self.half_life_s


def _iso(name, half_life_s, hl_src, fraction, frac_src):
    return Isotope(name, float(half_life_s), float(fraction), hl_src, frac_src)


#: The table. Each value carries its source; "[memory]" marks a value that
#: /work/shared/references.md could only give from memory.
ISOTOPES: dict[str, Isotope] = {
    iso.name: iso
    for iso in (
        _iso("F-18", 109.77 * _MIN, "NNDC/ENSDF 109.77(5) min [1]",
             0.9686, "DDEP 96.86 % beta+ [3]"),
        # The older NNDC table gives 20.385(20) min; current ENSDF gives
        # 20.364(14) min (value from memory, to be re-checked at NuDat).
        _iso("C-11", 20.364 * _MIN, "ENSDF 20.364(14) min [1] [memory]",
             0.998, "NNDC 99.8 % [1]"),
        _iso("N-13", 9.965 * _MIN, "NNDC/ENSDF 9.965(4) min [1]",
             0.998, "NNDC 99.8 % [1]"),
        _iso("O-15", 122.24, "NNDC/ENSDF 122.24(16) s [1]",
             0.999, "NNDC 99.9 % [1]"),
        _iso("Ga-68", 67.71 * _MIN, "ICRP-107 67.71 min [2]",
             0.889, "JNM 2022 Table 3, 87.7 % + 1.2 % [4]"),
        _iso("Rb-82", 1.2575 * _MIN, "current ENSDF 1.2575 min [1]",
             0.949, "JNM 2022 Table 3, 81.8 % + 13.1 % [4]"),
        _iso("Cu-64", 12.7004 * _HOUR, "DDEP 12.7004(20) h [3]",
             0.175, "JNM 2022 Table 3, 17.5 % [4]"),
        _iso("Zr-89", 78.41 * _HOUR, "NNDC/ENSDF 78.41(12) h [1]",
             0.227, "JNM 2022 Table 3, 22.7 % [4]"),
        # Ge-68 decays by electron capture only; as a phantom source it is in
        # secular equilibrium with its daughter Ga-68, so each Ge-68 decay
        # brings one Ga-68 decay and its positrons (common practice).
        _iso("Ge-68", 270.95 * _DAY, "ICRP-107 270.95 d [2]",
             0.889, "Ga-68 daughter in equilibrium, JNM 2022 Table 3 [4]"),
        _iso("Na-22", 2.6019 * _JULIAN_YEAR,
             "ICRP-107 2.6019 y (Julian year) [2]",
             0.906, "[memory] about 90.6 % beta+"),
    )
}

_NAME_PATTERN = re.compile(r"^\s*([A-Za-z]{1,2})[-_ ]?(\d{1,3})\s*$")
_NAME_PATTERN_MASS_FIRST = re.compile(r"^\s*(\d{1,3})[-_ ]?([A-Za-z]{1,2})\s*$")


def canonical_isotope_name(name: str) -> str | None:
    """Return the canonical spelling (``"F-18"``) of ``name`` or None."""
    if not isinstance(name, str):
        return None
    match = _NAME_PATTERN.match(name)
    if match:
        symbol, mass = match.groups()
    else:
        match = _NAME_PATTERN_MASS_FIRST.match(name)
        if not match:
            return None
        mass, symbol = match.groups()
    candidate = f"{symbol.capitalize()}-{int(mass)}"
    return candidate if candidate in ISOTOPES else None


def get_isotope(name: str, where: str = "") -> Isotope:
    """Look up an isotope by name.

    Parameters
    ----------
    name : str
        ``"F-18"``, ``"F18"``, ``"18F"`` ... (case-insensitive).
    where : str, optional
        Where the name came from (file and key), for the error message.

    Raises
    ------
    TwinrayInputError
        For a name not in the table.
    """
    canonical = canonical_isotope_name(name)
    if canonical is None:
        place = f" in {where}" if where else ""
        raise TwinrayInputError(
            f"unknown isotope {name!r}{place}; known: {', '.join(ISOTOPES)}"
        )
    return ISOTOPES[canonical]


def half_life_s(name: str) -> float:
    """Physical half-life of ``name`` in seconds."""
    return get_isotope(name).half_life_s


def decay_constant_per_s(name: str) -> float:
    """Decay constant lambda = ln 2 / T_half of ``name``, in 1/s."""
    return get_isotope(name).decay_constant_per_s


def positron_fraction(name: str) -> float:
    """Positrons per decay (beta+ branching fraction) of ``name``."""
    return get_isotope(name).positron_fraction


def decay_factor(name: str, elapsed_s):
    """Fraction of activity left after ``elapsed_s`` seconds: exp(-lambda t).

    Works on scalars and numpy arrays.
    """
    import numpy as np

    return np.exp(-decay_constant_per_s(name) * np.asarray(elapsed_s, dtype=float))


#: Mean positron range in water, mm: JNM 2022 Table 3 [4] (main branch for
#: Ga-68 and Rb-82). Ge-68 uses its Ga-68 daughter. Na-22 is not in that
#: table: 0.5 mm is from memory (its end-point energy, 0.55 MeV, is a little
#: below that of F-18).
MEAN_POSITRON_RANGE_MM: dict[str, float] = {
    "F-18": 0.6,
    "C-11": 1.2,
    "N-13": 1.8,
    "O-15": 3.0,
    "Ga-68": 3.5,
    "Rb-82": 7.1,
    "Cu-64": 0.7,
    "Zr-89": 1.3,
    "Ge-68": 3.5,
    "Na-22": 0.5,
}


def mean_positron_range_mm(name: str) -> float:
    """Mean positron range in water of ``name``, mm (see :data:`MEAN_POSITRON_RANGE_MM`)."""
    return MEAN_POSITRON_RANGE_MM[get_isotope(name).name]
