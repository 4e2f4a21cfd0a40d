"""Phantoms: read and check a phantom TOML, rasterize it into images.

A phantom is a list of shapes, each with an activity concentration (Bq/mL at
acquisition start) and a linear attenuation coefficient (1/cm at 511 keV),
or a pair of NIfTI images (activity in Bq/mL and mu in 1/cm). Where shapes
overlap, the one listed later replaces the earlier ones (activity and mu),
so a cold insert is a later shape with activity 0.

File layout (every key is checked; unknown keys are errors)::

    name = "water cylinder with inserts"
    isotope = "F-18"                       # see twinray.isotopes
    scanner = "scanners/benchtop.toml"     # relative to this file or to configs/
    duration_s = 60.0                      # default acquisition length
    acquisition_start = "2026-01-01T09:00:00+00:00"
    injection_time = "2026-01-01T08:00:00+00:00"   # optional
    injected_activity_bq = 2.0e6                   # optional
    normalization_source = { shape = "cylinder", radius_mm = 40.0, mu_per_cm = 0.096 }

    [physics]                              # optional, see PhysicsOptions
    scatter = true

    [[shape]]
    name = "water"
    type = "cylinder"                      # cylinder | sphere | ellipsoid | box
    centre_mm = [0.0, 0.0, 0.0]
    radius_mm = 40.0                       # cylinder, sphere
    length_mm = 24.0                       # cylinder (axis along z)
    # semi_axes_mm = [a, b, c]             # ellipsoid
    # size_mm = [sx, sy, sz]               # box (full edge lengths)
    # rotation_deg = 30.0                  # ellipsoid, box, cylinder: about z
    activity_bq_per_ml = 5000.0
    mu_per_cm = 0.096
    # time-activity curve: values multiply activity_bq_per_ml, linear
    # interpolation between points, held constant before the first and after
    # the last; radioactive decay is applied on top.
    # tac = { times_s = [0, 60, 300], values = [0.0, 1.0, 0.4] }

or, for a voxel phantom::

    [voxel]
    activity = "activity.nii.gz"           # Bq/mL, scanner frame
    mu = "mu.nii.gz"                       # 1/cm at 511 keV, same grid (optional)
"""

from __future__ import annotations

import dataclasses
import math
import tomllib
from datetime import datetime
from pathlib import Path

import numpy as np

from ..errors import TwinrayInputError
from ..isotopes import get_isotope

SHAPE_TYPES = ("cylinder", "sphere", "ellipsoid", "box")

_TOP_KEYS = {
    "name", "description", "isotope", "scanner", "duration_s", "acquisition_start", "injection_time",
    "injected_activity_bq", "normalization_source", "physics", "shape", "voxel",
}
_SHAPE_COMMON = {"name", "type", "centre_mm", "activity_bq_per_ml", "mu_per_cm", "tac"}
_SHAPE_KEYS = {
    "cylinder": _SHAPE_COMMON | {"radius_mm", "length_mm", "rotation_deg"},
    "sphere": _SHAPE_COMMON | {"radius_mm"},
    "ellipsoid": _SHAPE_COMMON | {"semi_axes_mm", "rotation_deg"},
    "box": _SHAPE_COMMON | {"size_mm", "rotation_deg"},
}
_NORM_SHAPES = ("flood", "cylinder", "rotating-line")


@dataclasses.dataclass(frozen=True)
class PhysicsOptions:
    """Which physical effects the simulator models, and their parameters.

    Attributes
    ----------
    attenuation : bool
        Photons are attenuated along their paths (survival exp(-integral mu)).
    scatter : bool
        An attenuated photon may Compton-scatter once and still be detected;
        when False every interaction removes the photon.
    randoms : bool
        Accidental coincidences from the singles are added to the prompts.
    delayed : bool
        An independent delayed-window stream (``delayed = true``) is written.
    non_collinearity : bool
        Gaussian deviation from 180 degrees, 0.5 degree FWHM.
    positron_range : bool
        Isotropic displacement of the annihilation point, exponential in
        distance with the isotope's mean range.
    efficiency_spread : float
        Log-normal sigma of the crystal efficiencies drawn with the seed
        (0 = all equal).
    efficiency_file : str or None
        Crystal efficiencies to use instead (.npy, .txt, or a normalization
        .h5 with ``crystal_efficiency``); relative to the phantom file.
    intrinsic_efficiency : float
        Detection probability of the most efficient crystal (0..1].
    energy_resolution_fwhm : float
        Energy resolution, FWHM / E at 511 keV (scales as 1/sqrt(E)).
    lld_kev, uld_kev : float
        Hardware discriminator: a photon is a single only inside these limits
        (wider than the scanner's energy window, which is applied later).
    """

    attenuation: bool = True
    scatter: bool = True
    randoms: bool = True
    delayed: bool = True
    non_collinearity: bool = True
    positron_range: bool = True
    efficiency_spread: float = 0.10
    efficiency_file: str | None = None
    intrinsic_efficiency: float = 1.0
    energy_resolution_fwhm: float = 0.12
    lld_kev: float = 300.0
    uld_kev: float = 750.0


