"""Matched forward and back projectors for the sinogram geometry.

The forward projector computes line integrals (mm times image value) of a
voxel image along every LOR of a sinogram; the back projector is its exact
transpose, so ``<A x, y> == <x, A^T y>`` to rounding. Both follow Joseph's
method: a LOR is walked one image column (or row, whichever direction the
LOR runs closer to) at a time; at each step the image is interpolated
bilinearly in the other transaxial direction and in z, and the sample is
weighted by the length of the LOR per step. The back projector adds the
same weights in the same voxels.

Geometry comes from the sinogram: a point (x, y) is on the LOR of view angle
phi and radial position s when ``x*cos(phi) + y*sin(phi) = s``; the LOR runs
between the two points where that line meets the ring of radius R; end 1 is
the end at ``+sqrt(R^2 - s^2)`` along ``(-sin(phi), cos(phi))`` and lies at
axial position ``z_end1``. 2-D (per plane) projection is the special case
where both ends of every LOR of plane p lie in image slice p.

Images are ``float`` arrays indexed ``[z, y, x]`` inside twinray's
reconstruction code (NIfTI files are written ``(x, y, z)``); sinograms are
``(plane, view, radial)``.

References
----------
P. M. Joseph, "An improved algorithm for reprojecting rays through pixel
images", IEEE Transactions on Medical Imaging 1(3):192-196, 1982.
"""

from __future__ import annotations

import dataclasses

import numba
import numpy as np

from . import _projector_kernels as _k
from .errors import TwinrayInputError


@dataclasses.dataclass(frozen=True, eq=False)
class ImageGrid:
    """A voxel grid centred on the scanner axis.

    Attributes
    ----------
    nx, ny : int
        Columns (x) and rows (y).
    voxel_mm : float
        Transaxial voxel size (x and y), mm.
    slice_z_mm : ndarray, shape (nz,)
        Axial centre of every slice, mm, evenly spaced and increasing.
    """

    nx: int
    ny: int
    voxel_mm: float
    slice_z_mm: np.ndarray

    @property
    def nz(self) -> int:
        return len(self.slice_z_mm)

    @property
    def shape(self) -> tuple:
        """Array shape ``(nz, ny, nx)``."""
        return (self.nz, self.ny, self.nx)

    @property
    def slice_spacing_mm(self) -> float:
        """Distance between slice centres, mm (the voxel size for one slice)."""
        z = np.asarray(self.slice_z_mm)
        return float(z[1] - z[0]) if len(z) > 1 else float(self.voxel_mm)

    def x_mm(self) -> np.ndarray:
        """Voxel-centre x of every column, mm."""
        return (np.arange(self.nx) - (self.nx - 1) / 2.0) * self.voxel_mm

    def y_mm(self) -> np.ndarray:
        """Voxel-centre y of every row, mm."""
        return (np.arange(self.ny) - (self.ny - 1) / 2.0) * self.voxel_mm


def image_grid(nx: int, ny: int, voxel_mm: float, slice_z_mm) -> ImageGrid:
    """Validate and build an :class:`ImageGrid`."""
    z = np.asarray(slice_z_mm, dtype=np.float64).ravel()
    if nx < 1 or ny < 1 or len(z) < 1:
        raise TwinrayInputError(f"image grid must have at least one voxel, got {nx}x{ny}x{len(z)}")
    if not (voxel_mm > 0 and np.isfinite(voxel_mm)):
        raise TwinrayInputError(f"voxel size must be a positive number of mm, got {voxel_mm}")
    if len(z) > 1:
        dz = np.diff(z)
        if not (np.all(dz > 0) and np.allclose(dz, dz[0], rtol=1e-6, atol=1e-9)):
            raise TwinrayInputError("image slices must be evenly spaced in increasing z")
    z.setflags(write=False)
    return ImageGrid(nx=int(nx), ny=int(ny), voxel_mm=float(voxel_mm), slice_z_mm=z)


