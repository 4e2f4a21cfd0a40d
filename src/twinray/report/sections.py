"""Report sections read from the files the commands write.

Each ``add_*_sections`` function reads one kind of output file by its
contract (data contract sections 3 and 4, the TAC CSV of the command-line
contract, ``summary.json`` of ``resample``) and adds headings, tables and
figures to a :class:`~twinray.report.builder.Report`. They depend only on the
files, not on how the command that wrote them works.
"""

from __future__ import annotations

import csv
import json
import math
from pathlib import Path

import numpy as np

from ..errors import TwinrayInputError
from . import figures
from .builder import Report
from ..sinogram_io import decode_attribute

TAC_COLUMNS = ("region", "frame", "start_s", "duration_s", "mid_s", "mean", "std", "voxels")
_GEOMETRY_ATTRS = ("view_angles_rad", "radial_positions_mm", "plane_z_mm", "plane_ring_difference",
                   "scanner", "twinray_geometry", "accounting")
_METADATA_LABELS = {"isotope": "isotope", "acquisition_start": "acquisition start",
                    "injection_time": "injection time", "injected_activity_bq": "injected activity (Bq)",
                    "duration_s": "acquisition duration (s)"}
_SIDECAR_KEYS = ("Units", "TracerRadionuclide", "ReconMethodName", "ReconMethodParameterLabels",
                 "ReconMethodParameterValues", "ReconFilterType", "ReconFilterSize", "AttenuationCorrection",
                 "ImageDecayCorrected", "ImageDecayCorrectionTime")


_decode = decode_attribute


def _scanner_facts(scanner) -> dict:
    if not isinstance(scanner, dict):
        return {}
    keys = ("name", "rings", "crystals_per_ring", "radius_mm", "axial_pitch_mm", "tof_fwhm_ps")
    return {f"scanner {k.replace('_', ' ')}": scanner[k] for k in keys if k in scanner}


# -- events ---------------------------------------------------------------------

def add_events_sections(report: Report, events_path, scanner=None) -> None:
    """Counts by kind, embedded metadata and the count rate over time of an event study."""
    from ..events import event_statistics, open_events

    source = open_events(events_path, scanner=scanner)
    stats = event_statistics(source)
    report.heading(f"Events: {Path(events_path).name}")
    meta = source.metadata or {}
    facts = {
        "files": len(source.paths),
        "events read": stats.rows,
        "prompts": stats.prompts,
        "delayed": stats.delayed,
        "invalid crystal ids": stats.invalid_crystal,
        "columns": ", ".join(source.columns),
        "first event time (s)": None if stats.time_min_ns is None else stats.time_min_ns * 1e-9,
        "last event time (s)": None if stats.time_max_ns is None else stats.time_max_ns * 1e-9,
    }
    for key, label in _METADATA_LABELS.items():
        if key in meta:
            facts[label] = meta[key]
    facts.update(_scanner_facts(source.scanner.to_dict()))
    if stats.energy_kev:
        facts["photon energy range (keV)"] = [stats.energy_kev.get("min"), stats.energy_kev.get("max")]
    report.key_values(facts, caption="The study")
    if stats.prompts_per_bin.size:
        fig = figures.count_rate_figure(stats.rate_bin_s, stats.prompts_per_bin, stats.delayed_per_bin)
        report.figure(fig, caption=("Prompt and delayed-window count rates over the acquisition. A falling rate "
                                    "follows the isotope's decay; steps show changes in activity."))
    if source.ignored:
        report.note("Files in the study folder that are not Parquet and were ignored: " + ", ".join(source.ignored))


# -- sinograms ------------------------------------------------------------------

def _plane_sum(dataset, p: int) -> np.ndarray:
    """One plane (view, radial) of a dataset, summing a leading TOF axis if there is one."""
    if dataset.ndim == 4:
        return np.asarray(dataset[:, p], dtype=np.float64).sum(axis=0)
    return np.asarray(dataset[p], dtype=np.float64)