_PHYSICS_TYPES = {f.name: f.type for f in dataclasses.fields(PhysicsOptions)}


@dataclasses.dataclass(frozen=True)
class Shape:
    """One shape of an analytic phantom (mm, Bq/mL, 1/cm).

    ``half_extents_mm`` are the semi-axes (ellipsoid), radius/radius/half
    length (cylinder), or half edge lengths (box), along the shape's own axes,
    which are rotated by ``rotation_rad`` about z.
    """

    name: str
    kind: str
    centre_mm: tuple
    half_extents_mm: tuple
    rotation_rad: float
    activity_bq_per_ml: float
    mu_per_cm: float
    tac_times_s: tuple | None = None
    tac_values: tuple | None = None

    @property
    def volume_ml(self) -> float:
        """Volume of the whole shape (before replacement by later shapes), mL."""
        a, b, c = self.half_extents_mm
        if self.kind == "box":
            v = 8.0 * a * b * c
        elif self.kind == "cylinder":
            v = math.pi * a * b * 2.0 * c
        else:
            v = 4.0 / 3.0 * math.pi * a * b * c
        return v / 1000.0

    def tac(self, t_s):
        """Time-activity multiplier at time(s) ``t_s`` (1 without a curve)."""
        t = np.asarray(t_s, dtype=float)
        if self.tac_times_s is None:
            return np.ones_like(t)
        return np.interp(t, self.tac_times_s, self.tac_values)

    def contains(self, x, y, z) -> np.ndarray:
        """Boolean mask of the points (mm, arrays) inside the shape."""
        cx, cy, cz = self.centre_mm
        cr, sr = math.cos(self.rotation_rad), math.sin(self.rotation_rad)
        dx, dy = np.asarray(x) - cx, np.asarray(y) - cy
        u = dx * cr + dy * sr
        v = -dx * sr + dy * cr
        w = np.asarray(z) - cz
        a, b, c = self.half_extents_mm
        if self.kind == "box":
            return (np.abs(u) <= a) & (np.abs(v) <= b) & (np.abs(w) <= c)
        if self.kind == "cylinder":
            return ((u / a) ** 2 + (v / b) ** 2 <= 1.0) & (np.abs(w) <= c)
        return (u / a) ** 2 + (v / b) ** 2 + (w / c) ** 2 <= 1.0

    def max_transaxial_radius_mm(self) -> float:
        """Largest distance from the scanner axis reached by the shape, mm (upper bound for boxes)."""
        a, b, _ = self.half_extents_mm
        cx, cy, _ = self.centre_mm
        reach = math.hypot(a, b) if self.kind == "box" else max(a, b)
        return math.hypot(cx, cy) + reach

    def z_range_mm(self) -> tuple:
        return self.centre_mm[2] - self.half_extents_mm[2], self.centre_mm[2] + self.half_extents_mm[2]


@dataclasses.dataclass(frozen=True)
class Phantom:
    """A phantom as read from its TOML file.

    Attributes
    ----------
    name : str
    path : Path
        The TOML file (for messages and relative paths).
    isotope : str
        Canonical isotope name.
    shapes : tuple of Shape
        Empty for a voxel phantom.
    voxel_activity, voxel_mu : Path or None
        NIfTI images of a voxel phantom.
    scanner_path : Path or None
    duration_s : float or None
    acquisition_start, injection_time : str or None
        ISO 8601 date-times.
    injected_activity_bq : float or None
    normalization_source : dict or None
    physics : PhysicsOptions
    """

    name: str
    path: Path
    isotope: str
    shapes: tuple
    voxel_activity: Path | None
    voxel_mu: Path | None
    scanner_path: Path | None
    duration_s: float | None
    acquisition_start: str | None
    injection_time: str | None
    injected_activity_bq: float | None
    normalization_source: dict | None
    physics: PhysicsOptions

    @property
    def is_voxel(self) -> bool:
        return self.voxel_activity is not None


