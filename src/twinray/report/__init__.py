"""The visual report: one self-contained HTML file with embedded PNG figures.

* :mod:`~twinray.report.builder` -- the :class:`Report` builder (sections,
  tables, figures) and the HTML it writes;
* :mod:`~twinray.report.figures` -- figures made from plain arrays;
* :mod:`~twinray.report.sections` -- sections read from command outputs
  (sinogram HDF5, NIfTI + sidecar, TAC CSV, ``summary.json``);
* :mod:`~twinray.report.per_command` -- one call per command for ``--report``;
* :mod:`~twinray.report.provenance` -- version, options, checksums, machine.
"""

from .builder import Report, format_value
from .per_command import (report_for_calibration, report_for_dynamic, report_for_events, report_for_image,
                          report_for_normalization, report_for_resample, report_for_sinogram, report_for_tac)
from .provenance import provenance, sha256_file

__all__ = [
    "Report",
    "format_value",
    "provenance",
    "sha256_file",
    "report_for_events",
    "report_for_sinogram",
    "report_for_normalization",
    "report_for_image",
    "report_for_dynamic",
    "report_for_tac",
    "report_for_resample",
    "report_for_calibration",
]
