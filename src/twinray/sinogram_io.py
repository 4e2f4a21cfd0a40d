"""Sinogram and normalization files (HDF5), data contract section 3.

Arrays are ``(plane, view, radial)``. Root attributes carry the geometry
(``view_angles_rad``, ``radial_positions_mm``, ``plane_z_mm``,
``plane_ring_difference``), the frame (``frame_start_s``,
``frame_duration_s``), the scanner (JSON) and the accounting (JSON). twinray
adds ``rebin`` and ``twinray_geometry`` (JSON) so that the exact layout can be
rebuilt, plus any other attributes a command wants to keep (decay factor,
options, provenance).
"""

from __future__ import annotations

import dataclasses
import json
from pathlib import Path

import numpy as np

from .accounting import Accounting
from .atomic import atomic_path
from .errors import TwinrayInputError
from .geometry import SinogramGeometry, sinogram_geometry
from .scanner import scanner_from_dict

SINOGRAM_DATASETS = ("prompts", "delayed", "randoms", "scatter", "norm", "acf", "corrected")


@dataclasses.dataclass
class SinogramFile:
    """A sinogram file read into memory.

    Attributes
    ----------
    arrays : dict of str to ndarray
        The datasets present, each ``(plane, view, radial)``.
    geometry : SinogramGeometry
    frame_start_s, frame_duration_s : float
    accounting : Accounting or None
    attrs : dict
        Every root attribute (JSON strings decoded).
    """

    arrays: dict
    geometry: SinogramGeometry
    frame_start_s: float
    frame_duration_s: float
    accounting: Accounting | None
    attrs: dict


def geometry_attributes(geometry: SinogramGeometry) -> dict:
    """Root attributes that describe a sinogram layout."""
    return {
        "view_angles_rad": np.asarray(geometry.view_angles_rad, dtype=np.float64),
        "radial_positions_mm": np.asarray(geometry.radial_positions_mm, dtype=np.float64),
        "plane_z_mm": np.asarray(geometry.plane_z_mm, dtype=np.float64),
        "plane_ring_difference": np.asarray(geometry.plane_ring_difference, dtype=np.int32),
        "scanner": geometry.scanner.to_json(),
        "rebin": geometry.rebin,
        "twinray_geometry": json.dumps(geometry.description(), sort_keys=True),
    }


def _to_attr(value):
    if isinstance(value, (dict, list, tuple)) and not isinstance(value, np.ndarray):
        return json.dumps(value, sort_keys=True, default=_json_default)
    if value is None:
        return "null"
    return value


def _json_default(obj):
    if isinstance(obj, np.generic):
        return obj.item()
    if isinstance(obj, np.ndarray):
        return obj.tolist()
    raise TypeError(f"cannot store {type(obj).__name__} as JSON")


def write_sinogram_file(path, arrays: dict, geometry: SinogramGeometry, *, frame_start_s: float = 0.0,
                        frame_duration_s: float = 0.0, accounting: Accounting | None = None,
                        attrs: dict | None = None, compression: int | None = 1,
                        extra_arrays: dict | None = None) -> Path:
    """Write sinogram datasets and attributes atomically.

    Parameters
    ----------
    path : path-like
        Output ``.h5`` file (written under a temporary name, then renamed).
    arrays : dict of str to ndarray
        Datasets, each shaped ``geometry.shape`` (or with a leading TOF axis).
    geometry : SinogramGeometry
    frame_start_s, frame_duration_s : float
        The frame the data cover, seconds from acquisition start.
    accounting : Accounting, optional
    attrs : dict, optional
        Further root attributes; dicts and lists are stored as JSON.
    compression : int or None
        gzip level (standard HDF5 filter, readable everywhere); None for none.
    extra_arrays : dict of str to ndarray, optional
        Further datasets of any shape, stored without the sinogram shape
        check (e.g. ``crystal_efficiency`` of a normalization file).
    """
    import h5py

    for name, arr in arrays.items():
        if np.shape(arr)[-3:] != geometry.shape:
            raise ValueError(f"dataset {name} has shape {np.shape(arr)}, expected {geometry.shape}")
    path = Path(path)
    with atomic_path(path) as tmp:
        with h5py.File(tmp, "w") as f:
            for name, arr in arrays.items():
                arr = np.asarray(arr)
                if compression and arr.size:
                    _write_compressed(f, name, arr, int(compression))
                    continue
                chunks = (1,) * (arr.ndim - 2) + arr.shape[-2:] if arr.size else None
                f.create_dataset(name, data=arr, chunks=chunks)
            for name, arr in (extra_arrays or {}).items():
                f.create_dataset(name, data=np.asarray(arr))
            for key, value in geometry_attributes(geometry).items():
                f.attrs[key] = value
            f.attrs["frame_start_s"] = float(frame_start_s)
            f.attrs["frame_duration_s"] = float(frame_duration_s)
            if accounting is not None:
                f.attrs["accounting"] = json.dumps(accounting.to_dict())
            for key, value in (attrs or {}).items():
                f.attrs[key] = _to_attr(value)
    return path


