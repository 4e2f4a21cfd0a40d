"""Figures for the report, made from plain arrays.

Every function takes numpy arrays (and the geometry they live on) and returns
a matplotlib :class:`~matplotlib.figure.Figure` made without pyplot, so no
global state is touched and no display is needed. Axes carry units.

Colours: images use perceptually uniform colour maps that stay readable with
the common colour-vision deficiencies ('viridis' for activity, 'cividis' for
sinograms, 'magma' for noise; van der Walt & Smith, the matplotlib colour map
design, 2015; Nuñez, Anderton & Renslow, PLoS ONE 13:e0199239, 2018, for
cividis). Lines use the Okabe-Ito palette (Okabe & Ito, "Color Universal
Design", 2008; hex values from memory, as widely reproduced).

Non-finite values never reach a plot: they are shown as 0 and counted, so a
caller can say so in the caption (:func:`finite_for_display`).
"""

from __future__ import annotations

import numpy as np

from ..errors import TwinrayInputError

#: Okabe-Ito colours, in the order lines are drawn (yellow last: weak on white).
OKABE_ITO = {
    "blue": "#0072B2",
    "vermillion": "#D55E00",
    "bluish green": "#009E73",
    "orange": "#E69F00",
    "reddish purple": "#CC79A7",
    "sky blue": "#56B4E9",
    "black": "#000000",
    "yellow": "#F0E442",
}
LINE_COLOURS = tuple(OKABE_ITO.values())

ACTIVITY_CMAP = "viridis"
SINOGRAM_CMAP = "cividis"
NOISE_CMAP = "magma"


def _figure(width_in: float, height_in: float, *, left_in: float = 0.75, right_in: float = 0.25,
            bottom_in: float = 0.55, top_in: float = 0.4, wspace: float = 0.3, hspace: float = 0.45):
    """A figure with fixed margins in inches.

    Fixed margins instead of a layout engine: the constrained layout costs
    about 2.5 times the drawing itself, and the report draws many figures.
    """
    from matplotlib.figure import Figure

    fig = Figure(figsize=(width_in, height_in))
    fig.subplots_adjust(left=left_in / width_in, right=1.0 - right_in / width_in, bottom=bottom_in / height_in,
                        top=1.0 - top_in / height_in, wspace=wspace, hspace=hspace)
    return fig


def _colorbar(fig, mappable, axes, label: str, shrink: float = 0.85):
    """A colour bar; large values get SI prefixes (120k rather than 120000)."""
    from matplotlib.ticker import EngFormatter

    bar = fig.colorbar(mappable, ax=axes, label=label, shrink=shrink)
    lo, hi = mappable.get_clim()
    if max(abs(lo), abs(hi)) >= 1e4:
        bar.ax.yaxis.set_major_formatter(EngFormatter(sep=""))
    return bar


def finite_for_display(values) -> tuple:
    """A float64 copy with NaN and infinities replaced by 0, and how many there were."""
    arr = np.array(values, dtype=np.float64, copy=True)
    bad = ~np.isfinite(arr)
    n_bad = int(np.count_nonzero(bad))
    if n_bad:
        arr[bad] = 0.0
    return arr, n_bad


def display_range(values, low_pct: float = 0.0, high_pct: float = 99.9) -> tuple:
    """Colour limits from percentiles of the finite values; never empty, never NaN."""
    arr = np.asarray(values, dtype=np.float64)
    finite = arr[np.isfinite(arr)]
    if finite.size == 0:
        return 0.0, 1.0
    lo = float(np.percentile(finite, low_pct)) if low_pct > 0 else float(finite.min())
    hi = float(np.percentile(finite, high_pct))
    lo = min(lo, 0.0) if lo >= -1e-12 * max(abs(hi), 1.0) else lo
    if not hi > lo:
        hi = lo + (abs(lo) if lo != 0 else 1.0)
    return lo, hi


# -- time -------------------------------------------------------------------

def _time_axis(seconds) -> tuple:
    """Seconds shown in s, or in min when the span is longer than 10 min."""
    seconds = np.asarray(seconds, dtype=np.float64)
    span = float(np.max(seconds)) if seconds.size else 0.0
    if span > 600:
        return seconds / 60.0, "time from acquisition start (min)"
    return seconds, "time from acquisition start (s)"