def _number(value, where, minimum=None, positive=False):
    if isinstance(value, bool) or not isinstance(value, (int, float)) or not math.isfinite(value):
        raise TwinrayInputError(f"{where} must be a number, got {value!r}")
    value = float(value)
    if positive and value <= 0:
        raise TwinrayInputError(f"{where} must be positive, got {value:g}")
    if minimum is not None and value < minimum:
        raise TwinrayInputError(f"{where} must be >= {minimum:g}, got {value:g}")
    return value


def _vector(value, where, n=3, positive=False):
    if not isinstance(value, list) or len(value) != n:
        raise TwinrayInputError(f"{where} must be a list of {n} numbers, got {value!r}")
    return tuple(_number(v, where, positive=positive) for v in value)


def _iso_time(value, where):
    if not isinstance(value, (str, datetime)):
        raise TwinrayInputError(f"{where} must be an ISO 8601 date-time, got {value!r}")
    if isinstance(value, datetime):
        return value.isoformat()
    try:
        datetime.fromisoformat(value.replace("Z", "+00:00"))
    except ValueError:
        raise TwinrayInputError(f"{where} is not an ISO 8601 date-time: {value!r}") from None
    return value


def _parse_tac(value, where):
    if not isinstance(value, dict):
        raise TwinrayInputError(f"{where} must be a table {{ times_s = [...], values = [...] }}")
    unknown = set(value) - {"times_s", "values"}
    if unknown:
        raise TwinrayInputError(f"{where}: unknown key(s) {', '.join(sorted(unknown))}")
    times, values = value.get("times_s"), value.get("values")
    if not isinstance(times, list) or not isinstance(values, list) or len(times) != len(values) or not times:
        raise TwinrayInputError(f"{where} needs lists times_s and values of the same, non-zero length")
    times = tuple(_number(t, f"{where}.times_s") for t in times)
    values = tuple(_number(v, f"{where}.values", minimum=0.0) for v in values)
    if any(t2 <= t1 for t1, t2 in zip(times, times[1:])):
        raise TwinrayInputError(f"{where}.times_s must increase strictly")
    return times, values


def _parse_shape(entry, where) -> Shape:
    if not isinstance(entry, dict):
        raise TwinrayInputError(f"{where} must be a table")
    kind = entry.get("type")
    if kind not in SHAPE_TYPES:
        raise TwinrayInputError(f"{where}.type must be one of {', '.join(SHAPE_TYPES)}, got {kind!r}")
    unknown = set(entry) - _SHAPE_KEYS[kind]
    if unknown:
        raise TwinrayInputError(f"{where}: unknown key(s) {', '.join(sorted(unknown))} for a {kind}")
    name = str(entry.get("name", f"{kind}"))
    centre = _vector(entry.get("centre_mm", [0.0, 0.0, 0.0]), f"{where}.centre_mm")
    if "activity_bq_per_ml" not in entry:
        raise TwinrayInputError(f"{where}: missing key 'activity_bq_per_ml'")
    activity = _number(entry["activity_bq_per_ml"], f"{where}.activity_bq_per_ml", minimum=0.0)
    mu = _number(entry.get("mu_per_cm", 0.0), f"{where}.mu_per_cm", minimum=0.0)
    rotation = math.radians(_number(entry.get("rotation_deg", 0.0), f"{where}.rotation_deg"))

    def need(key):
        if key not in entry:
            raise TwinrayInputError(f"{where}: missing key '{key}' for a {kind}")
        return entry[key]

    if kind == "cylinder":
        r = _number(need("radius_mm"), f"{where}.radius_mm", positive=True)
        half = 0.5 * _number(need("length_mm"), f"{where}.length_mm", positive=True)
        extents = (r, r, half)
    elif kind == "sphere":
        r = _number(need("radius_mm"), f"{where}.radius_mm", positive=True)
        extents = (r, r, r)
    elif kind == "ellipsoid":
        extents = _vector(need("semi_axes_mm"), f"{where}.semi_axes_mm", positive=True)
    else:
        extents = tuple(0.5 * s for s in _vector(need("size_mm"), f"{where}.size_mm", positive=True))
    tac_t = tac_v = None
    if "tac" in entry:
        tac_t, tac_v = _parse_tac(entry["tac"], f"{where}.tac")
    return Shape(name, kind, centre, extents, rotation, activity, mu, tac_t, tac_v)


