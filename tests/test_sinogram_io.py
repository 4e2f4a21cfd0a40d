"""Sinogram HDF5 files: the two-thread compressed writer against the HDF5 library's own filters."""

from __future__ import annotations

import h5py
import numpy as np
import pytest

from conftest import make_small_scanner
from twinray.geometry import sinogram_geometry
from twinray.sinogram_io import read_sinogram_file, write_sinogram_file

GEOMETRY = sinogram_geometry(make_small_scanner())


@pytest.mark.parametrize("dtype", [np.int32, np.float32, np.float64])
@pytest.mark.parametrize("lead", [(), (3,)])
def test_chunks_compressed_in_parallel_read_back_through_hdf5_filters(tmp_path, dtype, lead):
    """Chunks we shuffle and deflate ourselves decode through the HDF5 library's shuffle + deflate
    filters (h5py reading) to the original array, exactly as a file h5py compressed itself."""
    rng = np.random.default_rng(3)
    data = rng.poisson(0.7, lead + GEOMETRY.shape).astype(dtype)
    ours = write_sinogram_file(tmp_path / "ours.h5", {"prompts": data}, GEOMETRY)
    with h5py.File(tmp_path / "theirs.h5", "w") as f:
        f.create_dataset("prompts", data=data, chunks=(1,) * (data.ndim - 2) + data.shape[-2:],
                         compression="gzip", compression_opts=1, shuffle=True)
    with h5py.File(ours) as f, h5py.File(tmp_path / "theirs.h5") as g:
        dset = f["prompts"]
        assert dset.compression == "gzip" and dset.shuffle and dset.chunks == g["prompts"].chunks
        np.testing.assert_array_equal(dset[...], data)
        np.testing.assert_array_equal(dset[...], g["prompts"][...])
    np.testing.assert_array_equal(read_sinogram_file(ours).arrays["prompts"], data)


def test_uncompressed_and_empty_datasets(tmp_path):
    data = np.arange(np.prod(GEOMETRY.shape), dtype=np.int32).reshape(GEOMETRY.shape)
    path = write_sinogram_file(tmp_path / "plain.h5", {"prompts": data}, GEOMETRY, compression=None)
    with h5py.File(path) as f:
        assert f["prompts"].compression is None
        np.testing.assert_array_equal(f["prompts"][...], data)
    empty = np.zeros((0,) + GEOMETRY.shape, np.float32)
    path = write_sinogram_file(tmp_path / "empty.h5", {"prompts": empty}, GEOMETRY)
    with h5py.File(path) as f:
        assert f["prompts"].shape == empty.shape
