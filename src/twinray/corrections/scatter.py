"""Scatter estimates: tail fitting (a model-based method can be added beside it).

Tail fit. Outside the object no true coincidence can occur, so after
randoms subtraction the counts of LORs that miss the object (the sinogram
"tails") are scatter. Per plane, a smooth function is fitted to the tails
and read under the object:

* the object is where ``acf > 1 + acf_threshold`` (the ACF comes from the
  mu-map, so the object edge is known independently of the emission data);
  the tails are the bins at least ``margin_mm`` beyond its edge in each view;
* the data are normalized first (``(prompts - randoms) * norm``), because
  scatter is smooth in the detector-independent space, not in raw counts;
* the model of view ``v`` is a Gaussian in the radial position,
  ``a_v * exp(-(s - c_v)^2 / (2 sigma^2))``, centred on the ACF-weighted
  centre ``c_v`` of the object in that view; one ``sigma`` per plane is
  chosen by least squares over all the plane's tails (a grid of 1 to 4
  object half-widths, then a bounded 1-D refinement), each ``a_v`` in
  closed form, and the ``a_v`` are
  smoothed over neighbouring views to reduce noise;
* the fitted scatter is divided by ``norm`` to give expected raw counts.

Limits: only scatter that reaches the tails is seen. With a narrow energy
window most scatter of a small object stays under it and follows the trues'
shape; the fit then finds little scatter and the remaining part acts as a
change of scale (absorbed by the calibration), not of shape. The width is
kept at least the object's half-width, because narrower Gaussians fitted to
the steep edge of the tails over-estimate the scatter under the object.
The Gaussian shape is an assumption; it is good for centred,
roughly cylindrical objects and poor for large patients, whose tails are
short (little data outside the object) and whose scatter under the object is
not a Gaussian (a known risk of tail fitting). Scatter from activity outside
the field of view and multiple-scatter detail are not modelled. Planes or
views without tails get no scatter (they are reported).

References
----------
C. W. Stearns, "Scatter correction method for 3D PET using 2D fitted
Gaussian functions", J Nucl Med 36 (Suppl):105P, 1995 (abstract; from
memory). J. S. Karp et al., "Continuous-slice PENN-PET", J Nucl Med
31:617-627, 1990 (Gaussian tail fit; from memory). See
/work/shared/references.md s.12.
"""

from __future__ import annotations

import dataclasses

import numpy as np
from scipy import ndimage, optimize

from ..errors import TwinrayInputError
from ..geometry import SinogramGeometry
from . import _kernels

SCATTER_METHODS = ("none", "tail-fit")
#: Range of the Gaussian width, in units of the object's half-width (see _fit_plane).
MIN_WIDTH, MAX_WIDTH = 1.0, 4.0


@dataclasses.dataclass(frozen=True)
class TailFitOptions:
    """Settings of the tail fit.

    Attributes
    ----------
    acf_threshold : float
        A bin is inside the object when ``acf > 1 + acf_threshold``.
    margin_mm : float
        Tails start this far beyond the object edge (keeps out trues that
        resolution blurs past the edge), mm.
    min_tail_bins : int
        Views with fewer tail bins get their amplitude from their neighbours.
    view_smoothing : int
        Width (views) of the moving average of the amplitudes.
    """

    acf_threshold: float = 0.02
    margin_mm: float = 8.0
    min_tail_bins: int = 4
    view_smoothing: int = 5