def _parse_physics(table, where) -> PhysicsOptions:
    if not isinstance(table, dict):
        raise TwinrayInputError(f"{where} must be a table")
    unknown = set(table) - set(_PHYSICS_TYPES)
    if unknown:
        raise TwinrayInputError(f"{where}: unknown key(s) {', '.join(sorted(unknown))}")
    values = {}
    defaults = PhysicsOptions()
    for key, value in table.items():
        default = getattr(defaults, key)
        if isinstance(default, bool):
            if not isinstance(value, bool):
                raise TwinrayInputError(f"{where}.{key} must be true or false, got {value!r}")
        elif key == "efficiency_file":
            if not isinstance(value, str):
                raise TwinrayInputError(f"{where}.{key} must be a file name, got {value!r}")
        else:
            value = _number(value, f"{where}.{key}", minimum=0.0)
        values[key] = value
    return check_physics(dataclasses.replace(defaults, **values), where)


def check_physics(physics: PhysicsOptions, where: str = "physics") -> PhysicsOptions:
    """Check the ranges of the physics parameters; returns ``physics``."""
    if not 0.0 < physics.intrinsic_efficiency <= 1.0:
        raise TwinrayInputError(f"{where}.intrinsic_efficiency must be in (0, 1], got {physics.intrinsic_efficiency:g}")
    if not physics.lld_kev < physics.uld_kev:
        raise TwinrayInputError(f"{where}: lld_kev must be below uld_kev")
    if physics.energy_resolution_fwhm < 0 or physics.efficiency_spread < 0:
        raise TwinrayInputError(f"{where}: energy_resolution_fwhm and efficiency_spread must be >= 0")
    return physics


def _find_scanner(value, phantom_path: Path, where) -> Path:
    if not isinstance(value, str):
        raise TwinrayInputError(f"{where} must be a file name, got {value!r}")
    here = phantom_path.parent
    candidates = [here / value, here.parent / value, Path(__file__).resolve().parents[1] / "configs" / value]
    for candidate in candidates:
        if candidate.is_file():
            return candidate
    raise TwinrayInputError(f"{where}: scanner file {value!r} not found next to the phantom or under configs/")


