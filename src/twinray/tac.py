"""Time-activity curves of spherical regions in a 4-D (dynamic) image.

A region is a sphere given in scanner-frame millimetres; a voxel belongs to it
when the voxel's centre lies inside (distance <= radius). For every region
and frame the mean, the standard deviation over its voxels (ddof = 0: the
spread of the voxel values, not an error of the mean) and the voxel count are
reported, with the frame start, duration and mid-time from the image's BIDS
sidecar (``FrameTimesStart``, ``FrameDuration``).
"""

from __future__ import annotations

import csv
import dataclasses
import math
import re
from pathlib import Path

import numpy as np

from .atomic import atomic_path
from .errors import TwinrayInputError

#: Okabe & Ito colour-blind-safe palette (Okabe M, Ito K, "Color Universal
#: Design", 2002), without black.
OKABE_ITO = ("#E69F00", "#56B4E9", "#009E73", "#F0E442", "#0072B2", "#D55E00", "#CC79A7", "#000000")

_ROI = re.compile(r"^\s*([^=,\s][^=,]*?)\s*=\s*sphere\s*:\s*(.+)$", re.IGNORECASE)

CSV_COLUMNS = ("region", "frame", "start_s", "duration_s", "mid_s", "mean", "std", "voxels")


@dataclasses.dataclass(frozen=True)
class SphereRegion:
    """A spherical region of interest.

    Attributes
    ----------
    name : str
    centre_mm : tuple of float
        (x, y, z), scanner frame, mm.
    radius_mm : float
    """

    name: str
    centre_mm: tuple
    radius_mm: float

    def describe(self) -> str:
        x, y, z = self.centre_mm
        return f"{self.name}=sphere:{x:g},{y:g},{z:g},{self.radius_mm:g}"


def parse_region(text: str) -> SphereRegion:
    """Parse ``NAME=sphere:X,Y,Z,R`` (mm, scanner frame).

    Examples
    --------
    >>> parse_region("hot=sphere:20,0,0,8")
    SphereRegion(name='hot', centre_mm=(20.0, 0.0, 0.0), radius_mm=8.0)
    """
    m = _ROI.match(text or "")
    if not m:
        raise TwinrayInputError(f"region '{text}' is not of the form NAME=sphere:X,Y,Z,R (mm)")
    name, numbers = m.group(1), m.group(2)
    try:
        values = [float(v) for v in numbers.split(",")]
    except ValueError:
        raise TwinrayInputError(f"region '{text}': X,Y,Z,R must be numbers in mm") from None
    if len(values) != 4 or not all(math.isfinite(v) for v in values):
        raise TwinrayInputError(f"region '{text}': give four finite numbers X,Y,Z,R in mm")
    if values[3] <= 0:
        raise TwinrayInputError(f"region '{text}': the radius must be positive")
    return SphereRegion(name, tuple(values[:3]), values[3])


def voxel_centres(shape, affine) -> tuple:
    """Scanner-frame x, y, z (mm) of every voxel centre, each broadcastable to ``shape[:3]``."""
    affine = np.asarray(affine, dtype=np.float64)
    idx = [np.arange(n, dtype=np.float64).reshape([-1 if k == a else 1 for k in range(3)])
           for a, n in enumerate(shape[:3])]
    return tuple(affine[row, 0] * idx[0] + affine[row, 1] * idx[1] + affine[row, 2] * idx[2] + affine[row, 3]
                 for row in range(3))


def region_mask(shape, affine, region: SphereRegion) -> np.ndarray:
    """Voxels whose centre lies inside the sphere (boolean, shape ``shape[:3]``)."""
    x, y, z = voxel_centres(shape, affine)
    cx, cy, cz = region.centre_mm
    return ((x - cx) ** 2 + (y - cy) ** 2 + (z - cz) ** 2) <= region.radius_mm ** 2


