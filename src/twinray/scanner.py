"""Scanner geometry: load and validate the scanner TOML, place the crystals.

A cylindrical ring scanner as in the data contract, section 1. Crystal
``j`` of ring ``r`` has global id ``r * crystals_per_ring + j`` and sits at
angle ``angle_offset_rad + 2*pi*j/crystals_per_ring`` (counter-clockwise from
+x) on the circle of radius ``radius_mm``, at
``z = (r - (rings - 1)/2) * axial_pitch_mm``.
"""

from __future__ import annotations

import dataclasses
import json
import math
import tomllib
from pathlib import Path

import numpy as np

from .errors import TwinrayInputError

_TOP_KEYS = {
    "name", "rings", "crystals_per_ring", "radius_mm", "axial_pitch_mm", "angle_offset_rad",
    "coincidence_window_ns", "energy_window_kev", "tof_fwhm_ps", "sinogram",
}
_SINOGRAM_KEYS = {"radial_bins", "max_ring_difference", "span", "views"}
_GEOMETRY_KEYS = ("rings", "crystals_per_ring", "radius_mm", "axial_pitch_mm", "angle_offset_rad")


@dataclasses.dataclass(frozen=True)
class Scanner:
    """A cylindrical PET ring scanner (data contract, section 1).

    Attributes
    ----------
    name : str
        Free-text label.
    rings : int
        Number of detector rings.
    crystals_per_ring : int
        Crystals per ring (even).
    radius_mm : float
        Radius of the circle on which LOR end points lie, mm.
    axial_pitch_mm : float
        Ring-to-ring spacing, mm.
    coincidence_window_ns : float
        Prompt coincidence window width (2 tau), ns.
    energy_window_kev : tuple of float
        Accepted energy window (lo, hi), keV, limits inclusive.
    angle_offset_rad : float
        Angle of crystal 0, radians.
    tof_fwhm_ps : float
        Coincidence timing resolution (FWHM), ps; 0 means no TOF.
    radial_bins, max_ring_difference, span, views : int or None
        The optional ``[sinogram]`` table; ``None`` means "use the default".
    """

    name: str
    rings: int
    crystals_per_ring: int
    radius_mm: float
    axial_pitch_mm: float
    coincidence_window_ns: float
    energy_window_kev: tuple
    angle_offset_rad: float = 0.0
    tof_fwhm_ps: float = 0.0
    radial_bins: int | None = None
    max_ring_difference: int | None = None
    span: int | None = None
    views: int | None = None

    # ---- derived quantities -------------------------------------------------
    @property
    def n_crystals(self) -> int:
        """Total number of crystals (global ids run from 0 to this - 1)."""
        return self.rings * self.crystals_per_ring

    @property
    def crystal_pitch_mm(self) -> float:
        """Arc length between neighbouring crystals on the LOR circle, mm."""
        return 2.0 * math.pi * self.radius_mm / self.crystals_per_ring

    @property
    def axial_length_mm(self) -> float:
        """Axial extent covered by the rings (rings * pitch), mm."""
        return self.rings * self.axial_pitch_mm

    def crystal_angles_rad(self) -> np.ndarray:
        """Angle of every in-ring crystal position ``j``, radians, shape (crystals_per_ring,)."""
        j = np.arange(self.crystals_per_ring, dtype=np.float64)
        return self.angle_offset_rad + 2.0 * np.pi * j / self.crystals_per_ring

    def ring_z_mm(self) -> np.ndarray:
        """Axial position of every ring, mm, shape (rings,); ring 0 is the most negative."""
        return (np.arange(self.rings, dtype=np.float64) - (self.rings - 1) / 2.0) * self.axial_pitch_mm

    def crystal_positions_mm(self) -> np.ndarray:
        """Position of every crystal by global id, mm, shape (n_crystals, 3)."""
        angles = self.crystal_angles_rad()
        z = self.ring_z_mm()
        pos = np.empty((self.rings, self.crystals_per_ring, 3))
        pos[:, :, 0] = self.radius_mm * np.cos(angles)[None, :]
        pos[:, :, 1] = self.radius_mm * np.sin(angles)[None, :]
        pos[:, :, 2] = z[:, None]
        return pos.reshape(-1, 3)

    # ---- conversion ---------------------------------------------------------
    def to_dict(self) -> dict:
        """The scanner table as in the TOML (and in event-file metadata)."""
        d = {
            "name": self.name,
            "rings": self.rings,
            "crystals_per_ring": self.crystals_per_ring,
            "radius_mm": self.radius_mm,
            "axial_pitch_mm": self.axial_pitch_mm,
            "angle_offset_rad": self.angle_offset_rad,
            "coincidence_window_ns": self.coincidence_window_ns,
            "energy_window_kev": [float(self.energy_window_kev[0]), float(self.energy_window_kev[1])],
            "tof_fwhm_ps": self.tof_fwhm_ps,
        }
        sino = {k: getattr(self, k) for k in sorted(_SINOGRAM_KEYS) if getattr(self, k) is not None}
        if sino:
            d["sinogram"] = sino
        return d

    def to_json(self) -> str:
        return json.dumps(self.to_dict(), sort_keys=True)

    def replace(self, **changes) -> "Scanner":
        """A copy with some fields changed (validated again)."""
        return scanner_from_dict({**self.to_dict_flat(), **changes}, source="scanner")

    def to_dict_flat(self) -> dict:
        return {f.name: getattr(self, f.name) for f in dataclasses.fields(self)}