def load_phantom(path) -> Phantom:
    """Read and check a phantom TOML file.

    Parameters
    ----------
    path : path-like

    Returns
    -------
    Phantom

    Raises
    ------
    TwinrayInputError
        On an unknown key, a missing or impossible value (negative activity,
        a non-increasing time-activity curve) or an unknown isotope; the
        message names the file and the key.
    """
    path = Path(path)
    if not path.is_file():
        raise TwinrayInputError(f"phantom file {path} does not exist")
    try:
        data = tomllib.loads(path.read_text(encoding="utf-8"))
    except (tomllib.TOMLDecodeError, UnicodeDecodeError) as exc:
        raise TwinrayInputError(f"phantom file {path} is not valid TOML: {exc}") from None
    src = str(path)
    unknown = set(data) - _TOP_KEYS
    if unknown:
        raise TwinrayInputError(f"{src}: unknown key(s) {', '.join(sorted(unknown))}")
    if "isotope" not in data:
        raise TwinrayInputError(f"{src}: missing key 'isotope'")
    isotope = get_isotope(str(data["isotope"]), where=f"{src} key 'isotope'").name
    shapes = data.get("shape", [])
    if not isinstance(shapes, list):
        raise TwinrayInputError(f"{src}: 'shape' must be an array of tables ([[shape]])")
    parsed = tuple(_parse_shape(s, f"{src} shape[{i}]") for i, s in enumerate(shapes))
    voxel_activity = voxel_mu = None
    if "voxel" in data:
        vox = data["voxel"]
        if not isinstance(vox, dict):
            raise TwinrayInputError(f"{src}: 'voxel' must be a table")
        unknown = set(vox) - {"activity", "mu"}
        if unknown:
            raise TwinrayInputError(f"{src} [voxel]: unknown key(s) {', '.join(sorted(unknown))}")
        if "activity" not in vox:
            raise TwinrayInputError(f"{src} [voxel]: missing key 'activity'")
        voxel_activity = path.parent / str(vox["activity"])
        if not voxel_activity.is_file():
            raise TwinrayInputError(f"{src} [voxel].activity: {voxel_activity} does not exist")
        if "mu" in vox:
            voxel_mu = path.parent / str(vox["mu"])
            if not voxel_mu.is_file():
                raise TwinrayInputError(f"{src} [voxel].mu: {voxel_mu} does not exist")
    if parsed and voxel_activity is not None:
        raise TwinrayInputError(f"{src}: give either [[shape]] tables or a [voxel] table, not both")
    if not parsed and voxel_activity is None:
        raise TwinrayInputError(f"{src}: no [[shape]] tables and no [voxel] table: the phantom is empty")
    if parsed and all(s.activity_bq_per_ml == 0 for s in parsed):
        raise TwinrayInputError(f"{src}: every shape has activity_bq_per_ml = 0")

    scanner_path = _find_scanner(data["scanner"], path, f"{src} key 'scanner'") if "scanner" in data else None
    duration = _number(data["duration_s"], f"{src} key 'duration_s'", positive=True) if "duration_s" in data else None
    start = _iso_time(data["acquisition_start"], f"{src} key 'acquisition_start'") \
        if "acquisition_start" in data else None
    injection = _iso_time(data["injection_time"], f"{src} key 'injection_time'") \
        if "injection_time" in data else None
    injected = _number(data["injected_activity_bq"], f"{src} key 'injected_activity_bq'", minimum=0.0) \
        if "injected_activity_bq" in data else None
    norm = None
    if "normalization_source" in data:
        norm = _parse_norm_source(data["normalization_source"], f"{src} key 'normalization_source'")
    physics = _parse_physics(data.get("physics", {}), f"{src} [physics]")
    return Phantom(
        name=str(data.get("name", path.stem)), path=path, isotope=isotope, shapes=parsed,
        voxel_activity=voxel_activity, voxel_mu=voxel_mu, scanner_path=scanner_path, duration_s=duration,
        acquisition_start=start, injection_time=injection, injected_activity_bq=injected,
        normalization_source=norm, physics=physics,
    )


def _parse_norm_source(value, where) -> dict:
    if not isinstance(value, dict):
        raise TwinrayInputError(f"{where} must be a table {{ shape, radius_mm, mu_per_cm }}")
    unknown = set(value) - {"shape", "radius_mm", "mu_per_cm"}
    if unknown:
        raise TwinrayInputError(f"{where}: unknown key(s) {', '.join(sorted(unknown))}")
    if value.get("shape") not in _NORM_SHAPES:
        raise TwinrayInputError(f"{where}.shape must be one of {', '.join(_NORM_SHAPES)}")
    return {
        "shape": value["shape"],
        "radius_mm": _number(value.get("radius_mm"), f"{where}.radius_mm", positive=True),
        "mu_per_cm": _number(value.get("mu_per_cm", 0.0), f"{where}.mu_per_cm", minimum=0.0),
    }


def check_phantom_in_fov(phantom: Phantom, scanner) -> None:
    """Raise unless every shape lies inside the detector ring and overlaps the axial extent.

    A shape may reach beyond the axial extent (its photons there are lost or
    add singles), but not beyond the ring radius.
    """
    half = 0.5 * scanner.axial_length_mm
    for i, shape in enumerate(phantom.shapes):
        where = f"{phantom.path} shape[{i}] ({shape.name})"
        reach = shape.max_transaxial_radius_mm()
        if reach >= scanner.radius_mm:
            raise TwinrayInputError(
                f"{where} is outside the field of view: it reaches {reach:.1f} mm from the axis, "
                f"the detector ring radius is {scanner.radius_mm:g} mm")
        z0, z1 = shape.z_range_mm()
        if z1 <= -half or z0 >= half:
            raise TwinrayInputError(
                f"{where} is outside the field of view: z {z0:g}..{z1:g} mm, "
                f"the rings cover {-half:g}..{half:g} mm")