@dataclasses.dataclass(frozen=True)
class TimeActivityCurves:
    """Regional statistics per frame.

    Attributes
    ----------
    regions : tuple of SphereRegion
    frame_start_s, frame_duration_s : ndarray, shape (frames,)
    mean, std : ndarray, shape (regions, frames)
        In the image's units.
    voxels : ndarray of int, shape (regions,)
    units : str
    """

    regions: tuple
    frame_start_s: np.ndarray
    frame_duration_s: np.ndarray
    mean: np.ndarray
    std: np.ndarray
    voxels: np.ndarray
    units: str = ""

    @property
    def frame_mid_s(self) -> np.ndarray:
        return self.frame_start_s + 0.5 * self.frame_duration_s

    def rows(self):
        """Long-format rows, one per (region, frame), as in :data:`CSV_COLUMNS`."""
        for r, region in enumerate(self.regions):
            for k in range(len(self.frame_start_s)):
                yield (region.name, k, float(self.frame_start_s[k]), float(self.frame_duration_s[k]),
                       float(self.frame_mid_s[k]), float(self.mean[r, k]), float(self.std[r, k]),
                       int(self.voxels[r]))


def time_activity_curves(image, affine, frame_start_s, frame_duration_s, regions, units: str = "") \
        -> TimeActivityCurves:
    """Mean, standard deviation and voxel count of each region in each frame.

    Parameters
    ----------
    image : ndarray, shape (x, y, z, frames) or (x, y, z)
    affine : ndarray, shape (4, 4)
        Voxel index -> scanner-frame mm.
    frame_start_s, frame_duration_s : array_like, shape (frames,)
    regions : sequence of SphereRegion
    units : str
        Units of the image values (for the table and plot).

    Returns
    -------
    TimeActivityCurves
    """
    image = np.asarray(image)
    if image.ndim == 3:
        image = image[..., None]
    if image.ndim != 4:
        raise TwinrayInputError(f"a time-activity curve needs a 3-D or 4-D image, got {image.ndim}-D")
    starts = np.asarray(frame_start_s, dtype=np.float64).reshape(-1)
    durations = np.asarray(frame_duration_s, dtype=np.float64).reshape(-1)
    n_frames = image.shape[3]
    if len(starts) != n_frames or len(durations) != n_frames:
        raise TwinrayInputError(f"the image has {n_frames} frames but its sidecar gives {len(starts)} frame "
                                f"starts and {len(durations)} durations")
    regions = tuple(regions)
    if not regions:
        raise TwinrayInputError("give at least one region (--roi NAME=sphere:X,Y,Z,R)")
    names = [r.name for r in regions]
    if len(set(names)) != len(names):
        raise TwinrayInputError(f"region names must be unique, got {', '.join(names)}")
    flat = image.reshape(-1, n_frames)
    mean = np.zeros((len(regions), n_frames))
    std = np.zeros((len(regions), n_frames))
    voxels = np.zeros(len(regions), dtype=np.int64)
    for r, region in enumerate(regions):
        mask = region_mask(image.shape, affine, region).reshape(-1)
        voxels[r] = int(mask.sum())
        if voxels[r] == 0:
            raise TwinrayInputError(f"region {region.describe()} contains no voxel centre of the image")
        values = flat[mask].astype(np.float64)
        mean[r] = values.mean(axis=0)
        std[r] = values.std(axis=0)
    return TimeActivityCurves(regions, starts, durations, mean, std, voxels, units)


def write_tac_csv(path, curves: TimeActivityCurves) -> Path:
    """Write the long CSV (columns :data:`CSV_COLUMNS`) atomically."""
    path = Path(path)
    with atomic_path(path, suffix=".csv") as tmp:
        with open(tmp, "w", newline="", encoding="utf-8") as f:
            writer = csv.writer(f)
            writer.writerow(CSV_COLUMNS)
            for name, k, start, dur, mid, mean, std, vox in curves.rows():
                writer.writerow([name, k, f"{start:.6g}", f"{dur:.6g}", f"{mid:.6g}",
                                 f"{mean:.8g}", f"{std:.8g}", vox])
    return path