def _dataset_stats(dataset) -> dict:
    """Sum, min and max of a dataset, read one plane at a time."""
    planes = dataset.shape[-3]
    total, lo, hi, bad = 0.0, math.inf, -math.inf, 0
    for p in range(planes):
        a = _plane_sum(dataset, p)
        finite = np.isfinite(a)
        bad += int(a.size - np.count_nonzero(finite))
        if np.any(finite):
            v = a[finite]
            total += float(v.sum())
            lo = min(lo, float(v.min()))
            hi = max(hi, float(v.max()))
    return {"sum": total, "min": lo, "max": hi, "non-finite": bad}


def choose_plane(f) -> int:
    """The direct plane (ring difference 0) with the most prompts; any plane if none is direct."""
    rd = np.asarray(f.attrs.get("plane_ring_difference", []))
    candidates = np.flatnonzero(rd == 0) if rd.size else np.arange(f["prompts"].shape[-3])
    if candidates.size == 0:
        candidates = np.arange(f["prompts"].shape[-3])
    sums = [_plane_sum(f["prompts"], int(p)).sum() for p in candidates]
    return int(candidates[int(np.argmax(sums))])


def _open_h5(path, what: str):
    import h5py

    path = Path(path)
    if not path.is_file():
        raise TwinrayInputError(f"{what} {path} does not exist")
    try:
        return h5py.File(path, "r")
    except OSError:
        raise TwinrayInputError(f"{what} {path} is not a readable HDF5 file") from None


def _geometry(f, path) -> tuple:
    try:
        views = np.asarray(f.attrs["view_angles_rad"], dtype=np.float64)
        radial = np.asarray(f.attrs["radial_positions_mm"], dtype=np.float64)
    except KeyError as exc:
        raise TwinrayInputError(f"{path}: missing root attribute {exc.args[0]}") from None
    plane_z = np.asarray(f.attrs.get("plane_z_mm", []), dtype=np.float64)
    return views, radial, plane_z


def add_sinogram_sections(report: Report, sinogram_path, plane: int | None = None, view: int = 0) -> None:
    """Totals, accounting, raw vs corrected plane and correction profiles of a sinogram file.

    Parameters
    ----------
    report : Report
    sinogram_path : path-like
        HDF5 sinogram (data contract section 3).
    plane : int, optional
        Plane shown (default :func:`choose_plane`).
    view : int
        View whose radial profiles are drawn.
    """
    path = Path(sinogram_path)
    with _open_h5(path, "sinogram file") as f:
        if "prompts" not in f:
            raise TwinrayInputError(f"{path}: no 'prompts' dataset; is this a sinogram file?")
        views, radial, plane_z = _geometry(f, path)
        shape = f["prompts"].shape
        if shape[-2:] != (views.size, radial.size):
            raise TwinrayInputError(f"{path}: prompts shape {shape} does not match {views.size} views x "
                                    f"{radial.size} radial bins")
        n_planes = shape[-3]
        if plane is None:
            plane = choose_plane(f)
        if not 0 <= plane < n_planes:
            raise TwinrayInputError(f"{path}: plane {plane} is outside 0..{n_planes - 1}")
        if not 0 <= view < views.size:
            raise TwinrayInputError(f"{path}: view {view} is outside 0..{views.size - 1}")
        attrs = {k: _decode(v) for k, v in f.attrs.items()}
        present = [n for n in ("prompts", "delayed", "randoms", "scatter", "norm", "acf", "corrected") if n in f]
        stats = {n: _dataset_stats(f[n]) for n in present}
        planes = {n: _plane_sum(f[n], plane) for n in present}

    report.heading(f"Sinogram: {path.name}")
    facts = {
        "shape (plane, view, radial)": list(shape),
        "time-of-flight bins": shape[0] if len(shape) == 4 else 0,
        "frame start (s)": attrs.get("frame_start_s"),
        "frame duration (s)": attrs.get("frame_duration_s"),
        "datasets": ", ".join(present),
    }
    for key, value in attrs.items():
        if key in _GEOMETRY_ATTRS or key in ("frame_start_s", "frame_duration_s"):
            continue
        if isinstance(value, (str, int, float, bool)) or (isinstance(value, list) and len(value) <= 8):
            facts[key.replace("_", " ")] = value
    facts.update(_scanner_facts(attrs.get("scanner")))
    report.key_values(facts, caption="Layout and frame")
    report.table(["dataset", "sum", "min", "max", "non-finite bins"],
                 [(n, s["sum"], s["min"], s["max"], s["non-finite"]) for n, s in stats.items()],
                 caption="Dataset totals (counts for prompts, delayed, randoms, scatter, corrected; "
                         "dimensionless factors for norm and acf)")
    if isinstance(attrs.get("accounting"), dict):
        report.accounting(attrs["accounting"])

    z_text = f", z = {plane_z[plane]:.1f} mm" if plane < plane_z.size else ""
    panels = {"prompts (raw)": planes["prompts"]}
    units = {"prompts (raw)": "counts per bin"}
    if "corrected" in planes:
        panels["corrected"] = planes["corrected"]
        units["corrected"] = "corrected counts per bin"
    elif "delayed" in planes:
        panels["delayed"] = planes["delayed"]
    report.figure(figures.sinogram_figure(panels, radial, views, units),
                  caption=(f"Plane {plane}{z_text}. Raw prompts beside the corrected sinogram "
                           "norm x acf x (prompts - randoms - scatter)." if "corrected" in planes else
                           f"Plane {plane}{z_text}."))
    counts = {n: planes[n][view] for n in ("prompts", "randoms", "scatter") if n in planes}
    factors = {{"norm": "norm", "acf": "ACF"}[n]: planes[n][view] for n in ("norm", "acf") if n in planes}
    report.figure(figures.correction_profiles_figure(radial, counts, factors,
                                                     title=f"plane {plane}{z_text}, view {view} "
                                                           f"({math.degrees(views[view]):.1f} degrees)"),
                  caption=("Radial profiles of one view: measured prompts with the additive randoms and scatter "
                           "estimates (left), and the multiplicative normalization and attenuation correction "
                           "factors (right)."))


