"""Calibration: Bq/mL per image unit, from a scan of a uniform cylinder.

A cylinder filled with a known activity concentration ``C_ref`` (Bq/mL at a
reference time) is scanned and reconstructed in counts/s/mL. The factor is::

    F = C_expected / mean(image in a central region)

``C_expected`` is what the image should show: the concentration decayed from
the reference time to the acquisition start,
``C_start = C_ref * exp(-lambda * (t_start - t_ref))``, and then

* for a decay-corrected image: the concentration at its decay-correction
  time ``t_dc`` (sidecar ``ImageDecayCorrectionTime``, s from the
  acquisition start; 0 when absent), ``C_start * exp(-lambda * t_dc)``;
* otherwise the frame's average, ``C_start / DCF`` with
  ``DCF = lambda*dt/(1 - exp(-lambda*dt)) * exp(lambda*t0)`` (``decay.py``).

The central region is a cylinder on the object's axis: its radius is 60% of
the object's radius (found as the equivalent-circle radius of the voxels
above half the central level), avoiding the edge blur; the first and last
slices (lowest sensitivity, most noise) are left out. Both can be set.
Common practice for uniform-phantom calibration (the NEMA NU 2 image
quality test uses central regions of the same kind; references.md s.4).
"""

from __future__ import annotations

import dataclasses
import datetime as _dt
import json
import math
from pathlib import Path

import numpy as np

from ..atomic import atomic_path, refuse_overwriting_inputs
from ..errors import TwinrayInputError
from ..images import read_image, voxel_centres_mm
from .units import UNCALIBRATED_UNITS

#: Key of the factor in a calibration file.
FACTOR_KEY = "bq_per_ml_per_unit"


@dataclasses.dataclass(frozen=True)
class Calibration:
    """The result of :func:`derive_calibration` (written as JSON)."""

    bq_per_ml_per_unit: float
    image_units: str
    concentration_bq_per_ml: float
    reference_time: str | None
    expected_image_bq_per_ml: float
    roi_mean: float
    roi_std: float
    roi_voxels: int
    roi_centre_mm: tuple
    roi_radius_mm: float
    object_radius_mm: float
    slices_used: tuple
    isotope: str | None
    image_decay_corrected: bool
    source_image: str

    def to_dict(self) -> dict:
        d = dataclasses.asdict(self)
        d["roi_centre_mm"] = list(self.roi_centre_mm)
        d["slices_used"] = list(self.slices_used)
        d["meaning"] = f"multiply an image in {self.image_units} by {FACTOR_KEY} to get Bq/mL"
        return d


def _parse_time(text: str, what: str) -> _dt.datetime:
    try:
        t = _dt.datetime.fromisoformat(str(text).replace("Z", "+00:00"))
    except ValueError:
        raise TwinrayInputError(f"{what} {text!r} is not an ISO 8601 date-time") from None
    return t if t.tzinfo else t.replace(tzinfo=_dt.timezone.utc)


def central_region(image_xyz: np.ndarray, affine: np.ndarray, roi_radius_mm: float | None = None,
                   edge_slices: int = 1) -> tuple:
    """The central cylinder region of a uniform-cylinder image.

    Parameters
    ----------
    image_xyz : ndarray, shape (x, y, z)
    affine : ndarray (4, 4)
    roi_radius_mm : float, optional
        Default 60% of the object's equivalent-circle radius.
    edge_slices : int
        Slices left out at each axial end.

    Returns
    -------
    mask : ndarray of bool, shape of the image
    info : dict
        ``centre_mm``, ``roi_radius_mm``, ``object_radius_mm``, ``slices``.
    """
    nz = image_xyz.shape[2]
    if edge_slices < 0 or nz - 2 * edge_slices < 1:
        raise TwinrayInputError(f"cannot leave out {edge_slices} slices at each end of an image with {nz} slices")
    slices = np.arange(edge_slices, nz - edge_slices)
    x, y, _ = voxel_centres_mm(image_xyz.shape, affine)
    mean_slice = image_xyz[:, :, slices].mean(axis=2)
    X, Y = np.meshgrid(x, y, indexing="ij")
    centre_level = np.median(mean_slice[(X ** 2 + Y ** 2) <= np.percentile(X ** 2 + Y ** 2, 2)])
    if not centre_level > 0:
        raise TwinrayInputError("the image has no activity at the centre; is it a centred uniform cylinder?")
    obj = mean_slice > 0.5 * centre_level
    voxel_area = abs(affine[0, 0] * affine[1, 1])
    object_radius = math.sqrt(obj.sum() * voxel_area / math.pi)
    cx = float((X * obj).sum() / obj.sum())
    cy = float((Y * obj).sum() / obj.sum())
    radius = 0.6 * object_radius if roi_radius_mm is None else float(roi_radius_mm)
    if not radius > 0:
        raise TwinrayInputError(f"region radius must be positive, got {radius}")
    disc = ((X - cx) ** 2 + (Y - cy) ** 2) <= radius ** 2
    if disc.sum() == 0:
        raise TwinrayInputError(f"a region of radius {radius:g} mm holds no voxel centre")
    mask = np.zeros(image_xyz.shape, dtype=bool)
    mask[:, :, slices] = disc[:, :, None]
    return mask, {"centre_mm": (cx, cy), "roi_radius_mm": radius, "object_radius_mm": object_radius,
                  "slices": tuple(int(s) for s in slices)}


