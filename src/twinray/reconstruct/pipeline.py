"""From a sinogram file to an image file: the library under ``twinray reconstruct``.

:func:`reconstruct_arrays` works on the arrays and geometry of one frame
(plain, picklable inputs, no global state: the dynamic and resampling code
calls it once per frame or replicate, in parallel); :func:`reconstruct_file`
reads a sinogram file, calls it and writes the NIfTI image and sidecar.

What each method uses from the file (data contract section 3, cli.md):

* **FBP** reconstructs the stored ``corrected`` array. A file without it
  but also without any correction dataset (no ``norm``, ``acf``,
  ``randoms``, ``scatter``) has ``corrected == prompts`` by definition, so
  the prompts are used, with a warning; a file with correction datasets but
  no ``corrected`` is refused (twinray does not redo the corrections here).
* **OSEM** models the stored ``prompts`` with the stored ``norm``, ``acf``,
  ``randoms`` and ``scatter`` (absent ones count as 1 and 0).

No factor that is not stored in the file is applied, except the decay
correction factor the file carries as the root attribute
``decay_correction_factor`` (the image is multiplied by it and marked
``ImageDecayCorrected``) and an explicit calibration factor.

TOF sinograms (a leading TOF axis) are summed over TOF: the reconstruction
is non-TOF.
"""

from __future__ import annotations

import dataclasses
import math
import time
from pathlib import Path

import numpy as np

from ..atomic import refuse_overwriting_inputs
from ..errors import TwinrayInputError
from ..geometry import SinogramGeometry
from ..images import centred_affine, write_image
from ..projectors import ImageGrid, plane_geometry_2d, projection_geometry
from .fbp import fbp
from .filters import FILTERS
from .grid import reconstruction_grid, transaxial_fov_radius_mm
from .osem import osem
from .rebin import rebinned_planes, ssrb_sum
from .units import CALIBRATED_UNITS, UNCALIBRATED_UNITS, lor_ml_per_mm

METHODS = ("fbp", "osem")
MODES = ("3d", "2d")
_FWHM_PER_SIGMA = 2.0 * math.sqrt(2.0 * math.log(2.0))


@dataclasses.dataclass(frozen=True)
class ReconOptions:
    """How to reconstruct (the ``twinray reconstruct`` options).

    Attributes
    ----------
    method : {"fbp", "osem"}
    iterations, subsets : int
        OSEM only; ``subsets=1`` is MLEM.
    filter_name : str
        FBP apodization window (``filters.FILTERS``).
    cutoff : float
        FBP window cutoff, fraction of Nyquist (0, 1].
    matrix : int or None
        Transaxial voxels; default covers the field of view.
    voxel_mm : float or None
        Transaxial voxel size, mm.
    mode : {"3d", "2d"}
        OSEM: ``"3d"`` models every stored (oblique) plane; ``"2d"`` first
        rebins by SSRB and reconstructs plane by plane (fast path). FBP is
        always 2-D after SSRB.
    postfilter_fwhm_mm : float
        Gaussian post-filter FWHM, mm (0 = none).
    calibration_bq_per_ml : float or None
        Bq/mL per counts/s/mL; when given the image is in Bq/mL.
    calibration_source : str or None
        Where the calibration came from (recorded in the sidecar).
    """

    method: str = "osem"
    iterations: int = 3
    subsets: int = 8
    filter_name: str = "ramp"
    cutoff: float = 1.0
    matrix: int | None = None
    voxel_mm: float | None = None
    mode: str = "3d"
    postfilter_fwhm_mm: float = 0.0
    calibration_bq_per_ml: float | None = None
    calibration_source: str | None = None

    def __post_init__(self):
        if self.method not in METHODS:
            raise TwinrayInputError(f"unknown --method '{self.method}'; choose fbp or osem")
        if self.mode not in MODES:
            raise TwinrayInputError(f"unknown --mode '{self.mode}'; choose 3d or 2d")
        if self.filter_name not in FILTERS:
            raise TwinrayInputError(f"unknown --filter '{self.filter_name}'; choose one of {', '.join(FILTERS)}")
        if not (0.0 < self.cutoff <= 1.0):
            raise TwinrayInputError(f"--cutoff must be a fraction of Nyquist in (0, 1], got {self.cutoff}")
        if self.iterations < 1 or self.subsets < 1:
            raise TwinrayInputError("--iterations and --subsets must be at least 1")
        if not (self.postfilter_fwhm_mm >= 0 and math.isfinite(self.postfilter_fwhm_mm)):
            raise TwinrayInputError(f"--postfilter-mm must be >= 0, got {self.postfilter_fwhm_mm}")
        if self.calibration_bq_per_ml is not None and not (
                self.calibration_bq_per_ml > 0 and math.isfinite(self.calibration_bq_per_ml)):
            raise TwinrayInputError(f"calibration factor must be a positive number, got {self.calibration_bq_per_ml}")


