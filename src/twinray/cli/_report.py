"""The ``--report PATH`` option shared by the commands.

A command adds :func:`report_option` to its options and, after its outputs
are written, calls :func:`write_report` with the name of the matching
``twinray.report.report_for_*`` function; the report reads the command's own
output files.
"""

from __future__ import annotations

from pathlib import Path

import click


def report_option(func):
    """Add ``--report REPORT.html`` (default: no report)."""
    return click.option(
        "--report", "report_path", type=click.Path(path_type=Path), default=None, metavar="REPORT.html",
        help="Also write a self-contained HTML report of this run (figures, accounting, provenance with "
             "input checksums) to REPORT.html.")(func)


def write_report(run, report_path, maker: str, main_output, *, inputs=(), **kwargs) -> list:
    """Write the report when ``--report`` was given.

    Parameters
    ----------
    run : Run
        For the "wrote ..." line.
    report_path : Path or None
        The ``--report`` value; nothing happens when None.
    maker : str
        Name of a ``twinray.report`` function, e.g. ``"report_for_sinogram"``.
    main_output : path-like
        The command's output the report is about (file or folder).
    inputs : iterable of path-like
        Input files to checksum (``None`` entries skipped); the report may not
        overwrite any of them.
    **kwargs
        Passed on to the report function.

    Returns
    -------
    list of str
        ``[report path]``, or ``[]`` without ``--report``.
    """
    if report_path is None:
        return []
    from .. import report
    from ..atomic import refuse_overwriting_inputs

    inputs = [p for p in inputs if p is not None]
    refuse_overwriting_inputs(report_path, [*inputs, main_output])
    path = getattr(report, maker)(main_output, report_path, inputs=inputs, **kwargs)
    run.say(f"wrote {path}")
    return [str(path)]