def count_rate_figure(bin_width_s: float, prompts_per_bin, delayed_per_bin=None, start_s: float = 0.0):
    """Prompt and delayed count rates over time.

    Parameters
    ----------
    bin_width_s : float
        Width of every time bin, s.
    prompts_per_bin : ndarray of int, shape (n,)
        Prompt events in ``[start_s + k*w, start_s + (k+1)*w)``.
    delayed_per_bin : ndarray of int, shape (n,), optional
        Delayed-window events in the same bins.
    start_s : float
        Start of the first bin, s from acquisition start.

    Returns
    -------
    Figure
    """
    from matplotlib.ticker import EngFormatter

    prompts = np.asarray(prompts_per_bin, dtype=np.float64)
    if not (np.isfinite(bin_width_s) and bin_width_s > 0):
        raise TwinrayInputError(f"count-rate bin width must be positive, got {bin_width_s}")
    edges = start_s + bin_width_s * np.arange(prompts.size + 1)
    t, xlabel = _time_axis(edges)
    fig = _figure(8.0, 3.2)
    ax = fig.add_subplot()
    series = [("prompts", prompts, LINE_COLOURS[0])]
    if delayed_per_bin is not None and np.any(np.asarray(delayed_per_bin) > 0):
        series.append(("delayed (randoms estimate)", np.asarray(delayed_per_bin, np.float64), LINE_COLOURS[1]))
    for label, counts, colour in series:
        rate = counts / bin_width_s
        ax.stairs(rate, t, label=label, color=colour, linewidth=1.6)
    ax.set_xlabel(xlabel)
    ax.set_ylabel("count rate (counts/s)")
    ax.yaxis.set_major_formatter(EngFormatter(sep=""))
    ax.set_ylim(bottom=0)
    ax.grid(alpha=0.3)
    ax.legend(frameon=False, loc="best")
    ax.set_title(f"Count rate in {bin_width_s:g} s bins", loc="left", fontsize=10)
    return fig


# -- sinograms ----------------------------------------------------------------

def _sinogram_panel(fig, ax, data, radial_mm, view_angles_rad, title, label, cmap=SINOGRAM_CMAP):
    data, _ = finite_for_display(data)
    lo, hi = display_range(data)
    deg = np.degrees(np.asarray(view_angles_rad, dtype=np.float64))
    r = np.asarray(radial_mm, dtype=np.float64)
    if r.size > 1 and deg.size > 1:
        mesh = ax.pcolormesh(r, deg, data, cmap=cmap, vmin=lo, vmax=hi, shading="nearest", rasterized=True)
    else:
        mesh = ax.imshow(data, cmap=cmap, vmin=lo, vmax=hi, aspect="auto", origin="lower")
    ax.set_xlabel("radial position s (mm)")
    ax.set_ylabel("view angle (degrees)")
    ax.set_title(title, loc="left", fontsize=10)
    _colorbar(fig, mesh, ax, label, shrink=0.9)


def sinogram_figure(panels: dict, radial_mm, view_angles_rad, units: dict | None = None):
    """One sinogram plane, several versions side by side (e.g. raw prompts and corrected).

    Parameters
    ----------
    panels : dict of str to ndarray, each shape (view, radial)
        Title -> one plane of a sinogram.
    radial_mm : ndarray, shape (radial,)
        Radial position of every bin, mm (need not be uniform).
    view_angles_rad : ndarray, shape (view,)
    units : dict of str to str, optional
        Title -> colour-bar label (default "counts per bin").

    Returns
    -------
    Figure
    """
    units = units or {}
    n = len(panels)
    if n == 0:
        raise ValueError("no sinogram to show")
    fig = _figure(4.8 * n, 4.0, right_in=0.35, wspace=0.45)
    axes = fig.subplots(1, n, squeeze=False)[0]
    for ax, (title, data) in zip(axes, panels.items()):
        data = np.asarray(data)
        if data.shape != (len(view_angles_rad), len(radial_mm)):
            raise ValueError(f"sinogram plane '{title}' has shape {data.shape}, expected "
                             f"({len(view_angles_rad)}, {len(radial_mm)})")
        _sinogram_panel(fig, ax, data, radial_mm, view_angles_rad, title, units.get(title, "counts per bin"))
    return fig