@dataclasses.dataclass(frozen=True, eq=False)
class ReconstructedImage:
    """A reconstructed frame.

    Attributes
    ----------
    image : ndarray of float32, shape (nz, ny, nx)
        Indexed ``[z, y, x]``; :meth:`nifti_data` gives ``(x, y, z)``.
    grid : ImageGrid
    sidecar : dict
        BIDS PET keys and the ``twinray`` object.
    warnings : tuple of str
    timings_s : dict
    """

    image: np.ndarray
    grid: ImageGrid
    sidecar: dict
    warnings: tuple = ()
    timings_s: dict = dataclasses.field(default_factory=dict)

    def nifti_data(self) -> np.ndarray:
        """The image as NIfTI axes ``(x, y, z)``."""
        return np.ascontiguousarray(self.image.transpose(2, 1, 0))

    def affine(self) -> np.ndarray:
        """Voxel index -> scanner-frame mm."""
        g = self.grid
        return centred_affine((g.nx, g.ny, g.nz), (g.voxel_mm, g.voxel_mm, g.slice_spacing_mm),
                              z_positions_mm=g.slice_z_mm)

    @property
    def units(self) -> str:
        return self.sidecar["Units"]


def _non_tof(name: str, array, warnings: list, additive: bool) -> np.ndarray:
    """Sum count-like datasets over a leading TOF axis; factors must not depend on TOF."""
    a = np.asarray(array)
    if a.ndim == 3:
        return a
    if a.ndim != 4:
        raise TwinrayInputError(f"dataset {name} has {a.ndim} axes; expected (plane, view, radial) or with TOF first")
    if additive:
        if not any("TOF" in w for w in warnings):
            warnings.append("TOF bins were summed: the reconstruction does not use TOF")
        return a.sum(axis=0)
    if not np.allclose(a, a[:1]):
        raise TwinrayInputError(f"dataset {name} varies over the TOF axis; a per-LOR factor was expected")
    return a[0]


def _multiplicative_factor(arrays: dict, shape, warnings: list) -> np.ndarray:
    """``1/(norm*acf)`` per LOR; 0 for LORs whose factor is 0, negative or not finite."""
    product = np.ones(shape, dtype=np.float64)
    for name in ("norm", "acf"):
        if name in arrays:
            product = product * _non_tof(name, arrays[name], warnings, additive=False)
    usable = np.isfinite(product) & (product > 0)
    if not usable.all():
        warnings.append(f"{int((~usable).sum())} LORs with a zero, negative or invalid norm*acf are left out")
    return np.divide(1.0, product, out=np.zeros(shape), where=usable)


def _postfilter(image: np.ndarray, grid: ImageGrid, fwhm_mm: float) -> np.ndarray:
    if fwhm_mm <= 0:
        return image
    from scipy.ndimage import gaussian_filter

    sigma_mm = fwhm_mm / _FWHM_PER_SIGMA
    sigma = (sigma_mm / grid.slice_spacing_mm if grid.nz > 1 else 0.0,
             sigma_mm / grid.voxel_mm, sigma_mm / grid.voxel_mm)
    return gaussian_filter(image, sigma=sigma, mode="constant")