def plot_tacs(path, curves: TimeActivityCurves, title: str = "") -> Path:
    """Plot the curves (mean with a +-1 std band over voxels) to a PNG, atomically."""
    import matplotlib

    matplotlib.use("Agg")
    import matplotlib.pyplot as plt

    path = Path(path)
    minutes = curves.frame_mid_s.max() > 600
    scale, unit = (60.0, "min") if minutes else (1.0, "s")
    t = curves.frame_mid_s / scale
    fig, ax = plt.subplots(figsize=(7, 4.5), dpi=110)
    markers = "osD^vP*X"
    for r, region in enumerate(curves.regions):
        colour = OKABE_ITO[r % len(OKABE_ITO)]
        ax.fill_between(t, curves.mean[r] - curves.std[r], curves.mean[r] + curves.std[r], color=colour,
                        alpha=0.18, linewidth=0)
        ax.plot(t, curves.mean[r], marker=markers[r % len(markers)], color=colour, markersize=4,
                label=f"{region.name} ({curves.voxels[r]} voxels)")
    ax.set_xlabel(f"frame mid-time ({unit} from acquisition start)")
    ax.set_ylabel(f"regional mean ({curves.units})" if curves.units else "regional mean")
    ax.set_title(title or "time-activity curves (band: +-1 SD over voxels)")
    ax.grid(True, alpha=0.3)
    ax.legend(frameon=False)
    fig.tight_layout()
    try:
        with atomic_path(path, suffix=".png") as tmp:
            fig.savefig(tmp, format="png")
    finally:
        plt.close(fig)
    return path


def _frame_times(sidecar: dict, n_frames: int, where: str):
    starts = sidecar.get("FrameTimesStart")
    durations = sidecar.get("FrameDuration")
    if starts is None or durations is None:
        raise TwinrayInputError(f"{where} has no FrameTimesStart and FrameDuration in its JSON sidecar")
    starts = np.atleast_1d(np.asarray(starts, dtype=np.float64))
    durations = np.atleast_1d(np.asarray(durations, dtype=np.float64))
    if len(starts) != n_frames or len(durations) != n_frames:
        raise TwinrayInputError(f"{where} has {n_frames} frames but its sidecar lists {len(starts)} "
                                f"FrameTimesStart and {len(durations)} FrameDuration values")
    return starts, durations


def tac_from_image(image_path, regions, output_csv, plot_path=None) -> dict:
    """Time-activity curves of a dynamic image file: CSV and optional PNG.

    Parameters
    ----------
    image_path : path-like
        4-D NIfTI (``dynamic.nii.gz``) with a BIDS sidecar, or a 3-D image
        whose sidecar describes one frame.
    regions : sequence of SphereRegion or str
        Spheres, or their ``NAME=sphere:X,Y,Z,R`` texts.
    output_csv : path-like
    plot_path : path-like, optional

    Returns
    -------
    dict
        ``{"outputs": [...], "curves": TimeActivityCurves}``.
    """
    from .atomic import refuse_overwriting_inputs
    from .images import read_image, sidecar_path

    regions = [r if isinstance(r, SphereRegion) else parse_region(r) for r in regions]
    image_path = Path(image_path)
    for out in (output_csv, plot_path):
        if out is not None:
            refuse_overwriting_inputs(out, [image_path, sidecar_path(image_path)])
    data, affine, sidecar = read_image(image_path, what="dynamic image")
    n_frames = data.shape[3] if data.ndim == 4 else 1
    starts, durations = _frame_times(sidecar, n_frames, f"image {image_path}")
    curves = time_activity_curves(data, affine, starts, durations, regions, units=str(sidecar.get("Units", "")))
    outputs = [write_tac_csv(output_csv, curves)]
    if plot_path is not None:
        outputs.append(plot_tacs(plot_path, curves, title=f"time-activity curves: {image_path.name}"))
    return {"outputs": outputs, "curves": curves}