def _fit_plane(y, acf, s, options: TailFitOptions):
    """Tail fit of one plane; returns (scatter in normalized units, tail mask)."""
    inside = acf > 1.0 + options.acf_threshold
    views = y.shape[0]
    has_object = inside.any(axis=1)
    if not has_object.any():
        return np.zeros_like(y), np.zeros_like(inside), False
    s_row = np.broadcast_to(s, y.shape)
    big = np.inf
    s_min = np.where(inside, s_row, big).min(axis=1)
    s_max = np.where(inside, s_row, -big).max(axis=1)
    # Views that miss the object (only possible for odd shapes) take the plane's mean extent.
    s_min = np.where(has_object, s_min, s_min[has_object].mean())
    s_max = np.where(has_object, s_max, s_max[has_object].mean())
    tails = (s_row < (s_min - options.margin_mm)[:, None]) | (s_row > (s_max + options.margin_mm)[:, None])
    weight = np.clip(acf - 1.0, 0.0, None)
    wsum = weight.sum(axis=1)
    centre = np.where(wsum > 0, (weight * s_row).sum(axis=1) / np.where(wsum > 0, wsum, 1.0),
                      0.5 * (s_min + s_max))
    half_width = max(float(np.mean(s_max - s_min)) / 2.0, 1e-3)
    enough = tails.sum(axis=1) >= options.min_tail_bins
    if not enough.any():
        return np.zeros_like(y), tails, False
    # Work on the tail bins only (flattened), so each trial width costs a few passes over them.
    view_of = np.nonzero(tails)[0]
    d_tail = (s_row - centre[:, None])[tails]
    y_tail = y[tails]
    use = enough[view_of]

    view_of = np.ascontiguousarray(view_of, dtype=np.int64)
    d_tail = np.ascontiguousarray(d_tail, dtype=np.float64)
    y_tail = np.ascontiguousarray(y_tail, dtype=np.float64)
    use = np.ascontiguousarray(use)
    amp_buffer = np.zeros(views)

    def fit_sigma(sigma):
        resid = _kernels.gaussian_tail_fit(d_tail, y_tail, view_of, use, float(sigma), views, amp_buffer)
        return resid, amp_buffer.copy()

    # Widths below the object's half-width are not allowed: a narrow Gaussian fitted to the steep
    # fall-off just outside the object extrapolates to a tall peak under it (on simulated data it
    # gave a 25 % scatter fraction where the truth was 11 %).
    grid = half_width * np.geomspace(MIN_WIDTH, MAX_WIDTH, 9)
    resid = [fit_sigma(sigma)[0] for sigma in grid]
    k = int(np.argmin(resid))
    lo, hi = np.log(grid[max(k - 1, 0)]), np.log(grid[min(k + 1, len(grid) - 1)])
    sigma = grid[k]
    if hi > lo:
        best = optimize.minimize_scalar(lambda t: fit_sigma(np.exp(t))[0], bounds=(lo, hi), method="bounded",
                                        options={"xatol": 1e-3})
        if best.fun <= resid[k]:
            sigma = float(np.exp(best.x))
    _, amp = fit_sigma(sigma)
    shape = np.exp(-0.5 * ((s_row - centre[:, None]) / sigma) ** 2)
    # Views with too few tail bins: interpolate their amplitude from the others.
    if not enough.all():
        idx = np.arange(views)
        amp = np.interp(idx, idx[enough], amp[enough])
    if options.view_smoothing > 1 and views > options.view_smoothing:
        amp = ndimage.uniform_filter1d(amp, options.view_smoothing, mode="nearest")
    # A scatter expectation cannot be negative; noisy tails near zero can give a slightly
    # negative least-squares amplitude (seen as -6e-17 counts, enough to upset the Poisson model).
    amp = np.maximum(amp, 0.0)
    return amp[:, None] * shape, tails, True


def tail_fit_scatter(emission, norm, acf, geometry: SinogramGeometry, options: TailFitOptions | None = None):
    """Scatter sinogram by fitting Gaussians to the tails outside the object, plane by plane.

    Parameters
    ----------
    emission : ndarray, shape ``geometry.shape``
        Prompts minus randoms, raw counts.
    norm : ndarray, shape ``geometry.shape``
        Normalization factors (1 / efficiency).
    acf : ndarray, shape ``geometry.shape``
        Attenuation correction factors (locate the object).
    geometry : SinogramGeometry
    options : TailFitOptions, optional

    Returns
    -------
    scatter : ndarray of float32, shape ``geometry.shape``
        Expected scatter counts per bin (raw, like the prompts).
    planes_without_tails : int
        Planes where no fit was possible (scatter 0 there).

    References
    ----------
    Stearns, J Nucl Med 36:105P, 1995; references.md s.12.
    """
    options = options or TailFitOptions()
    if acf is None:
        raise TwinrayInputError("--scatter tail-fit needs a mu-map (--mu): the object edge comes from the ACF")
    s = np.asarray(geometry.radial_positions_mm, dtype=np.float64)[None, :]
    out = np.zeros(geometry.shape, np.float32)
    missing = 0
    for p in range(geometry.planes):
        norm_p = np.asarray(norm[p], dtype=np.float64)
        y = np.asarray(emission[p], dtype=np.float64) * norm_p
        fitted, _, ok = _fit_plane(y, np.asarray(acf[p], dtype=np.float64), s, options)
        if not ok:
            missing += 1
            continue
        out[p] = np.where(norm_p > 0, fitted / np.where(norm_p > 0, norm_p, 1.0), 0.0)
    return out, missing


def estimate_scatter(method: str, emission, norm, acf, geometry: SinogramGeometry, options=None):
    """Dispatch to a scatter method by name (``"none"`` or ``"tail-fit"``).

    Returns
    -------
    scatter : ndarray of float32
    notes : list of str
    """
    if method == "none":
        return np.zeros(geometry.shape, np.float32), []
    if method == "tail-fit":
        scatter, missing = tail_fit_scatter(emission, norm, acf, geometry, options)
        notes = [f"scatter tail fit: {missing} of {geometry.planes} planes have no tails outside the object; "
                 "no scatter subtracted there"] if missing else []
        return scatter, notes
    raise TwinrayInputError(f"unknown scatter method {method!r}; choose {' or '.join(SCATTER_METHODS)}")