def _shuffled_deflate(chunk: np.ndarray, level: int) -> bytes:
    """One chunk through HDF5's shuffle then deflate filters: bytes grouped by significance, then zlib."""
    import zlib

    raw = np.ascontiguousarray(chunk).view(np.uint8).reshape(-1, chunk.dtype.itemsize)
    return zlib.compress(np.ascontiguousarray(raw.T).tobytes(), level)


def _write_compressed(f, name: str, arr: np.ndarray, level: int, group: int = 64) -> None:
    """A dataset chunked by sinogram plane, shuffled and gzip-compressed on two threads.

    The file is the same as h5py's own ``shuffle=True, compression="gzip"``
    (standard filters, readable everywhere); only the compression, which
    takes most of the time of writing a whole-body sinogram, runs in
    parallel (zlib releases the GIL), while HDF5 itself is called from this
    thread only. Chunks are compressed ``group`` at a time, so memory stays
    small.
    """
    from concurrent.futures import ThreadPoolExecutor

    arr = np.ascontiguousarray(arr)
    chunk_shape = (1,) * (arr.ndim - 2) + arr.shape[-2:]
    dset = f.create_dataset(name, shape=arr.shape, dtype=arr.dtype, chunks=chunk_shape, compression="gzip",
                            compression_opts=level, shuffle=True)
    planes = arr.reshape((-1,) + arr.shape[-2:])
    lead = arr.shape[:-2]
    with ThreadPoolExecutor(max_workers=2, thread_name_prefix="twinray-deflate") as pool:
        for start in range(0, len(planes), group):
            stop = min(len(planes), start + group)
            blobs = pool.map(lambda k: _shuffled_deflate(planes[k], level), range(start, stop))
            for k, blob in zip(range(start, stop), blobs):
                offset = tuple(int(i) for i in np.unravel_index(k, lead)) + (0, 0)
                dset.id.write_direct_chunk(offset, blob)


def decode_attribute(value):
    """An HDF5 attribute as Python: JSON strings decoded, bytes as text, 0-d arrays as scalars."""
    if isinstance(value, bytes):
        value = value.decode()
    if isinstance(value, str):
        try:
            return json.loads(value)
        except json.JSONDecodeError:
            return value
    if isinstance(value, np.ndarray) and value.ndim == 0:
        return value.item()
    return value


_decode_attr = decode_attribute


def geometry_from_attrs(attrs: dict, where: str) -> SinogramGeometry:
    """Rebuild the sinogram geometry stored with a file and check it against the arrays."""
    try:
        scanner_table = attrs["scanner"]
    except KeyError:
        raise TwinrayInputError(f"{where}: missing root attribute 'scanner'") from None
    if isinstance(scanner_table, str):
        scanner_table = json.loads(scanner_table)
    scanner = scanner_from_dict(scanner_table, source=f"{where} attribute 'scanner'")
    rebin = attrs.get("rebin", "none")
    geometry = sinogram_geometry(scanner, rebin=rebin)
    for key in ("view_angles_rad", "radial_positions_mm", "plane_z_mm"):
        if key in attrs and not np.allclose(np.asarray(attrs[key]), getattr(geometry, key), atol=1e-6):
            raise TwinrayInputError(f"{where}: attribute {key} does not match the scanner geometry it names")
    return geometry


def read_sinogram_file(path, datasets=None) -> SinogramFile:
    """Read a sinogram (or normalization) file.

    Parameters
    ----------
    path : path-like
    datasets : iterable of str, optional
        Only these datasets (those missing are skipped); default all.

    Returns
    -------
    SinogramFile
    """
    import h5py

    path = Path(path)
    if not path.is_file():
        raise TwinrayInputError(f"sinogram file {path} does not exist")
    try:
        f = h5py.File(path, "r")
    except OSError:
        raise TwinrayInputError(f"{path} is not a readable HDF5 file") from None
    with f:
        attrs = {k: _decode_attr(v) for k, v in f.attrs.items()}
        geometry = geometry_from_attrs(attrs, str(path))
        names = [n for n in f.keys() if datasets is None or n in datasets]
        arrays = {}
        for name in names:
            if not isinstance(f[name], h5py.Dataset):
                continue
            arrays[name] = f[name][()]
            if name in SINOGRAM_DATASETS and arrays[name].shape[-3:] != geometry.shape:
                raise TwinrayInputError(
                    f"{path}: dataset {name} has shape {arrays[name].shape}, geometry says {geometry.shape}")
    acc = attrs.get("accounting")
    return SinogramFile(arrays=arrays, geometry=geometry,
                        frame_start_s=float(attrs.get("frame_start_s", 0.0)),
                        frame_duration_s=float(attrs.get("frame_duration_s", 0.0)),
                        accounting=Accounting.from_dict(acc) if isinstance(acc, dict) else None,
                        attrs=attrs)