def _outside_fov(grid: ImageGrid, radius_mm: float) -> np.ndarray:
    x, y = grid.x_mm()[None, :], grid.y_mm()[:, None]
    return (x ** 2 + y ** 2) > radius_mm ** 2


def reconstruct_arrays(arrays: dict, geometry: SinogramGeometry, frame_start_s: float, frame_duration_s: float,
                       options: ReconOptions, *, attrs: dict | None = None, accounting=None,
                       progress=None, where: str = "sinogram") -> ReconstructedImage:
    """Reconstruct one frame from its sinogram datasets.

    Parameters
    ----------
    arrays : dict of str to ndarray
        Datasets of the data contract (``prompts``, ``corrected``, ``norm``,
        ``acf``, ``randoms``, ``scatter``), each ``(plane, view, radial)``.
    geometry : SinogramGeometry
        Layout of the arrays; view angles, radial positions, plane z and
        ring differences, ring radius and pitch are all taken from it.
    frame_start_s, frame_duration_s : float
        The frame, s from acquisition start (duration > 0).
    options : ReconOptions
    attrs : dict, optional
        Root attributes of the file (``decay_correction_factor``,
        ``isotope`` are used).
    accounting : Accounting, optional
        Copied into the sidecar.
    progress : callable, optional
        Called with 1 after every OSEM sub-iteration.
    where : str
        Name of the input, for error messages.

    Returns
    -------
    ReconstructedImage
    """
    attrs = attrs or {}
    warnings: list = []
    timings: dict = {}
    started = time.perf_counter()
    if not (frame_duration_s > 0 and math.isfinite(frame_duration_s)):
        raise TwinrayInputError(f"{where}: frame_duration_s is {frame_duration_s}; a positive duration is needed "
                                "to express the image per second")
    scanner = geometry.scanner
    k_ml_per_mm = lor_ml_per_mm(geometry.radial_positions_mm, scanner.axial_pitch_mm)
    slice_z, _ = rebinned_planes(geometry.plane_z_mm)
    grid = reconstruction_grid(geometry.radial_positions_mm, slice_z, options.matrix, options.voxel_mm)
    has_acf = "acf" in arrays
    sidecar_method: dict

    if options.method == "fbp":
        if "corrected" in arrays:
            corrected = _non_tof("corrected", arrays["corrected"], warnings, additive=True)
            data_used = "corrected"
        elif not any(n in arrays for n in ("norm", "acf", "randoms", "scatter")) and "prompts" in arrays:
            corrected = _non_tof("prompts", arrays["prompts"], warnings, additive=True)
            data_used = "prompts (no corrections stored)"
            warnings.append(f"{where} has no 'corrected' dataset and no corrections; FBP of the raw prompts "
                            "(no normalization, attenuation, randoms or scatter correction)")
        else:
            raise TwinrayInputError(f"{where} has no 'corrected' dataset; FBP reconstructs corrected data "
                                    "(write it with 'twinray sinogram') or use --method osem")
        line_integrals = np.asarray(corrected, dtype=np.float64) / (frame_duration_s * k_ml_per_mm)
        image = fbp(line_integrals, geometry.view_angles_rad, geometry.radial_positions_mm, geometry.plane_z_mm,
                    grid, options.filter_name, options.cutoff)
        image[:, _outside_fov(grid, transaxial_fov_radius_mm(geometry.radial_positions_mm))] = 0.0
        sidecar_method = {
            "ReconMethodName": "FBP",
            "ReconMethodParameterLabels": ["filter_cutoff"],
            "ReconMethodParameterUnits": ["fraction of Nyquist"],
            "ReconMethodParameterValues": [options.cutoff],
            "ReconFilterType": options.filter_name,
            "ReconFilterSize": options.cutoff,
            "AttenuationCorrection": ("measured attenuation correction factors (acf) applied in the corrected data"
                                      if has_acf else "none: the sinogram file has no acf dataset"),
        }
        method_detail = {"data": data_used, "rebinning": "SSRB (planes of equal z averaged)",
                         "arc_correction": "linear interpolation to the centre radial spacing"}
    else:
        if "prompts" not in arrays:
            raise TwinrayInputError(f"{where} has no 'prompts' dataset; OSEM models the measured prompts")
        prompts = np.asarray(_non_tof("prompts", arrays["prompts"], warnings, additive=True), dtype=np.float64)
        shape = prompts.shape
        mult = _multiplicative_factor(arrays, shape, warnings) * (frame_duration_s * k_ml_per_mm)
        additive = np.zeros(shape)
        for name in ("randoms", "scatter"):
            if name in arrays:
                additive += _non_tof(name, arrays[name], warnings, additive=True)
        if np.any(additive < 0):
            warnings.append(f"{int((additive < 0).sum())} LORs with a negative randoms+scatter estimate "
                            "were set to 0 in the model")
            additive = np.maximum(additive, 0.0)
        if np.any(prompts < 0):
            raise TwinrayInputError(f"{where}: prompts must be non-negative counts")
        if not prompts.any():
            warnings.append(f"{where} has no prompts in this frame; the image is zero")
        if options.mode == "2d":
            prompts, _ = ssrb_sum(prompts, geometry.plane_z_mm)
            mult, _ = ssrb_sum(mult, geometry.plane_z_mm)
            additive, _ = ssrb_sum(additive, geometry.plane_z_mm)
            geom = plane_geometry_2d(geometry.view_angles_rad, geometry.radial_positions_mm, scanner.radius_mm, grid)
        else:
            ends = geometry.axial_endpoints_mm()
            geom = projection_geometry(geometry.view_angles_rad, geometry.radial_positions_mm, scanner.radius_mm,
                                       ends[:, 0], ends[:, 1], grid)
        callback = (lambda it, m, x: progress(1)) if progress is not None else None
        image = osem(prompts, geom, mult, additive, iterations=options.iterations, subsets=options.subsets,
                     callback=callback)
        name = "MLEM" if options.subsets == 1 else "OSEM"
        sidecar_method = {
            "ReconMethodName": f"{name} (ordinary Poisson)",
            "ReconMethodParameterLabels": ["iterations", "subsets"],
            "ReconMethodParameterUnits": ["none", "none"],
            "ReconMethodParameterValues": [options.iterations, options.subsets],
            "ReconFilterType": "Gaussian" if options.postfilter_fwhm_mm > 0 else "none",
            "ReconFilterSize": options.postfilter_fwhm_mm,
            "AttenuationCorrection": ("measured attenuation correction factors (acf) in the Poisson model"
                                      if has_acf else "none: the sinogram file has no acf dataset"),
        }
        method_detail = {"data": "prompts", "mode": options.mode,
                         "model": "E[prompts] = T*k*(A x)/(norm*acf) + randoms + scatter",
                         "in_model": [n for n in ("norm", "acf", "randoms", "scatter") if n in arrays],
                         "projector": "Joseph (1982), matched back projector",
                         "subsets": "interleaved views"}
    image = _postfilter(np.asarray(image, dtype=np.float64), grid, options.postfilter_fwhm_mm)

    dcf = attrs.get("decay_correction_factor")
    decay_corrected = dcf is not None
    if decay_corrected:
        dcf = float(dcf)
        if not (dcf > 0 and math.isfinite(dcf)):
            raise TwinrayInputError(f"{where}: decay_correction_factor is {dcf}, not a positive number")
        image = image * dcf
    units = UNCALIBRATED_UNITS
    if options.calibration_bq_per_ml is not None:
        image = image * options.calibration_bq_per_ml
        units = CALIBRATED_UNITS
    timings["reconstruct"] = round(time.perf_counter() - started, 4)

    sidecar = {
        "Units": units,
        "FrameTimesStart": [float(frame_start_s)],
        "FrameDuration": [float(frame_duration_s)],
        "ImageDecayCorrected": decay_corrected,
        **sidecar_method,
    }
    if decay_corrected:
        sidecar["DecayCorrectionFactor"] = [dcf]
        # Decay correction refers to the acquisition start (data contract s.6) unless the file says otherwise.
        sidecar["ImageDecayCorrectionTime"] = float(attrs.get("decay_reference_s", 0.0))
    if isinstance(attrs.get("isotope"), str):
        sidecar["TracerRadionuclide"] = attrs["isotope"]
    sidecar["twinray"] = {
        "accounting": accounting.to_dict() if accounting is not None else None,
        "method": options.method,
        **method_detail,
        "units_meaning": (f"{UNCALIBRATED_UNITS}: counts per second, after normalization and attenuation "
                          "correction, per mL inside a nominal LOR tube (radial spacing at the centre x ring "
                          "pitch); use 'twinray calibrate' for Bq/mL"),
        "lor_ml_per_mm": k_ml_per_mm,
        "calibration_bq_per_ml_per_unit": options.calibration_bq_per_ml,
        "calibration_source": options.calibration_source,
        "voxel_mm": [grid.voxel_mm, grid.voxel_mm, grid.slice_spacing_mm],
        "matrix": [grid.nx, grid.ny, grid.nz],
        "acquisition_start": attrs.get("acquisition_start"),
    }
    return ReconstructedImage(image=image.astype(np.float32), grid=grid, sidecar=sidecar,
                              warnings=tuple(warnings), timings_s=timings)