def correction_profiles_figure(radial_mm, counts: dict, factors: dict, title: str = ""):
    """Radial profiles of one view of one plane: counts on the left, factors on the right.

    Parameters
    ----------
    radial_mm : ndarray, shape (radial,)
    counts : dict of str to ndarray
        Additive terms in counts per bin (prompts, randoms, scatter, ...).
    factors : dict of str to ndarray
        Multiplicative, dimensionless factors (norm, ACF).
    title : str

    Returns
    -------
    Figure
    """
    r = np.asarray(radial_mm, dtype=np.float64)
    groups = [(name, d) for name, d in (("counts", counts), ("factors", factors)) if d]
    if not groups:
        raise ValueError("no profile to show")
    fig = _figure(5.4 * len(groups), 3.8, top_in=0.45, wspace=0.28)
    axes = fig.subplots(1, len(groups), squeeze=False)[0]
    colour_of = {}
    for ax, (kind, series) in zip(axes, groups):
        for name, values in series.items():
            values, _ = finite_for_display(values)
            if values.shape != r.shape:
                raise ValueError(f"profile '{name}' has {values.size} bins, expected {r.size}")
            colour = colour_of.setdefault(name, LINE_COLOURS[len(colour_of) % len(LINE_COLOURS)])
            ax.plot(r, values, label=name, color=colour, linewidth=1.5, drawstyle="steps-mid")
        ax.set_xlabel("radial position s (mm)")
        ax.set_ylabel("counts per bin" if kind == "counts" else "correction factor (dimensionless)")
        ax.grid(alpha=0.3)
        ax.legend(frameon=False, fontsize=8)
        if kind == "factors":
            ax.axhline(1.0, color="#999999", linewidth=0.8, linestyle=":")
    if title:
        fig.suptitle(title, x=0.01, ha="left", fontsize=10)
    return fig


# -- images -------------------------------------------------------------------

def axis_centres_mm(shape, affine) -> tuple:
    """Voxel-centre coordinates (mm) along x, y, z of an axis-aligned affine.

    Raises
    ------
    TwinrayInputError
        When the affine rotates or shears the grid (the report shows
        axis-aligned images only, as every twinray image is).
    """
    a = np.asarray(affine, dtype=np.float64)
    if a.shape != (4, 4) or not np.all(np.isfinite(a)):
        raise TwinrayInputError("image affine must be a finite 4x4 matrix")
    lin = a[:3, :3]
    off = lin - np.diag(np.diag(lin))
    scale = max(float(np.max(np.abs(np.diag(lin)))), 1e-12)
    if np.max(np.abs(off)) > 1e-6 * scale or np.any(np.diag(lin) == 0):
        raise TwinrayInputError("image affine is not axis-aligned; the report can only show axis-aligned images")
    return tuple(a[k, k] * np.arange(shape[k]) + a[k, 3] for k in range(3))


def _extent(centres: np.ndarray, step: float) -> tuple:
    """Edges (low, high) of a row of voxels whose centres increase."""
    return float(centres[0] - abs(step) / 2), float(centres[-1] + abs(step) / 2)


def _oriented(volume: np.ndarray, affine) -> tuple:
    """Flip axes with negative voxel steps so coordinates increase; return volume, centres, steps."""
    centres = list(axis_centres_mm(volume.shape, affine))
    steps = [float(affine[k][k]) for k in range(3)]
    for k in range(3):
        if steps[k] < 0:
            volume = np.flip(volume, axis=k)
            centres[k] = centres[k][::-1]
            steps[k] = -steps[k]
    return volume, centres, steps


