"""One call per command: read the command's outputs and write a report next to them.

Every ``report_for_*`` function builds a :class:`~twinray.report.builder.Report`
from the files a command wrote, adds the provenance (version, options, input
checksums, date, machine) and writes it atomically. A command's ``--report
PATH`` option only has to call one of these after its outputs exist.
"""

from __future__ import annotations

from pathlib import Path

from . import sections
from .builder import Report
from .provenance import provenance


def _from_click_context(command: str, options):
    """Fill the command line and options from the running click command, when not given."""
    import sys

    try:
        import click

        ctx = click.get_current_context(silent=True)
    except ImportError:  # pragma: no cover - click is a dependency
        ctx = None
    if not command:
        command = " ".join(["twinray", *sys.argv[1:]]) if ctx is not None else ""
    if options is None and ctx is not None:
        options = {k: (str(v) if v is not None and not isinstance(v, (int, float, bool, str)) else v)
                   for k, v in ctx.params.items() if k not in ("run",)}
    return command, options


def _subtitle(default: str) -> str:
    """``twinray <command>`` of the running click command, else ``default``."""
    try:
        import click

        ctx = click.get_current_context(silent=True)
    except ImportError:  # pragma: no cover
        ctx = None
    return f"twinray {ctx.info_name}" if ctx is not None and ctx.info_name else default


def _finish(report: Report, report_path, command: str, options, inputs) -> Path:
    command, options = _from_click_context(command, options)
    report.provenance(provenance(command=command, options=options, inputs=[p for p in inputs if p is not None]))
    return report.write(report_path)


def report_for_events(events_path, report_path, *, scanner=None, command: str = "", options=None,
                      inputs=()) -> Path:
    """Report of ``twinray inspect``: counts by kind, metadata, count rate over time.

    Parameters
    ----------
    events_path : path-like
        The event file or folder.
    report_path : path-like
        Where ``report.html`` goes.
    scanner : Scanner, optional
        ``--scanner`` geometry, when the file has no embedded one.
    command : str
        The command line, for the provenance.
    options : dict, optional
        Options as used.
    inputs : iterable of path-like
        Files to checksum (default: the events).

    Returns
    -------
    Path
    """
    rep = Report(f"Events {Path(events_path).name}", _subtitle("twinray inspect"))
    sections.add_events_sections(rep, events_path, scanner=scanner)
    return _finish(rep, report_path, command, options, list(inputs) or [events_path])


def report_for_sinogram(sinogram_path, report_path, *, events_path=None, scanner=None, plane=None,
                        command: str = "", options=None, inputs=()) -> Path:
    """Report of ``twinray sinogram``: accounting, raw vs corrected plane, correction profiles.

    Parameters
    ----------
    sinogram_path : path-like
        The HDF5 sinogram written.
    report_path : path-like
    events_path : path-like, optional
        The events it was made from: adds the count rate over time.
    scanner : Scanner, optional
    plane : int, optional
        Plane to show.
    command, options :
        For the provenance.
    inputs : iterable of path-like
        Input files (events, norm, mu-map) to checksum.
    """
    rep = Report(f"Sinogram {Path(sinogram_path).name}", _subtitle("twinray sinogram"))
    if events_path is not None:
        sections.add_events_sections(rep, events_path, scanner=scanner)
    sections.add_sinogram_sections(rep, sinogram_path, plane=plane)
    return _finish(rep, report_path, command, options, list(inputs) or [events_path])


def report_for_normalization(norm_path, report_path, *, command: str = "", options=None, inputs=()) -> Path:
    """Report of ``twinray normalize``: crystal efficiencies and normalization factors."""
    rep = Report(f"Normalization {Path(norm_path).name}", _subtitle("twinray normalize"))
    sections.add_normalization_sections(rep, norm_path)
    return _finish(rep, report_path, command, options, inputs)


def report_for_image(image_path, report_path, *, compare_with: dict | None = None, command: str = "",
                     options=None, inputs=()) -> Path:
    """Report of ``twinray reconstruct``: facts, slices in three orientations, accounting.

    Parameters
    ----------
    image_path : path-like
        NIfTI image with its JSON sidecar.
    report_path : path-like
    compare_with : dict of str to path-like, optional
        Other images of the same grid to show beside it (label -> path).
    command, options, inputs :
        For the provenance.
    """
    rep = Report(f"Image {Path(image_path).name}", _subtitle("twinray reconstruct"))
    sections.add_image_sections(rep, image_path)
    if compare_with:
        sections.add_comparison_sections(rep, {Path(image_path).name: image_path, **compare_with},
                                         heading="Images side by side")
    return _finish(rep, report_path, command, options, inputs)


def report_for_dynamic(output_dir, report_path, *, events_path=None, scanner=None, tac_path=None,
                       command: str = "", options=None, inputs=()) -> Path:
    """Report of ``twinray dynamic``: count rate (when the events are given), frames, decay factors, TACs."""
    rep = Report(f"Dynamic study {Path(output_dir).name}", _subtitle("twinray dynamic"))
    if events_path is not None:
        sections.add_events_sections(rep, events_path, scanner=scanner)
    sections.add_dynamic_sections(rep, output_dir, tac_path=tac_path)
    return _finish(rep, report_path, command, options, inputs)


def report_for_tac(tac_path, report_path, *, units: str = "", command: str = "", options=None,
                   inputs=()) -> Path:
    """Report of ``twinray tac``: the curves and their table."""
    rep = Report(f"Time-activity curves {Path(tac_path).name}", _subtitle("twinray tac"))
    sections.add_tac_sections(rep, tac_path, units=units)
    return _finish(rep, report_path, command, options, inputs)


def report_for_resample(output_dir, report_path, *, command: str = "", options=None, inputs=()) -> Path:
    """Report of ``twinray resample``: mean image, noise map, noise against counts."""
    rep = Report(f"Noise study {Path(output_dir).name}", _subtitle("twinray resample"))
    sections.add_resample_sections(rep, output_dir)
    return _finish(rep, report_path, command, options, inputs)


def report_for_calibration(calibration_json, report_path, *, image_path=None, command: str = "", options=None,
                           inputs=()) -> Path:
    """Report of ``twinray calibrate``: the factor and, when given, the cylinder image it came from."""
    rep = Report(f"Calibration {Path(calibration_json).name}", _subtitle("twinray calibrate"))
    sections.add_calibration_sections(rep, calibration_json)
    if image_path is not None:
        sections.add_image_sections(rep, image_path, label=f"Cylinder image: {Path(image_path).name}")
    return _finish(rep, report_path, command, options, inputs)