def reconstruct_sinogram_file(path, options: ReconOptions, progress=None) -> ReconstructedImage:
    """Read a sinogram file and reconstruct it (see :func:`reconstruct_arrays`)."""
    from ..sinogram_io import read_sinogram_file

    wanted = ("corrected", "prompts", "norm", "acf") if options.method == "fbp" else \
        ("prompts", "norm", "acf", "randoms", "scatter")
    sino = read_sinogram_file(path, datasets=wanted)
    result = reconstruct_arrays(sino.arrays, sino.geometry, sino.frame_start_s, sino.frame_duration_s, options,
                                attrs=sino.attrs, accounting=sino.accounting, progress=progress, where=str(path))
    result.sidecar["twinray"]["source"] = str(path)
    return result


def reconstruct_file(path, output, options: ReconOptions, progress=None) -> dict:
    """``twinray reconstruct``: sinogram file in, NIfTI image and JSON sidecar out.

    Returns
    -------
    dict
        ``outputs`` (paths written), ``accounting`` (of the sinogram),
        ``warnings``, ``timings_s``, ``units``, ``shape``, ``voxel_mm``.
    """
    output = Path(output)
    refuse_overwriting_inputs(output, [path])
    if not (output.name.endswith(".nii") or output.name.endswith(".nii.gz")):
        raise TwinrayInputError(f"image output {output} must end in .nii or .nii.gz")
    result = reconstruct_sinogram_file(path, options, progress=progress)
    started = time.perf_counter()
    written = write_image(output, result.nifti_data(), result.affine(), result.sidecar)
    timings = {**result.timings_s, "write": round(time.perf_counter() - started, 4)}
    return {
        "outputs": [str(p) for p in written],
        "accounting": result.sidecar["twinray"]["accounting"],
        "warnings": list(result.warnings),
        "timings_s": timings,
        "units": result.units,
        "shape": [result.grid.nx, result.grid.ny, result.grid.nz],
        "voxel_mm": [result.grid.voxel_mm, result.grid.voxel_mm, result.grid.slice_spacing_mm],
    }