def pick_point(volume) -> tuple:
    """Voxel indices (i, j, k) through which to cut the three slices.

    The maximum of the image smoothed by a 5-voxel box (zeros outside, so
    noisy edge slices do not win), refined to the largest raw voxel within two
    voxels of it: the slices go through the hottest structure rather than
    through one noisy voxel.
    """
    from scipy.ndimage import uniform_filter

    vol, _ = finite_for_display(volume)
    vol = np.clip(vol, 0.0, None)
    if not np.any(vol > 0):
        return tuple(n // 2 for n in vol.shape)
    smooth = uniform_filter(vol, size=5, mode="constant", cval=0.0)
    centre = np.unravel_index(int(np.argmax(smooth)), vol.shape)
    lo = [max(c - 2, 0) for c in centre]
    hi = [min(c + 3, n) for c, n in zip(centre, vol.shape)]
    box = vol[lo[0]:hi[0], lo[1]:hi[1], lo[2]:hi[2]]
    local = np.unravel_index(int(np.argmax(box)), box.shape)
    return tuple(int(lo[a] + local[a]) for a in range(3))


def _slices(volume, centres, steps, ijk):
    """The transaxial, coronal and sagittal slices, each as (data[row, col], extent, labels)."""
    i, j, k = ijk
    ext = [_extent(centres[a], steps[a]) for a in range(3)]
    return [
        ("transaxial", volume[:, :, k].T, ext[0] + ext[1], ("x (mm)", "y (mm)"),
         f"z = {centres[2][k]:.1f} mm", (centres[0][i], centres[1][j])),
        ("coronal", volume[:, j, :].T, ext[0] + ext[2], ("x (mm)", "z (mm)"),
         f"y = {centres[1][j]:.1f} mm", (centres[0][i], centres[2][k])),
        ("sagittal", volume[i, :, :].T, ext[1] + ext[2], ("y (mm)", "z (mm)"),
         f"x = {centres[0][i]:.1f} mm", (centres[1][j], centres[2][k])),
    ]


def slices_figure(volume, affine, units: str = "", title: str = "", point=None, cmap: str = ACTIVITY_CMAP,
                  vrange=None, show=None):
    """Transaxial, coronal and sagittal slices of a 3-D image, with mm axes.

    Parameters
    ----------
    volume : ndarray, shape (x, y, z)
    affine : ndarray, shape (4, 4)
        Voxel index -> scanner-frame mm (axis-aligned).
    units : str
        Colour-bar label, e.g. "Bq/mL".
    title : str
    point : tuple of 3 int, optional
        Voxel indices where the slices cross (default :func:`pick_point`).
    cmap : str
    vrange : (float, float), optional
        Colour limits (default from percentiles of the image).
    show : ndarray of bool, shape (x, y, z), optional
        Voxels to colour; the others are drawn light grey (e.g. a noise map
        outside the object, where std / mean is meaningless).

    Returns
    -------
    Figure
    """
    from matplotlib import colormaps

    vol = np.asarray(volume)
    if vol.ndim != 3:
        raise TwinrayInputError(f"slices need a 3-D image, got {vol.ndim} dimensions")
    if show is not None and np.shape(show) != vol.shape:
        raise ValueError(f"mask shape {np.shape(show)} differs from the image shape {vol.shape}")
    if point is None:
        point = pick_point(vol if show is None else np.where(show, vol, 0.0))
    vol, _ = finite_for_display(vol)
    point = tuple(int(p) for p in point)
    flipped = [affine[a][a] < 0 for a in range(3)]
    point = tuple(vol.shape[a] - 1 - point[a] if flipped[a] else point[a] for a in range(3))
    vol, centres, steps = _oriented(vol, affine)
    cmap = colormaps[cmap].with_extremes(bad="#d9d9d9")
    if show is not None:
        keep, _, _ = _oriented(np.asarray(show, dtype=bool), affine)
        lo, hi = vrange if vrange is not None else display_range(vol[keep])
        vol = np.ma.masked_array(vol, mask=~keep)
    else:
        lo, hi = vrange if vrange is not None else display_range(vol)
    # Transaxial slice large on the left; coronal above sagittal on the right.
    fig = _figure(10.5, 5.2, right_in=0.3, top_in=0.45, wspace=0.25, hspace=0.5)
    grid = fig.add_gridspec(2, 2, width_ratios=[1.0, 1.0])
    axes = [fig.add_subplot(grid[:, 0]), fig.add_subplot(grid[0, 1]), fig.add_subplot(grid[1, 1])]
    im = None
    for ax, (name, data, extent, (xl, yl), where, cross) in zip(axes, _slices(vol, centres, steps, point)):
        im = ax.imshow(data, origin="lower", extent=extent, cmap=cmap, vmin=lo, vmax=hi,
                       interpolation="nearest", aspect="equal")
        ax.axvline(cross[0], color="white", alpha=0.35, linewidth=0.7, linestyle="--")
        ax.axhline(cross[1], color="white", alpha=0.35, linewidth=0.7, linestyle="--")
        ax.set_xlabel(xl)
        ax.set_ylabel(yl)
        ax.set_title(f"{name}, {where}", fontsize=9, loc="left")
    _colorbar(fig, im, list(axes), units or "image value")
    if title:
        fig.suptitle(title, x=0.01, ha="left", fontsize=10)
    return fig


def compare_images_figure(images: dict, affine, units: str = "", point=None):
    """Transaxial slices of several images on one colour scale, and a profile through them.

    Parameters
    ----------
    images : dict of str to ndarray, each shape (x, y, z)
        Label -> image (e.g. "FBP", "OSEM"), all on the same grid.
    affine : ndarray, shape (4, 4)
    units : str
    point : tuple of 3 int, optional
        Voxel indices of the slice (z) and the profile row (y); default
        :func:`pick_point` of the first image.

    Returns
    -------
    Figure
    """
    if not images:
        raise ValueError("no image to compare")
    vols = {}
    shape = None
    for label, v in images.items():
        v, _ = finite_for_display(v)
        if v.ndim != 3:
            raise TwinrayInputError(f"image '{label}' is not 3-D")
        if shape is not None and v.shape != shape:
            raise TwinrayInputError(f"images to compare differ in shape: {shape} and {v.shape} ('{label}')")
        shape = v.shape
        vols[label] = v
    first = next(iter(vols.values()))
    if point is None:
        point = pick_point(first)
    flipped = [affine[a][a] < 0 for a in range(3)]
    point = tuple(shape[a] - 1 - int(point[a]) if flipped[a] else int(point[a]) for a in range(3))
    oriented = {}
    for label, v in vols.items():
        ov, centres, steps = _oriented(v, affine)
        oriented[label] = ov
    i, j, k = point
    lo = min(display_range(v[:, :, k])[0] for v in oriented.values())
    hi = max(display_range(v[:, :, k])[1] for v in oriented.values())
    n = len(oriented)
    fig = _figure(3.9 * n + 4.8, 3.9, right_in=0.3, top_in=0.4, wspace=0.45)
    axes = fig.subplots(1, n + 1, gridspec_kw={"width_ratios": [1.0] * n + [1.3]})
    ext = _extent(centres[0], steps[0]) + _extent(centres[1], steps[1])
    im = None
    for ax, (label, v) in zip(axes[:n], oriented.items()):
        im = ax.imshow(v[:, :, k].T, origin="lower", extent=ext, cmap=ACTIVITY_CMAP, vmin=lo, vmax=hi,
                       interpolation="nearest", aspect="equal")
        ax.axhline(centres[1][j], color="white", alpha=0.5, linewidth=0.8, linestyle="--")
        ax.set_title(label, fontsize=10, loc="left")
        ax.set_xlabel("x (mm)")
        ax.set_ylabel("y (mm)")
    _colorbar(fig, im, list(axes[:n]), units or "image value")
    prof_ax = axes[n]
    for c, (label, v) in enumerate(oriented.items()):
        prof_ax.plot(centres[0], v[:, j, k], label=label, color=LINE_COLOURS[c % len(LINE_COLOURS)],
                     linewidth=1.5, drawstyle="steps-mid")
    prof_ax.set_xlabel("x (mm)")
    prof_ax.set_ylabel(units or "image value")
    prof_ax.set_title(f"profile at y = {centres[1][j]:.1f} mm, z = {centres[2][k]:.1f} mm", fontsize=9, loc="left")
    prof_ax.grid(alpha=0.3)
    prof_ax.legend(frameon=False, fontsize=8)
    return fig


def frames_figure(volume4d, affine, frame_mid_s, units: str = "", max_frames: int = 12, z_index=None):
    """Transaxial slices of the frames of a dynamic image, on one colour scale.

    Parameters
    ----------
    volume4d : ndarray, shape (x, y, z, frame)
    affine : ndarray, shape (4, 4)
    frame_mid_s : ndarray, shape (frame,)
        Mid-time of every frame, s (shown in the panel titles).
    units : str
    max_frames : int
        At most this many frames, evenly chosen, are shown.
    z_index : int, optional
        Slice index (default: the slice with most content over all frames).

    Returns
    -------
    Figure
    """
    vol = np.asarray(volume4d)
    if vol.ndim != 4:
        raise TwinrayInputError(f"a dynamic image is 4-D, got {vol.ndim} dimensions")
    n_frames = vol.shape[3]
    mids = np.asarray(frame_mid_s, dtype=np.float64)
    if mids.size != n_frames:
        raise ValueError(f"{mids.size} frame times for {n_frames} frames")
    chosen = np.unique(np.linspace(0, n_frames - 1, min(max_frames, n_frames)).round().astype(int))
    total, _ = finite_for_display(vol.sum(axis=3))
    if z_index is None:
        z_index = pick_point(total)[2]
    rows = int(np.ceil(len(chosen) / 6))
    cols = int(np.ceil(len(chosen) / rows))
    fig = _figure(2.4 * cols + 1.4, 2.4 * rows + 0.6, left_in=0.6, right_in=0.3, top_in=0.6, wspace=0.45, hspace=0.5)
    axes = np.atleast_1d(fig.subplots(rows, cols, squeeze=False)).ravel()
    slices = []
    for f in chosen:
        frame, _ = finite_for_display(vol[:, :, :, f])
        ov, centres, steps = _oriented(frame, affine)
        kk = vol.shape[2] - 1 - z_index if affine[2][2] < 0 else z_index
        slices.append(ov[:, :, kk])
    lo = min(display_range(s)[0] for s in slices)
    hi = max(display_range(s)[1] for s in slices)
    ext = _extent(centres[0], steps[0]) + _extent(centres[1], steps[1])
    im = None
    for ax, f, s in zip(axes, chosen, slices):
        im = ax.imshow(s.T, origin="lower", extent=ext, cmap=ACTIVITY_CMAP, vmin=lo, vmax=hi,
                       interpolation="nearest", aspect="equal")
        t = mids[f]
        ax.set_title(f"frame {f}, mid {t / 60:.1f} min" if mids.max() > 600 else f"frame {f}, mid {t:.0f} s",
                     fontsize=8, loc="left")
        ax.tick_params(labelsize=7)
        ax.set_xlabel("x (mm)", fontsize=7)
        ax.set_ylabel("y (mm)", fontsize=7)
    for ax in axes[len(chosen):]:
        ax.set_visible(False)
    _colorbar(fig, im, list(axes), units or "image value")
    fig.suptitle(f"transaxial slice z = {centres[2][kk]:.1f} mm", x=0.01, ha="left", fontsize=10)
    return fig


# -- time-activity curves and noise -------------------------------------------

def tac_figure(curves: dict, units: str = "", truth: dict | None = None):
    """Time-activity curves with frame durations as horizontal bars and region std as error bars.

    Parameters
    ----------
    curves : dict of str to dict
        Region -> ``{"mid_s", "duration_s", "mean", "std"}`` arrays (one value
        per frame).
    units : str
        Units of the mean, e.g. "Bq/mL".
    truth : dict of str to (ndarray, ndarray), optional
        Region -> (time s, true value): drawn dashed in the region's colour.

    Returns
    -------
    Figure
    """
    if not curves:
        raise ValueError("no time-activity curve to show")
    fig = _figure(8.0, 3.8)
    ax = fig.add_subplot()
    all_mid = np.concatenate([np.asarray(c["mid_s"], np.float64) for c in curves.values()])
    scale, xlabel = (60.0, "frame mid-time (min)") if all_mid.size and all_mid.max() > 600 else (1.0, "frame mid-time (s)")
    markers = "osD^vP*X"
    for n, (region, c) in enumerate(curves.items()):
        mid, _ = finite_for_display(c["mid_s"])
        mean, _ = finite_for_display(c["mean"])
        std, _ = finite_for_display(c.get("std", np.zeros_like(mean)))
        dur, _ = finite_for_display(c.get("duration_s", np.zeros_like(mean)))
        colour = LINE_COLOURS[n % len(LINE_COLOURS)]
        ax.errorbar(mid / scale, mean, xerr=dur / 2 / scale, yerr=std, label=region,
                    color=colour, marker=markers[n % len(markers)], markersize=4,
                    linewidth=1.3, capsize=0, elinewidth=0.8)
        if truth and region in truth:
            t, v = (finite_for_display(a)[0] for a in truth[region])
            ax.plot(t / scale, v, color=colour, linestyle="--", linewidth=1.0, label=f"{region} (true)")
    ax.set_xlabel(xlabel)
    ax.set_ylabel(f"region mean ({units})" if units else "region mean")
    ax.grid(alpha=0.3)
    ax.legend(frameon=False, fontsize=8)
    ax.set_title("Time-activity curves (bars: frame duration; error bars: voxel standard deviation in the region)",
                 fontsize=9, loc="left")
    return fig


def power_law_fit(counts, noise) -> tuple:
    """Least-squares fit of ``noise = a * counts**b`` in log-log space.

    For Poisson data the relative noise falls as ``counts**-0.5`` (the
    variance of a Poisson count equals its mean), so ``b`` near -0.5 says the
    noise behaves as counting statistics predict.

    Parameters
    ----------
    counts, noise : ndarray
        Positive values; pairs with a non-positive or non-finite entry are
        ignored.

    Returns
    -------
    exponent : float
        ``b`` (NaN when fewer than two usable points).
    prefactor : float
        ``a``.
    """
    c = np.asarray(counts, dtype=np.float64).ravel()
    s = np.asarray(noise, dtype=np.float64).ravel()
    ok = np.isfinite(c) & np.isfinite(s) & (c > 0) & (s > 0)
    if np.count_nonzero(ok) < 2 or np.ptp(np.log(c[ok])) == 0:
        return float("nan"), float("nan")
    b, log_a = np.polyfit(np.log(c[ok]), np.log(s[ok]), 1)
    return float(b), float(np.exp(log_a))


def noise_vs_counts_figure(series: dict, ylabel: str = "coefficient of variation"):
    """Noise against counts on log-log axes, with a fitted power law and the Poisson slope.

    Parameters
    ----------
    series : dict of str to (counts, noise)
        Label (a region) -> arrays of counts (events) and noise (COV or std)
        at several count levels.
    ylabel : str

    Returns
    -------
    Figure
    """
    if not series:
        raise ValueError("no noise data to show")
    fig = _figure(6.6, 4.2, left_in=1.15)
    ax = fig.add_subplot()
    for n, (label, (counts, noise)) in enumerate(series.items()):
        c = np.asarray(counts, np.float64)
        s = np.asarray(noise, np.float64)
        ok = np.isfinite(c) & np.isfinite(s) & (c > 0) & (s > 0)
        if not np.any(ok):
            continue
        colour = LINE_COLOURS[n % len(LINE_COLOURS)]
        b, a = power_law_fit(c[ok], s[ok])
        text = f"{label}" if not np.isfinite(b) else f"{label} (slope {b:.2f})"
        ax.plot(c[ok], s[ok], "o", color=colour, label=text, markersize=5)
        if np.isfinite(b):
            cc = np.geomspace(c[ok].min(), c[ok].max(), 50)
            ax.plot(cc, a * cc ** b, color=colour, linewidth=1.0)
            ref = s[ok][np.argmax(c[ok])] * (cc / c[ok].max()) ** -0.5
            ax.plot(cc, ref, color="#888888", linewidth=0.8, linestyle=":")
    ax.plot([], [], color="#888888", linewidth=0.8, linestyle=":", label="Poisson slope -1/2")
    ax.set_xscale("log")
    ax.set_yscale("log")
    ax.set_xlabel("counts (events)")
    ax.set_ylabel(ylabel)
    ax.grid(alpha=0.3, which="both")
    ax.legend(frameon=False, fontsize=8)
    return fig


def crystal_efficiency_figure(efficiency, crystals_per_ring: int):
    """Crystal efficiencies as a ring-by-crystal map and a histogram.

    Parameters
    ----------
    efficiency : ndarray, shape (rings * crystals_per_ring,)
        One value per global crystal id (mean 1).
    crystals_per_ring : int

    Returns
    -------
    Figure
    """
    eff, _ = finite_for_display(efficiency)
    if crystals_per_ring <= 0 or eff.size % crystals_per_ring:
        raise TwinrayInputError(f"{eff.size} crystal efficiencies do not fill rings of {crystals_per_ring}")
    grid = eff.reshape(-1, crystals_per_ring)
    fig = _figure(11.0, 3.6, wspace=0.3)
    ax_map, ax_hist = fig.subplots(1, 2, gridspec_kw={"width_ratios": [2.2, 1.0]})
    lo, hi = display_range(eff, 0.5, 99.5)
    im = ax_map.imshow(grid, origin="lower", aspect="auto", cmap=SINOGRAM_CMAP, vmin=lo, vmax=hi,
                       interpolation="nearest")
    ax_map.set_xlabel("crystal index in ring")
    ax_map.set_ylabel("ring")
    fig.colorbar(im, ax=ax_map, label="relative efficiency (mean 1)")
    ax_hist.hist(eff, bins=40, color=LINE_COLOURS[0])
    ax_hist.set_xlabel("relative efficiency (mean 1)")
    ax_hist.set_ylabel("crystals")
    ax_hist.grid(alpha=0.3)
    return fig