@dataclasses.dataclass(frozen=True, eq=False)
class ProjectionGeometry:
    """Everything the projector kernels need, as plain arrays (picklable).

    Attributes
    ----------
    grid : ImageGrid
    view_angles_rad : ndarray, shape (views,)
    radial_positions_mm : ndarray, shape (radial,)
    half_chord_mm : ndarray, shape (radial,)
        ``sqrt(R^2 - s^2)``: half the transaxial length of each LOR.
    fz_end1, fz_end2 : ndarray, shape (planes,)
        Fractional slice index of end 1 and end 2 of every plane's LORs.
    dz_mm : ndarray, shape (planes,)
        ``z_end1 - z_end2``, mm (0 for direct and 2-D planes).
    """

    grid: ImageGrid
    view_angles_rad: np.ndarray
    radial_positions_mm: np.ndarray
    half_chord_mm: np.ndarray
    fz_end1: np.ndarray
    fz_end2: np.ndarray
    dz_mm: np.ndarray

    @property
    def sinogram_shape(self) -> tuple:
        return (len(self.fz_end1), len(self.view_angles_rad), len(self.radial_positions_mm))


def _fractional_slice(z_mm, grid: ImageGrid) -> np.ndarray:
    f = (np.asarray(z_mm, dtype=np.float64) - grid.slice_z_mm[0]) / grid.slice_spacing_mm
    # Snap values that are a slice centre up to rounding, so direct planes hit one slice exactly.
    nearest = np.round(f)
    return np.where(np.abs(f - nearest) < 1e-6, nearest, f)


def projection_geometry(view_angles_rad, radial_positions_mm, radius_mm: float, z_end1_mm, z_end2_mm,
                        grid: ImageGrid) -> ProjectionGeometry:
    """Build the projector geometry of a 3-D (or 2-D) sinogram.

    Parameters
    ----------
    view_angles_rad : array, shape (views,)
    radial_positions_mm : array, shape (radial,)
        Signed radial positions (need not be uniform).
    radius_mm : float
        Radius of the ring on which LOR ends lie.
    z_end1_mm, z_end2_mm : array, shape (planes,)
        Axial position of end 1 and end 2 of each plane's LORs, mm.
    grid : ImageGrid

    Returns
    -------
    ProjectionGeometry
    """
    s = np.asarray(radial_positions_mm, dtype=np.float64)
    if np.any(np.abs(s) >= radius_mm):
        raise TwinrayInputError("radial positions must lie inside the detector ring radius")
    z1 = np.asarray(z_end1_mm, dtype=np.float64)
    z2 = np.asarray(z_end2_mm, dtype=np.float64)
    if z1.shape != z2.shape:
        raise TwinrayInputError("z_end1_mm and z_end2_mm must have one value per plane")
    arrays = dict(
        view_angles_rad=np.asarray(view_angles_rad, dtype=np.float64).copy(),
        radial_positions_mm=s.copy(),
        half_chord_mm=np.sqrt(radius_mm ** 2 - s ** 2),
        fz_end1=_fractional_slice(z1, grid),
        fz_end2=_fractional_slice(z2, grid),
        dz_mm=z1 - z2,
    )
    for a in arrays.values():
        a.setflags(write=False)
    return ProjectionGeometry(grid=grid, **arrays)


def plane_geometry_2d(view_angles_rad, radial_positions_mm, radius_mm: float, grid: ImageGrid) -> ProjectionGeometry:
    """2-D projection: plane ``p`` of the sinogram is slice ``p`` of the image."""
    z = np.asarray(grid.slice_z_mm)
    return projection_geometry(view_angles_rad, radial_positions_mm, radius_mm, z, z, grid)


def _view_list(geom: ProjectionGeometry, views) -> np.ndarray:
    n = len(geom.view_angles_rad)
    if views is None:
        return np.arange(n, dtype=np.int64)
    v = np.ascontiguousarray(views, dtype=np.int64)
    if v.size and (v.min() < 0 or v.max() >= n):
        raise TwinrayInputError(f"view indices must lie in 0..{n - 1}")
    return v


def _kernel_args(geom: ProjectionGeometry):
    g = geom.grid
    phi = geom.view_angles_rad
    # Length of the 3-D line per unit of transaxial length, per (plane, radial bin).
    half = np.maximum(geom.half_chord_mm, 1e-12)
    axial = np.sqrt(1.0 + (geom.dz_mm[:, None] / (2.0 * half[None, :])) ** 2)
    return (np.cos(phi), np.sin(phi), geom.radial_positions_mm, geom.half_chord_mm,
            geom.fz_end1, geom.fz_end2, axial,
            float(g.x_mm()[0]), float(g.y_mm()[0]), float(g.voxel_mm), float(g.voxel_mm))


#: Below this many interpolation steps (planes x LORs x image width) the serial kernels are used.
SERIAL_BELOW_STEPS = 1_000_000


