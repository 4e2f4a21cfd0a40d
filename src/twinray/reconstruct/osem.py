"""Ordinary-Poisson OSEM (MLEM with one subset).

Measured prompts y_i are modelled as independent Poisson variables with
mean::

    ybar_i = c_i * (A x)_i + b_i

where A is the Joseph projector (``projectors.py``), ``c_i`` the LOR's
multiplicative factor (frame duration times the LOR volume factor divided by
``norm_i * acf_i``, see ``units.py``) and ``b_i = randoms_i + scatter_i``
the additive background expectation. The prompts are used as measured (not
precorrected), which keeps the Poisson statistics. With subsets S_m of
interleaved views, a sub-iteration is::

    x_j <- x_j / s_j^m * sum_{i in S_m} a_ij c_i y_i / ybar_i,
    s_j^m = sum_{i in S_m} a_ij c_i

(Shepp & Vardi 1982; Lange & Carson 1984; Hudson & Larkin 1994). The update
keeps x non-negative; voxels no LOR sees (s_j = 0) are set to 0.

References
----------
L. A. Shepp and Y. Vardi, "Maximum likelihood reconstruction for emission
tomography", IEEE Trans Med Imaging 1(2):113-122, 1982.
K. Lange and R. Carson, "EM reconstruction algorithms for emission and
transmission tomography", J Comput Assist Tomogr 8(2):306-316, 1984.
H. M. Hudson and R. S. Larkin, "Accelerated image reconstruction using
ordered subsets of projection data", IEEE Trans Med Imaging
13(4):601-609, 1994.
"""

from __future__ import annotations

import numpy as np

from ..errors import TwinrayInputError
from ..projectors import ProjectionGeometry, back_project, forward_project


def interleaved_subsets(n_views: int, subsets: int) -> list:
    """Views of each subset: subset m holds views m, m + M, m + 2M, ...

    Raises
    ------
    TwinrayInputError
        Unless 1 <= subsets <= n_views.
    """
    if not (1 <= subsets <= n_views):
        raise TwinrayInputError(f"--subsets must be between 1 and the number of views ({n_views}), got {subsets}")
    return [np.arange(m, n_views, subsets, dtype=np.int64) for m in range(subsets)]


def poisson_log_likelihood(prompts, expected) -> float:
    """``sum_i y_i ln(ybar_i) - ybar_i`` (constant terms dropped), over LORs with ybar_i > 0."""
    y = np.asarray(prompts, dtype=np.float64)
    ybar = np.asarray(expected, dtype=np.float64)
    ok = ybar > 0
    return float(np.sum(y[ok] * np.log(ybar[ok]) - ybar[ok]))


def expected_prompts(image, geom: ProjectionGeometry, multiplicative, additive=None) -> np.ndarray:
    """The model mean ``c * (A x) + b`` for every LOR."""
    ybar = np.asarray(multiplicative) * forward_project(image, geom)
    if additive is not None:
        ybar = ybar + additive
    return ybar


def _by_subset(array, views_list, dtype):
    return [np.ascontiguousarray(array[:, v, :], dtype=dtype) for v in views_list]


def osem(prompts, geom: ProjectionGeometry, multiplicative=None, additive=None, *, iterations: int = 3,
         subsets: int = 8, initial=None, dtype=np.float32, callback=None) -> np.ndarray:
    """Ordinary-Poisson OSEM reconstruction.

    Parameters
    ----------
    prompts : ndarray, shape (planes, views, radial)
        Measured prompt counts (not precorrected).
    geom : ProjectionGeometry
    multiplicative : ndarray or float, optional
        ``c_i``: expected counts per unit of line integral (default 1).
        0 excludes a LOR from the model.
    additive : ndarray, optional
        ``b_i``: expected randoms + scatter counts (default 0).
    iterations : int
        Full passes through the data.
    subsets : int
        Number of interleaved-view subsets; 1 gives MLEM.
    initial : ndarray, optional
        Starting image (positive); default a uniform image whose expected
        trues match the measured prompts minus background.
    dtype : numpy dtype
        Working precision (float32 default; float64 for checks).
    callback : callable, optional
        Called as ``callback(iteration, subset, image)`` after every
        sub-iteration (progress bars, likelihood traces).

    Returns
    -------
    ndarray, shape (nz, ny, nx)
        The image, in the unit that makes ``c * (A x)`` expected counts.

    References
    ----------
    Shepp & Vardi (1982); Lange & Carson (1984); Hudson & Larkin (1994).
    """
    y = np.asarray(prompts)
    shape = geom.sinogram_shape
    if y.shape != shape:
        raise TwinrayInputError(f"prompts have shape {y.shape}, the geometry expects {shape}")
    if iterations < 1:
        raise TwinrayInputError(f"--iterations must be at least 1, got {iterations}")
    if np.any(y < 0) or not np.all(np.isfinite(y)):
        raise TwinrayInputError("prompts must be finite, non-negative counts")
    c = np.broadcast_to(np.asarray(1.0 if multiplicative is None else multiplicative, dtype=np.float64), shape)
    if np.any(c < 0) or not np.all(np.isfinite(c)):
        raise TwinrayInputError("multiplicative factors must be finite and non-negative")
    b = np.zeros(shape) if additive is None else np.broadcast_to(np.asarray(additive, dtype=np.float64), shape)
    if np.any(b < 0) or not np.all(np.isfinite(b)):
        raise TwinrayInputError("randoms and scatter estimates must be finite and non-negative")

    views_list = interleaved_subsets(shape[1], subsets)
    y_m = _by_subset(y, views_list, dtype)
    c_m = _by_subset(c, views_list, dtype)
    b_m = _by_subset(b, views_list, dtype)
    sens_m = [back_project(c_k, geom, views=v, dtype=dtype) for c_k, v in zip(c_m, views_list)]
    total_sens = np.sum(sens_m, axis=0, dtype=np.float64)
    support = total_sens > 0

    if initial is None:
        trues = max(float(np.sum(y, dtype=np.float64) - np.sum(b, dtype=np.float64)), 1e-3 * float(np.sum(y)) + 1e-12)
        x = np.full(geom.grid.shape, trues / max(float(total_sens.sum()), 1e-300), dtype=dtype)
    else:
        x = np.array(initial, dtype=dtype)
        if x.shape != geom.grid.shape or np.any(x < 0):
            raise TwinrayInputError("initial image must match the grid and be non-negative")
    x[~support] = 0

    for it in range(iterations):
        for m, views in enumerate(views_list):
            ybar = forward_project(x, geom, views=views)
            ybar *= c_m[m]
            ybar += b_m[m]
            # c_i * y_i / ybar_i; LORs with ybar = 0 carry no information here.
            ratio = np.divide(y_m[m], ybar, out=np.zeros_like(ybar), where=ybar > 0)
            ratio *= c_m[m]
            update = back_project(ratio, geom, views=views, dtype=dtype)
            seen = sens_m[m] > 0
            x[seen] *= update[seen] / sens_m[m][seen]
            if callback is not None:
                callback(it, m, x)
    return x