def expected_image_value(concentration_bq_per_ml: float, sidecar: dict, *, reference_time: str | None = None,
                         acquisition_start: str | None = None, isotope: str | None = None) -> float:
    """What a calibrated image of the cylinder should show, Bq/mL (see the module notes)."""
    from ..decay import frame_decay_factor
    from ..isotopes import half_life_s

    start = float(sidecar.get("FrameTimesStart", [0.0])[0])
    duration = float(sidecar.get("FrameDuration", [0.0])[0])
    corrected = bool(sidecar.get("ImageDecayCorrected", False))
    corrected_to_s = float(sidecar.get("ImageDecayCorrectionTime", 0.0) or 0.0) if corrected else 0.0
    needs_decay = reference_time is not None or not corrected or corrected_to_s != 0.0
    if not needs_decay:
        return float(concentration_bq_per_ml)
    if isotope is None:
        raise TwinrayInputError("the radionuclide is unknown (no TracerRadionuclide in the sidecar); give --isotope")
    half_life = half_life_s(isotope)
    lam = math.log(2.0) / half_life
    c_start = float(concentration_bq_per_ml)
    if reference_time is not None:
        if acquisition_start is None:
            raise TwinrayInputError("--reference-time needs the acquisition start; the sidecar has none, "
                                    "give --acquisition-start")
        elapsed = (_parse_time(acquisition_start, "acquisition start")
                   - _parse_time(reference_time, "--reference-time")).total_seconds()
        c_start *= math.exp(-lam * elapsed)
    if corrected:
        return c_start * math.exp(-lam * corrected_to_s)
    return c_start / frame_decay_factor(half_life, start, duration)


def derive_calibration(image_path, concentration_bq_per_ml: float, *, reference_time: str | None = None,
                       acquisition_start: str | None = None, isotope: str | None = None,
                       roi_radius_mm: float | None = None, edge_slices: int = 1) -> Calibration:
    """Calibration factor from a reconstructed uniform cylinder of known concentration.

    Parameters
    ----------
    image_path : path-like
        A twinray image in counts/s/mL (with its JSON sidecar).
    concentration_bq_per_ml : float
        Known activity concentration at ``reference_time`` (default: at the
        acquisition start).
    reference_time, acquisition_start : str, optional
        ISO 8601 date-times; the acquisition start defaults to the sidecar's.
    isotope : str, optional
        Default: the sidecar's ``TracerRadionuclide``.
    roi_radius_mm, edge_slices
        The central region (see :func:`central_region`).

    Returns
    -------
    Calibration
    """
    if not (concentration_bq_per_ml > 0 and math.isfinite(concentration_bq_per_ml)):
        raise TwinrayInputError(f"--concentration must be a positive number of Bq/mL, got {concentration_bq_per_ml}")
    data, affine, sidecar = read_image(image_path, "image")
    if data.ndim != 3:
        raise TwinrayInputError(f"{image_path}: calibration needs a 3-D image, got {data.ndim} axes")
    units = sidecar.get("Units")
    if units != UNCALIBRATED_UNITS:
        raise TwinrayInputError(f"{image_path}: image units are {units!r}; calibrate an uncalibrated image "
                                f"in {UNCALIBRATED_UNITS}")
    isotope = isotope or sidecar.get("TracerRadionuclide")
    acquisition_start = acquisition_start or (sidecar.get("twinray") or {}).get("acquisition_start")
    mask, info = central_region(data, affine, roi_radius_mm, edge_slices)
    values = data[mask].astype(np.float64)
    mean = float(values.mean())
    if not mean > 0:
        raise TwinrayInputError(f"{image_path}: the central region has mean {mean:g}; nothing to calibrate")
    expected = expected_image_value(concentration_bq_per_ml, sidecar, reference_time=reference_time,
                                    acquisition_start=acquisition_start, isotope=isotope)
    return Calibration(
        bq_per_ml_per_unit=expected / mean, image_units=UNCALIBRATED_UNITS,
        concentration_bq_per_ml=float(concentration_bq_per_ml), reference_time=reference_time,
        expected_image_bq_per_ml=expected, roi_mean=mean, roi_std=float(values.std(ddof=1)) if values.size > 1 else 0.0,
        roi_voxels=int(values.size), roi_centre_mm=info["centre_mm"], roi_radius_mm=info["roi_radius_mm"],
        object_radius_mm=info["object_radius_mm"], slices_used=info["slices"], isotope=isotope,
        image_decay_corrected=bool(sidecar.get("ImageDecayCorrected", False)), source_image=str(image_path))


def write_calibration(path, calibration: Calibration, inputs=()) -> Path:
    """Write a calibration JSON file atomically."""
    path = Path(path)
    refuse_overwriting_inputs(path, inputs)
    with atomic_path(path, suffix=".json") as tmp:
        tmp.write_text(json.dumps(calibration.to_dict(), indent=2, sort_keys=True) + "\n")
    return path


def read_calibration(path) -> float:
    """The factor (Bq/mL per counts/s/mL) stored in a calibration file."""
    path = Path(path)
    if not path.is_file():
        raise TwinrayInputError(f"calibration file {path} does not exist")
    try:
        d = json.loads(path.read_text())
    except (json.JSONDecodeError, UnicodeDecodeError):
        raise TwinrayInputError(f"calibration file {path} is not valid JSON") from None
    value = d.get(FACTOR_KEY) if isinstance(d, dict) else None
    if isinstance(value, bool) or not isinstance(value, (int, float)) or not (value > 0 and math.isfinite(value)):
        raise TwinrayInputError(f"calibration file {path}: '{FACTOR_KEY}' must be a positive number")
    return float(value)