def _need(d: dict, key: str, kind, source: str):
    if key not in d:
        raise TwinrayInputError(f"{source}: missing key '{key}'")
    value = d[key]
    if kind is int:
        if isinstance(value, bool) or not isinstance(value, int):
            raise TwinrayInputError(f"{source}: '{key}' must be an integer, got {value!r}")
    elif kind is float:
        if isinstance(value, bool) or not isinstance(value, (int, float)) or not math.isfinite(value):
            raise TwinrayInputError(f"{source}: '{key}' must be a number, got {value!r}")
        value = float(value)
    elif kind is str and not isinstance(value, str):
        raise TwinrayInputError(f"{source}: '{key}' must be a string, got {value!r}")
    return value


def scanner_from_dict(d: dict, source: str = "scanner") -> Scanner:
    """Build and validate a :class:`Scanner` from a scanner table.

    Accepts the TOML layout (optional ``[sinogram]`` sub-table) and the flat
    field layout of :meth:`Scanner.to_dict_flat`.

    Raises
    ------
    TwinrayInputError
        On an unknown key, a missing key or an impossible value; the message
        names ``source``.
    """
    if not isinstance(d, dict):
        raise TwinrayInputError(f"{source}: the scanner description must be a table")
    d = dict(d)
    sino = d.pop("sinogram", None) or {}
    if not isinstance(sino, dict):
        raise TwinrayInputError(f"{source}: 'sinogram' must be a table")
    flat_sino = {k: d.pop(k) for k in list(d) if k in _SINOGRAM_KEYS}
    unknown = set(d) - _TOP_KEYS
    if unknown:
        raise TwinrayInputError(f"{source}: unknown key(s) {', '.join(sorted(unknown))}")
    unknown = set(sino) - _SINOGRAM_KEYS
    if unknown:
        raise TwinrayInputError(f"{source}: unknown key(s) in [sinogram]: {', '.join(sorted(unknown))}")
    sino = {**{k: v for k, v in flat_sino.items() if v is not None}, **sino}

    name = str(d.get("name", "unnamed scanner"))
    rings = _need(d, "rings", int, source)
    n = _need(d, "crystals_per_ring", int, source)
    radius = _need(d, "radius_mm", float, source)
    pitch = _need(d, "axial_pitch_mm", float, source)
    window = _need(d, "coincidence_window_ns", float, source)
    offset = float(_need(d, "angle_offset_rad", float, source)) if "angle_offset_rad" in d else 0.0
    tof = float(_need(d, "tof_fwhm_ps", float, source)) if "tof_fwhm_ps" in d else 0.0
    ew = d.get("energy_window_kev")
    if ew is None:
        raise TwinrayInputError(f"{source}: missing key 'energy_window_kev'")
    if (not isinstance(ew, (list, tuple)) or len(ew) != 2
            or not all(isinstance(v, (int, float)) and not isinstance(v, bool) for v in ew)):
        raise TwinrayInputError(f"{source}: 'energy_window_kev' must be [lo, hi] in keV, got {ew!r}")
    lo, hi = float(ew[0]), float(ew[1])

    if rings < 1:
        raise TwinrayInputError(f"{source}: 'rings' must be >= 1, got {rings}")
    if n < 4 or n % 2:
        raise TwinrayInputError(f"{source}: 'crystals_per_ring' must be an even number >= 4, got {n}")
    if radius <= 0 or pitch <= 0:
        raise TwinrayInputError(f"{source}: 'radius_mm' and 'axial_pitch_mm' must be positive")
    if window <= 0:
        raise TwinrayInputError(f"{source}: 'coincidence_window_ns' must be positive, got {window}")
    if not (0 <= lo < hi):
        raise TwinrayInputError(f"{source}: 'energy_window_kev' must satisfy 0 <= lo < hi, got [{lo}, {hi}]")
    if tof < 0:
        raise TwinrayInputError(f"{source}: 'tof_fwhm_ps' must be >= 0, got {tof}")

    def opt_int(key):
        if key not in sino or sino[key] is None:
            return None
        return _need(sino, key, int, f"{source} [sinogram]")

    radial_bins = opt_int("radial_bins")
    mrd = opt_int("max_ring_difference")
    span = opt_int("span")
    views = opt_int("views")
    if radial_bins is not None and (radial_bins < 1 or radial_bins % 2 == 0 or radial_bins > n - 1):
        raise TwinrayInputError(
            f"{source} [sinogram]: 'radial_bins' must be odd and between 1 and {n - 1}, got {radial_bins}")
    if mrd is not None and not (0 <= mrd <= rings - 1):
        raise TwinrayInputError(
            f"{source} [sinogram]: 'max_ring_difference' must be between 0 and {rings - 1}, got {mrd}")
    if span is not None and (span < 1 or span % 2 == 0):
        raise TwinrayInputError(f"{source} [sinogram]: 'span' must be an odd integer >= 1, got {span}")
    if views is not None and (views < 1 or (n // 2) % views):
        raise TwinrayInputError(
            f"{source} [sinogram]: 'views' must divide crystals_per_ring/2 = {n // 2}, got {views}")
    return Scanner(name=name, rings=rings, crystals_per_ring=n, radius_mm=radius, axial_pitch_mm=pitch,
                   coincidence_window_ns=window, energy_window_kev=(lo, hi), angle_offset_rad=offset,
                   tof_fwhm_ps=tof, radial_bins=radial_bins, max_ring_difference=mrd, span=span, views=views)


def load_scanner(path) -> Scanner:
    """Read and validate a scanner TOML file.

    Parameters
    ----------
    path : path-like
        A TOML file laid out as in the data contract, section 1.

    Returns
    -------
    Scanner
    """
    path = Path(path)
    if not path.is_file():
        raise TwinrayInputError(f"scanner file {path} does not exist")
    try:
        data = tomllib.loads(path.read_text(encoding="utf-8"))
    except (tomllib.TOMLDecodeError, UnicodeDecodeError) as exc:
        raise TwinrayInputError(f"scanner file {path} is not valid TOML: {exc}") from None
    return scanner_from_dict(data, source=str(path))


def check_same_geometry(embedded: Scanner, given: Scanner, where: str) -> None:
    """Raise unless two scanners share the crystal geometry (relative tolerance 1e-6).

    Compares ``rings``, ``crystals_per_ring``, ``radius_mm``,
    ``axial_pitch_mm`` and ``angle_offset_rad`` (data contract, section 2).
    """
    for key in _GEOMETRY_KEYS:
        a, b = float(getattr(embedded, key)), float(getattr(given, key))
        if not math.isclose(a, b, rel_tol=1e-6, abs_tol=1e-12):
            raise TwinrayInputError(
                f"{where}: --scanner {key} = {b:g} disagrees with the geometry embedded in the events ({a:g})")


def merge_scanner_options(embedded: Scanner, given: Scanner | None, where: str) -> Scanner:
    """Combine the geometry embedded in an event file with a ``--scanner`` file.

    The crystal geometry must agree; the given file's ``[sinogram]`` table,
    windows and ``tof_fwhm_ps`` override the embedded ones.
    """
    if given is None:
        return embedded
    check_same_geometry(embedded, given, where)
    return dataclasses.replace(
        embedded,
        name=given.name,
        coincidence_window_ns=given.coincidence_window_ns,
        energy_window_kev=given.energy_window_kev,
        tof_fwhm_ps=given.tof_fwhm_ps,
        radial_bins=given.radial_bins if given.radial_bins is not None else embedded.radial_bins,
        max_ring_difference=(given.max_ring_difference if given.max_ring_difference is not None
                             else embedded.max_ring_difference),
        span=given.span if given.span is not None else embedded.span,
        views=given.views if given.views is not None else embedded.views,
    )