def _work(geom: ProjectionGeometry, n_views: int) -> int:
    g = geom.grid
    return geom.sinogram_shape[0] * n_views * geom.sinogram_shape[2] * max(g.nx, g.ny)


def forward_project(image, geom: ProjectionGeometry, views=None, out=None) -> np.ndarray:
    """Line integrals of an image along the LORs of a sinogram (Joseph 1982).

    Parameters
    ----------
    image : ndarray, shape (nz, ny, nx)
        Voxel values; float32 or float64 (the result has the same type).
    geom : ProjectionGeometry
    views : array of int, optional
        Only these views (in this order), e.g. one OSEM subset; default all.
    out : ndarray, optional
        Output array of shape ``(planes, len(views), radial)`` to fill.

    Returns
    -------
    ndarray, shape (planes, len(views), radial)
        Line integrals, mm times the image unit.

    References
    ----------
    P. M. Joseph, IEEE Trans Med Imaging 1(3):192-196, 1982.
    """
    image = np.ascontiguousarray(image)
    if image.shape != geom.grid.shape:
        raise TwinrayInputError(f"image has shape {image.shape}, the grid is {geom.grid.shape}")
    if image.dtype not in (np.float32, np.float64):
        image = image.astype(np.float64)
    v = _view_list(geom, views)
    shape = (geom.sinogram_shape[0], len(v), geom.sinogram_shape[2])
    if out is None:
        out = np.empty(shape, dtype=image.dtype)
    elif out.shape != shape or not out.flags.c_contiguous:
        raise ValueError(f"out must be C-contiguous with shape {shape}")
    # Kernels work on [y, x, z] (z fastest: all planes of a LOR column read contiguous z runs),
    # padded with one zero voxel on every side (no bounds tests in the inner loop).
    padded = np.zeros((image.shape[1] + 2, image.shape[2] + 2, image.shape[0] + 2), dtype=image.dtype)
    padded[1:-1, 1:-1, 1:-1] = image.transpose(1, 2, 0)
    nz, ny, nx = image.shape
    if _work(geom, len(v)) < SERIAL_BELOW_STEPS:
        _k.forward_kernel_serial(padded.ravel(), ny, nx, nz, *_kernel_args(geom), v, 1, out)
    else:
        n_chunks = max(1, min(4 * numba.get_num_threads(), shape[1] * shape[2]))
        _k.forward_kernel(padded.ravel(), ny, nx, nz, *_kernel_args(geom), v, n_chunks, out)
    return out


def back_project(sinogram, geom: ProjectionGeometry, views=None, dtype=None) -> np.ndarray:
    """Exact transpose of :func:`forward_project`.

    Parameters
    ----------
    sinogram : ndarray, shape (planes, len(views), radial)
    geom : ProjectionGeometry
    views : array of int, optional
        The views the sinogram rows belong to; default all.
    dtype : numpy dtype, optional
        Result type (default: that of ``sinogram``). Accumulation is in
        float64 per thread.

    Returns
    -------
    ndarray, shape (nz, ny, nx)

    Notes
    -----
    Work is split into one contiguous range of (view, radial) LOR columns
    per thread, each with its own float64 image buffer, so no two threads
    write the same memory; the buffers are summed at the end.
    """
    sinogram = np.ascontiguousarray(sinogram)
    if sinogram.dtype not in (np.float32, np.float64):
        sinogram = sinogram.astype(np.float64)
    v = _view_list(geom, views)
    shape = (geom.sinogram_shape[0], len(v), geom.sinogram_shape[2])
    if sinogram.shape != shape:
        raise TwinrayInputError(f"sinogram has shape {sinogram.shape}, expected {shape}")
    serial = _work(geom, len(v)) < SERIAL_BELOW_STEPS
    n_chunks = 1 if serial else max(1, min(numba.get_num_threads(), shape[1] * shape[2]))
    nz, ny, nx = geom.grid.shape
    buffers = np.zeros((n_chunks, (ny + 2) * (nx + 2) * (nz + 2)), dtype=np.float64)
    out = np.empty(geom.grid.shape, dtype=np.dtype(dtype) if dtype is not None else sinogram.dtype)
    if serial:
        _k.back_kernel_serial(sinogram, ny, nx, nz, *_kernel_args(geom), v, buffers)
        _k.sum_buffers_to_zyx_serial(buffers, out)
    else:
        _k.back_kernel(sinogram, ny, nx, nz, *_kernel_args(geom), v, buffers)
        _k.sum_buffers_to_zyx(buffers, out)
    return out
