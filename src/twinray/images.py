"""Images (NIfTI-1) and their JSON sidecars, data contract section 4.

float32 arrays ``(x, y, z[, frame])``; the affine maps voxel indices to
scanner-frame millimetres with the scanner centre at (0, 0, 0); qform and
sform code 1 (scanner-based). The sidecar has the same stem with ``.json``.
"""

from __future__ import annotations

import json
from pathlib import Path

import numpy as np

from .atomic import atomic_path
from .errors import TwinrayInputError


def centred_affine(shape, voxel_mm, z_positions_mm=None) -> np.ndarray:
    """Affine of a grid centred on the scanner axis.

    Parameters
    ----------
    shape : tuple of int
        ``(nx, ny, nz)``.
    voxel_mm : float or sequence of 3 floats
        Voxel size (x, y, z), mm.
    z_positions_mm : ndarray, optional
        Centre z of every slice (evenly spaced); overrides the z size and
        centring when given.

    Returns
    -------
    ndarray, shape (4, 4)
    """
    vx, vy, vz = np.broadcast_to(np.asarray(voxel_mm, dtype=np.float64), (3,))
    nx, ny, nz = shape[:3]
    affine = np.diag([vx, vy, vz, 1.0])
    affine[0, 3] = -(nx - 1) / 2.0 * vx
    affine[1, 3] = -(ny - 1) / 2.0 * vy
    affine[2, 3] = -(nz - 1) / 2.0 * vz
    if z_positions_mm is not None and len(z_positions_mm) > 0:
        z = np.asarray(z_positions_mm, dtype=np.float64)
        dz = float(z[1] - z[0]) if len(z) > 1 else vz
        affine[2, 2] = dz
        affine[2, 3] = z[0]
    return affine


def voxel_centres_mm(shape, affine) -> tuple:
    """Scanner-frame x, y, z of the voxel centres along each axis (axis-aligned affines)."""
    return tuple(affine[k, k] * np.arange(shape[k]) + affine[k, 3] for k in range(3))


def sidecar_path(image_path) -> Path:
    """``name.nii.gz`` -> ``name.json``."""
    p = Path(image_path)
    name = p.name
    for ext in (".nii.gz", ".nii"):
        if name.endswith(ext):
            return p.with_name(name[: -len(ext)] + ".json")
    return p.with_suffix(".json")


def write_image(path, data, affine, sidecar: dict | None = None) -> list:
    """Write a float32 NIfTI image (and its JSON sidecar) atomically.

    Parameters
    ----------
    path : path-like
        ``.nii`` or ``.nii.gz``.
    data : ndarray, shape (x, y, z[, frame])
    affine : ndarray, shape (4, 4)
        Voxel index -> scanner-frame mm.
    sidecar : dict, optional
        BIDS PET keys and the ``twinray`` object.

    Returns
    -------
    list of Path
        The files written.
    """
    import nibabel as nib

    path = Path(path)
    if not (path.name.endswith(".nii") or path.name.endswith(".nii.gz")):
        raise TwinrayInputError(f"image output {path} must end in .nii or .nii.gz")
    img = nib.Nifti1Image(np.asarray(data, dtype=np.float32), affine)
    img.set_qform(affine, code=1)
    img.set_sform(affine, code=1)
    img.header.set_xyzt_units("mm", "sec")
    written = []
    with atomic_path(path, suffix=".nii.gz" if path.name.endswith(".gz") else ".nii") as tmp:
        nib.save(img, tmp)
    written.append(path)
    if sidecar is not None:
        side = sidecar_path(path)
        with atomic_path(side, suffix=".json") as tmp:
            tmp.write_text(json.dumps(sidecar, indent=2, sort_keys=True, default=_json_default) + "\n")
        written.append(side)
    return written


def _json_default(obj):
    if isinstance(obj, np.generic):
        return obj.item()
    if isinstance(obj, np.ndarray):
        return obj.tolist()
    raise TypeError(f"cannot store {type(obj).__name__} in a sidecar")


def read_image(path, what: str = "image") -> tuple:
    """Read a NIfTI image.

    Returns
    -------
    data : ndarray of float32
    affine : ndarray, shape (4, 4)
    sidecar : dict
        The JSON sidecar, or an empty dict when there is none.
    """
    import nibabel as nib

    path = Path(path)
    if not path.is_file():
        raise TwinrayInputError(f"{what} {path} does not exist")
    try:
        img = nib.load(str(path))
        data = np.asarray(img.dataobj, dtype=np.float32)
    except Exception as exc:  # nibabel raises several types for corrupt files
        raise TwinrayInputError(f"{what} {path} is not a readable NIfTI image ({type(exc).__name__})") from None
    side = sidecar_path(path)
    sidecar = {}
    if side.is_file():
        try:
            sidecar = json.loads(side.read_text())
        except json.JSONDecodeError:
            raise TwinrayInputError(f"sidecar {side} is not valid JSON") from None
    return data, np.asarray(img.affine, dtype=np.float64), sidecar