def add_normalization_sections(report: Report, norm_path) -> None:
    """Crystal efficiencies and one plane of the normalization factors."""
    path = Path(norm_path)
    with _open_h5(path, "normalization file") as f:
        if "crystal_efficiency" not in f or "norm" not in f:
            raise TwinrayInputError(f"{path}: a normalization file needs 'crystal_efficiency' and 'norm' datasets")
        eff = np.asarray(f["crystal_efficiency"][()], dtype=np.float64).ravel()
        views, radial, plane_z = _geometry(f, path)
        attrs = {k: _decode(v) for k, v in f.attrs.items()}
        rd = np.asarray(f.attrs.get("plane_ring_difference", []))
        direct = np.flatnonzero(rd == 0) if rd.size else np.arange(f["norm"].shape[-3])
        plane = int(direct[direct.size // 2]) if direct.size else f["norm"].shape[-3] // 2
        norm_plane = _plane_sum(f["norm"], plane)
    scanner = attrs.get("scanner") if isinstance(attrs.get("scanner"), dict) else {}
    report.heading(f"Normalization: {path.name}")
    finite = eff[np.isfinite(eff)]
    facts = {
        "crystals": eff.size,
        "efficiency mean": float(finite.mean()) if finite.size else None,
        "efficiency standard deviation": float(finite.std()) if finite.size else None,
        "efficiency range": [float(finite.min()), float(finite.max())] if finite.size else None,
    }
    facts.update(_scanner_facts(scanner))
    report.key_values(facts, caption="Crystal efficiencies (relative, mean 1)")
    cpr = int(scanner.get("crystals_per_ring", 0) or 0)
    if cpr > 0 and eff.size % cpr == 0:
        report.figure(figures.crystal_efficiency_figure(eff, cpr),
                      caption="Relative detection efficiency of every crystal, by ring and position in the ring.")
    z_text = f", z = {plane_z[plane]:.1f} mm" if plane < plane_z.size else ""
    report.figure(figures.sinogram_figure({"norm": norm_plane}, radial, views, {"norm": "normalization factor"}),
                  caption=f"Normalization factors (1 / detection efficiency) of plane {plane}{z_text}.")


# -- images ---------------------------------------------------------------------

def read_image_with_sidecar(path) -> tuple:
    """Data (float32), affine and sidecar (``{}`` if none) of a NIfTI image."""
    from ..images import read_image

    return read_image(path)


def _image_facts(data, affine, sidecar) -> dict:
    facts = {
        "matrix": list(data.shape),
        "voxel size (mm)": [abs(float(affine[k][k])) for k in range(3)],
    }
    finite = data[np.isfinite(data)]
    if finite.size:
        facts["minimum"] = float(finite.min())
        facts["maximum"] = float(finite.max())
        facts["mean"] = float(finite.mean())
    if finite.size != data.size:
        facts["non-finite voxels (shown as 0)"] = int(data.size - finite.size)
    for key in _SIDECAR_KEYS:
        if key in sidecar:
            facts[key] = sidecar[key]
    return facts


def _accounting_of(sidecar: dict):
    tw = sidecar.get("twinray")
    if isinstance(tw, dict):
        acc = tw.get("accounting", tw if "read" in tw else None)
        if isinstance(acc, dict) and "read" in acc:
            return acc
    return None


def add_image_sections(report: Report, image_path, label: str | None = None) -> None:
    """Facts from the sidecar and three orthogonal slices of a 3-D image (or the frames of a 4-D one)."""
    path = Path(image_path)
    data, affine, sidecar = read_image_with_sidecar(path)
    units = str(sidecar.get("Units", "")) if sidecar else ""
    report.heading(label or f"Image: {path.name}")
    report.key_values(_image_facts(data, affine, sidecar), caption="Image and how it was made")
    if data.ndim == 4 and data.shape[3] == 1:
        data = data[..., 0]
    if data.ndim == 3:
        report.figure(figures.slices_figure(data, affine, units=units),
                      caption=("Transaxial, coronal and sagittal slices in the scanner frame (mm); dashed lines "
                               "mark where the other two slices cut."))
    elif data.ndim == 4:
        add_frames_figure(report, data, affine, sidecar)
    else:
        raise TwinrayInputError(f"{path}: image has {data.ndim} dimensions; expected 3 or 4")
    acc = _accounting_of(sidecar)
    if acc:
        report.accounting(acc)


def frame_times(sidecar: dict, n_frames: int) -> tuple:
    """Frame starts and durations (s) from a BIDS sidecar; frame indices when absent."""
    start = np.asarray(sidecar.get("FrameTimesStart", []), dtype=np.float64).ravel()
    dur = np.asarray(sidecar.get("FrameDuration", []), dtype=np.float64).ravel()
    if start.size != n_frames or dur.size != n_frames:
        return np.arange(n_frames, dtype=np.float64), np.ones(n_frames)
    return start, dur


def add_frames_figure(report: Report, data4d, affine, sidecar: dict) -> None:
    start, dur = frame_times(sidecar, data4d.shape[3])
    units = str(sidecar.get("Units", ""))
    report.figure(figures.frames_figure(data4d, affine, start + dur / 2, units=units),
                  caption="Frames of the dynamic image, one transaxial slice, on one colour scale.")
    rows = []
    dcf = sidecar.get("DecayCorrectionFactor")
    dcf = list(dcf) if isinstance(dcf, list) and len(dcf) == data4d.shape[3] else [None] * data4d.shape[3]
    for k in range(data4d.shape[3]):
        frame = data4d[..., k]
        finite = frame[np.isfinite(frame)]
        rows.append((k, start[k], dur[k], dcf[k], float(finite.mean()) if finite.size else None))
    report.table(["frame", "start (s)", "duration (s)", "decay correction factor", f"image mean ({units})"],
                 rows, caption="Frames")


def add_comparison_sections(report: Report, images: dict, heading: str = "FBP and OSEM side by side") -> None:
    """Several images of one grid on one colour scale (e.g. ``{"FBP": path, "OSEM": path}``)."""
    loaded = {}
    affine = units = None
    for label, p in images.items():
        data, aff, side = read_image_with_sidecar(p)
        if data.ndim == 4 and data.shape[3] == 1:
            data = data[..., 0]
        loaded[label] = data
        affine = aff if affine is None else affine
        units = units or str(side.get("Units", ""))
    report.heading(heading)
    report.figure(figures.compare_images_figure(loaded, affine, units=units),
                  caption=("The same slice of each image on one colour scale, and a horizontal profile through "
                           "them (dashed line)."))
    rows = []
    for label, data in loaded.items():
        finite = data[np.isfinite(data)]
        rows.append((label, float(finite.mean()), float(finite.std()), float(finite.min()), float(finite.max())))
    report.table(["image", f"mean ({units})", "standard deviation", "minimum", "maximum"], rows,
                 caption="Whole-image statistics")


# -- time-activity curves ---------------------------------------------------------

def read_tac_csv(path) -> dict:
    """Read a TAC CSV (``region,frame,start_s,duration_s,mid_s,mean,std,voxels``).

    Returns
    -------
    dict of str to dict of ndarray
        Region -> columns, frames in file order.
    """
    path = Path(path)
    if not path.is_file():
        raise TwinrayInputError(f"TAC file {path} does not exist")
    with open(path, newline="") as fh:
        reader = csv.DictReader(fh)
        missing = [c for c in TAC_COLUMNS if c not in (reader.fieldnames or [])]
        if missing:
            raise TwinrayInputError(f"TAC file {path} lacks column(s) {', '.join(missing)}")
        curves: dict = {}
        for line, row in enumerate(reader, start=2):
            region = row["region"]
            c = curves.setdefault(region, {k: [] for k in TAC_COLUMNS if k != "region"})
            for k in c:
                try:
                    c[k].append(float(row[k]))
                except (TypeError, ValueError):
                    raise TwinrayInputError(f"TAC file {path} line {line}: column {k} is not a number "
                                            f"({row[k]!r})") from None
    return {r: {k: np.asarray(v) for k, v in c.items()} for r, c in curves.items()}


def true_curves_from_simulation(truth_json, regions) -> dict:
    """True time courses of phantom shapes, from a simulator truth JSON.

    Every shape with a time-activity curve: concentration (Bq/mL) times the
    curve's multiplier, linearly interpolated (the simulator's model), i.e.
    the decay-corrected concentration a perfect image would show.

    Parameters
    ----------
    truth_json : path-like
        ``<stem>_truth.json`` written by ``twinray simulate``.
    regions : iterable of str
        Region names; those that name a shape get a curve.

    Returns
    -------
    dict of str to (ndarray, ndarray)
        Region -> (times s, Bq/mL) on a 1 s grid over the acquisition.
    """
    path = Path(truth_json)
    try:
        truth = json.loads(path.read_text())
    except (OSError, json.JSONDecodeError):
        raise TwinrayInputError(f"truth file {path} is missing or not valid JSON") from None
    duration = float(truth.get("duration_s", 0.0) or 0.0)
    t = np.linspace(0.0, duration, max(int(duration) + 1, 2))
    out = {}
    wanted = set(regions)
    for shape in truth.get("shapes", []):
        name = shape.get("name")
        if name not in wanted or not _numeric(shape.get("activity_bq_per_ml")):
            continue
        tac = shape.get("tac") or {"times_s": [0.0, max(duration, 1.0)], "values": [1.0, 1.0]}
        out[name] = (t, float(shape["activity_bq_per_ml"]) * np.interp(t, tac["times_s"], tac["values"]))
    return out


def _frame_average(curve, start: float, duration: float):
    t, v = curve
    if duration <= 0:
        return float(np.interp(start, t, v))
    grid = np.linspace(start, start + duration, 201)
    return float(np.mean(np.interp(grid, t, v)))


def add_tac_sections(report: Report, tac_path, units: str = "", truth: dict | None = None) -> None:
    """The time-activity curves of a TAC CSV, as a plot and a table (with true values when given)."""
    curves = read_tac_csv(tac_path)
    report.heading(f"Time-activity curves: {Path(tac_path).name}")
    if not curves:
        report.note("The TAC file has no rows.")
        return
    truth = {r: c for r, c in (truth or {}).items() if r in curves}
    report.figure(figures.tac_figure(curves, units=units, truth=truth),
                  caption="Mean of every region in every frame, plotted at the frame mid-time"
                          + ("; dashed: the true concentration of the phantom." if truth else "."))
    rows = []
    for region, c in curves.items():
        for k in range(c["frame"].size):
            row = [region, int(c["frame"][k]), c["mid_s"][k], c["mean"][k], c["std"][k], int(c["voxels"][k])]
            if truth:
                row.append(_frame_average(truth[region], c["start_s"][k], c["duration_s"][k])
                           if region in truth else None)
            rows.append(row)
    header = ["region", "frame", "mid-time (s)", f"mean ({units})" if units else "mean", "std", "voxels"]
    if truth:
        header.append("true frame mean")
    report.table(header, rows, caption="Region statistics per frame")


def add_dynamic_sections(report: Report, dynamic_dir_or_image, tac_path=None, truth: dict | None = None) -> None:
    """The 4-D image of ``dynamic`` (frames, decay factors) and, if given, its TACs."""
    p = Path(dynamic_dir_or_image)
    image = p / "dynamic.nii.gz" if p.is_dir() else p
    data, affine, sidecar = read_image_with_sidecar(image)
    report.heading(f"Dynamic study: {image.name}")
    facts = _image_facts(data, affine, sidecar)
    if "FrameTimesStart" in sidecar:
        facts["frames"] = len(sidecar["FrameTimesStart"])
    report.key_values(facts, caption="Dynamic image")
    if data.ndim == 4:
        add_frames_figure(report, data, affine, sidecar)
    else:
        report.figure(figures.slices_figure(data, affine, units=str(sidecar.get("Units", ""))),
                      caption="The single frame.")
    if tac_path is not None:
        add_tac_sections(report, tac_path, units=str(sidecar.get("Units", "")), truth=truth)


# -- resampling noise study ---------------------------------------------------------

def _numeric(x) -> bool:
    return isinstance(x, (int, float)) and not isinstance(x, bool) and math.isfinite(float(x))


def noise_series_from_summary(summary) -> dict:
    """Noise-against-counts data of a ``summary.json``.

    The ``resample`` layout: ``levels`` is a list with, per count level,
    ``mean_prompts`` and ``regions`` (region -> ``voxel_cov``,
    ``roi_mean_cov``). Failing that, any list of records with a numeric key
    containing "count" and one containing "cov" (else "std") is used, grouped
    by the records' ``region`` key.

    Returns
    -------
    dict of str to (ndarray, ndarray)
        Series label -> (counts, noise); only series with two or more levels.
    """
    found: dict = {}
    levels = summary.get("levels") if isinstance(summary, dict) else None
    if isinstance(levels, list) and levels and all(isinstance(lv, dict) and "regions" in lv for lv in levels):
        for lv in levels:
            counts = lv.get("mean_prompts")
            regions = lv.get("regions")
            if not _numeric(counts) or not isinstance(regions, dict):
                continue
            for region, stats in regions.items():
                if not isinstance(stats, dict):
                    continue
                for key, label in (("voxel_cov", "voxel COV"), ("roi_mean_cov", "regional-mean COV")):
                    # Thinning: scan_* is the noise of an independent scan of P times the
                    # duration (the binomial spread of thinned copies divided by sqrt(1 - P)).
                    if _numeric(stats.get(f"scan_{key}")):
                        key, label = f"scan_{key}", f"{label} (scan-equivalent)"
                    if _numeric(stats.get(key)):
                        c, n = found.setdefault(f"{region}, {label}", ([], []))
                        c.append(float(counts))
                        n.append(float(stats[key]))
    else:
        def visit(node, region_hint=""):
            if isinstance(node, dict):
                for k, v in node.items():
                    visit(v, region_hint=k if isinstance(v, (list, dict)) else region_hint)
            elif isinstance(node, list):
                for item in node:
                    if isinstance(item, dict):
                        count_key = next((k for k, v in item.items() if "count" in k.lower() and _numeric(v)), None)
                        noise_key = (next((k for k, v in item.items() if "cov" in k.lower() and _numeric(v)), None)
                                     or next((k for k, v in item.items() if "std" in k.lower() and _numeric(v)),
                                             None))
                        if count_key and noise_key:
                            c, n = found.setdefault(str(item.get("region", region_hint or "image")), ([], []))
                            c.append(float(item[count_key]))
                            n.append(float(item[noise_key]))
                            continue
                    visit(item, region_hint)

        visit(summary)
    return {r: (np.asarray(c), np.asarray(n)) for r, (c, n) in found.items() if len(c) >= 2}


_SUMMARY_FACTS = {"mode": "mode", "replicates": "replicates per level", "fractions": "fractions kept",
                  "seed": "seed", "frame_s": "frame (s)", "effective_duration_s": "effective duration (s)",
                  "units": "image units"}


def _level_rows(summary: dict) -> list:
    rows = []
    for lv in summary.get("levels", []) if isinstance(summary.get("levels"), list) else []:
        if not isinstance(lv, dict) or not isinstance(lv.get("regions"), dict):
            continue
        for region, st in lv["regions"].items():
            if isinstance(st, dict):
                rows.append((lv.get("fraction"), lv.get("mean_prompts"), region, st.get("mean"),
                             st.get("voxel_cov"), st.get("roi_mean_cov")))
    return rows


def _volume_of(data, index: int):
    return data[..., index] if data.ndim == 4 else data


def add_resample_sections(report: Report, out_dir) -> None:
    """Mean and noise images of a ``resample`` folder, its regional noise and noise against counts."""
    out_dir = Path(out_dir)
    summary_path = out_dir / "summary.json"
    summary = {}
    if summary_path.is_file():
        try:
            summary = json.loads(summary_path.read_text())
        except json.JSONDecodeError:
            raise TwinrayInputError(f"{summary_path} is not valid JSON") from None
    mode = summary.get("mode", "")
    report.heading(f"Noise study: {out_dir.name}" + (f" ({mode})" if mode and mode != out_dir.name else ""))
    facts = {label: summary[key] for key, label in _SUMMARY_FACTS.items() if key in summary}
    if facts:
        report.key_values(facts, caption="Resampling")
    fractions = summary.get("fractions") if isinstance(summary.get("fractions"), list) else []
    pick = int(np.argmax(fractions)) if len(fractions) > 1 else 0
    level_text = f" (fraction {format_fraction(fractions[pick])})" if len(fractions) > 1 else ""
    mean_path, cov_path, std_path = (out_dir / f"{n}.nii.gz" for n in ("mean", "cov", "std"))
    if mean_path.is_file():
        data, affine, side = read_image_with_sidecar(mean_path)
        data = _volume_of(data, pick)
        point = figures.pick_point(data)
        report.figure(figures.slices_figure(data, affine, units=str(side.get("Units", "")), point=point),
                      caption=f"Mean of the replicate images{level_text}.")
        finite = data[np.isfinite(data)]
        threshold = 0.05 * float(np.percentile(finite, 99)) if finite.size else 0.0
        inside = np.isfinite(data) & (data > threshold)
        for path, what in ((cov_path, "coefficient of variation (std / mean)"),
                           (std_path, f"standard deviation ({side.get('Units', 'image units')})")):
            if path.is_file():
                noise, aff2, _ = read_image_with_sidecar(path)
                noise = _volume_of(noise, pick)
                is_cov = path == cov_path
                show = inside if is_cov and inside.shape == noise.shape and inside.any() else None
                shown = noise[show] if show is not None else noise
                report.figure(figures.slices_figure(noise, aff2, units=what, point=point, cmap=figures.NOISE_CMAP,
                                                    vrange=figures.display_range(shown, 0.0, 99.0), show=show),
                              caption=(f"Noise map{level_text}: voxel-wise {what} over the replicates (ddof = 1)"
                                       + ("; grey where the mean image is below 5 % of its 99th percentile "
                                          "(outside the object std / mean means little)" if show is not None
                                          else "") + "; colour scale clipped at the 99th percentile."))
                break
    rows = _level_rows(summary)
    if rows:
        report.table(["fraction", "mean prompts", "region", "regional mean", "voxel COV", "regional-mean COV"],
                     rows, caption="Noise by region and count level")
    series = noise_series_from_summary(summary)
    if series:
        report.figure(figures.noise_vs_counts_figure(series),
                      caption=("Noise against counts, log-log. Solid lines: fitted power law (slope in the legend); "
                               "dotted: the slope -1/2 of counting statistics through the highest-count point."))
    if isinstance(summary.get("accounting"), dict):
        report.accounting(summary["accounting"])
    for text in summary.get("warnings", []) if isinstance(summary.get("warnings"), list) else []:
        report.note(str(text))


def format_fraction(p) -> str:
    return f"{float(p):g}" if _numeric(p) else str(p)


# -- recovery against a known truth ------------------------------------------------

def recovery_rows(images: dict, truth_path, regions) -> list:
    """Regional means of images against a truth image (e.g. the simulator's activity map).

    Parameters
    ----------
    images : dict of str to path-like
        Label -> NIfTI image in the truth's units (e.g. Bq/mL after calibration).
    truth_path : path-like
        NIfTI truth image, any grid in the same scanner frame.
    regions : iterable of (name, (x, y, z, r))
        Spheres in mm; a voxel belongs to one when its centre is inside.

    Returns
    -------
    list of tuple
        ``(region, true mean, voxels, {label: (mean, mean / true)})`` per region;
        the ratio is None where the truth is 0.
    """
    from ..tac import SphereRegion, region_mask

    truth, t_aff, _ = read_image_with_sidecar(truth_path)
    truth = truth[..., 0] if truth.ndim == 4 else truth
    loaded = {}
    for label, p in images.items():
        data, aff, _ = read_image_with_sidecar(p)
        loaded[label] = (data[..., 0] if data.ndim == 4 else data, aff)
    rows = []
    for name, (x, y, z, r) in regions:
        sphere = SphereRegion(str(name), (float(x), float(y), float(z)), float(r))
        t_mask = region_mask(truth.shape, t_aff, sphere)
        if not np.any(t_mask):
            raise TwinrayInputError(f"region {sphere.describe()} holds no voxel of the truth image {truth_path}")
        true_mean = float(np.mean(truth[t_mask]))
        measured = {}
        voxels = 0
        for label, (data, aff) in loaded.items():
            mask = region_mask(data.shape, aff, sphere)
            if not np.any(mask):
                raise TwinrayInputError(f"region {sphere.describe()} holds no voxel of the {label} image")
            voxels = int(mask.sum())
            m = float(np.mean(data[mask]))
            measured[label] = (m, m / true_mean if true_mean > 0 else None)
        rows.append((sphere.name, true_mean, voxels, measured))
    return rows


def add_recovery_sections(report: Report, images: dict, truth_path, regions, units: str = "Bq/mL",
                          rows=None) -> None:
    """A table of regional means against the truth, with their ratios (recovery).

    ``rows`` may pass the result of :func:`recovery_rows` when already computed.
    """
    rows = recovery_rows(images, truth_path, regions) if rows is None else rows
    labels = list(images)
    report.heading("Recovery against the truth")
    header = ["region", f"true mean ({units})", "image voxels"]
    for label in labels:
        header += [f"{label} mean ({units})", f"{label} / true"]
    table = []
    for name, true_mean, voxels, measured in rows:
        row = [name, true_mean, voxels]
        for label in labels:
            m, ratio = measured[label]
            row += [m, "—" if ratio is None else round(ratio, 3)]
        table.append(row)
    report.table(header, table, caption=("Regional means of the reconstructed images against the simulator's "
                                         "truth (activity at the acquisition start)"))
    report.paragraph("A ratio of 1 is full recovery. Small hot regions read low (partial-volume effect: the "
                     "image resolution spreads their activity outwards); cold regions read above zero for the same "
                     "reason and from residual scatter. Both shrink as regions grow.")


def add_calibration_sections(report: Report, calibration_json) -> None:
    """The facts of a calibration file written by ``twinray calibrate``."""
    path = Path(calibration_json)
    try:
        cal = json.loads(path.read_text())
    except (OSError, json.JSONDecodeError):
        raise TwinrayInputError(f"calibration file {path} is missing or not valid JSON") from None
    if not isinstance(cal, dict):
        raise TwinrayInputError(f"calibration file {path} does not hold a JSON object")
    report.heading(f"Calibration: {path.name}")
    report.key_values({k.replace("_", " "): v for k, v in cal.items()
                       if isinstance(v, (int, float, str, bool)) or v is None},
                      caption="Calibration factor and the region it was measured in")