def visible_volumes_ml(shapes, samples: int = 200_000) -> np.ndarray:
    """Volume of each shape not covered by later shapes, mL (Monte Carlo, fixed seed).

    The relative standard error is about sqrt((1 - f) / (f * samples)) for a
    visible fraction f; exact for shapes no later shape touches.
    """
    rng = np.random.default_rng(12345)
    out = np.empty(len(shapes))
    for i, shape in enumerate(shapes):
        later = shapes[i + 1:]
        if not later:
            out[i] = shape.volume_ml
            continue
        x, y, z = _uniform_in_shape(shape, samples, rng)
        covered = np.zeros(samples, dtype=bool)
        for other in later:
            covered |= other.contains(x, y, z)
        out[i] = shape.volume_ml * (1.0 - covered.mean())
    return out


def _uniform_in_shape(shape: Shape, n, rng):
    a, b, c = shape.half_extents_mm
    pts = []
    have = 0
    while have < n:
        u = rng.uniform(-a, a, 2 * n)
        v = rng.uniform(-b, b, 2 * n)
        w = rng.uniform(-c, c, 2 * n)
        if shape.kind == "cylinder":
            keep = (u / a) ** 2 + (v / b) ** 2 <= 1
        elif shape.kind in ("sphere", "ellipsoid"):
            keep = (u / a) ** 2 + (v / b) ** 2 + (w / c) ** 2 <= 1
        else:
            keep = np.ones_like(u, dtype=bool)
        pts.append((u[keep], v[keep], w[keep]))
        have += int(keep.sum())
    u, v, w = (np.concatenate([p[k] for p in pts])[:n] for k in range(3))
    cr, sr = math.cos(shape.rotation_rad), math.sin(shape.rotation_rad)
    cx, cy, cz = shape.centre_mm
    return cx + u * cr - v * sr, cy + u * sr + v * cr, cz + w


def label_image(shapes, shape, affine) -> np.ndarray:
    """Which shape holds each voxel centre: 0 for none, ``i + 1`` for shape ``i`` (topmost wins)."""
    nx, ny, nz = shape
    x = affine[0, 0] * np.arange(nx) + affine[0, 3]
    y = affine[1, 1] * np.arange(ny) + affine[1, 3]
    z = affine[2, 2] * np.arange(nz) + affine[2, 3]
    gx, gy, gz = np.meshgrid(x, y, z, indexing="ij")
    labels = np.zeros(shape, dtype=np.int16)
    for i, s in enumerate(shapes):
        labels[s.contains(gx, gy, gz)] = i + 1
    return labels


def rasterize(shapes, shape, affine, time_s: float | None = 0.0, supersample: int = 4) -> tuple:
    """Activity (Bq/mL) and mu (1/cm) images of an analytic phantom.

    Each voxel holds the mean over ``supersample**3`` points spread evenly in
    it (partial-volume averaging; an even ``supersample`` keeps the points off
    voxel centres, where shape boundaries often fall), with the replacement rule of overlapping
    shapes. Activity includes the time-activity curve at ``time_s`` (or the
    reference concentration, multiplier 1, when ``time_s`` is None) but not
    radioactive decay.

    Parameters
    ----------
    shapes : sequence of Shape
    shape : tuple of int
        ``(nx, ny, nz)``.
    affine : ndarray, shape (4, 4)
        Axis-aligned voxel index -> scanner-frame mm.
    """
    nx, ny, nz = shape
    activity = np.zeros(shape, dtype=np.float64)
    mu = np.zeros(shape, dtype=np.float64)
    offsets = (np.arange(supersample) + 0.5) / supersample - 0.5
    ix, iy = np.meshgrid(np.arange(nx, dtype=float), np.arange(ny, dtype=float), indexing="ij")
    conc = [s.activity_bq_per_ml * (1.0 if time_s is None else float(s.tac(time_s))) for s in shapes]
    for iz in range(nz):
        for ox in offsets:
            for oy in offsets:
                x = affine[0, 0] * (ix + ox) + affine[0, 3]
                y = affine[1, 1] * (iy + oy) + affine[1, 3]
                for oz in offsets:
                    z = np.full_like(x, affine[2, 2] * (iz + oz) + affine[2, 3])
                    act = np.zeros_like(x)
                    att = np.zeros_like(x)
                    for s, value in zip(shapes, conc):
                        inside = s.contains(x, y, z)
                        act[inside] = value
                        att[inside] = s.mu_per_cm
                    activity[:, :, iz] += act
                    mu[:, :, iz] += att
    n = supersample ** 3
    return activity / n, mu / n
