"""twinray: a toolkit for PET list-mode data.

Events (Parquet) are streamed into sinograms (HDF5), corrected, and
reconstructed into images (NIfTI). The public functions below are the
library under the ``twinray`` command line.
"""

from .errors import TwinrayInputError
from .scanner import Scanner, load_scanner, scanner_from_dict
from .geometry import SinogramGeometry, sinogram_geometry
from .accounting import Accounting

__version__ = "0.1.0"

__all__ = [
    "TwinrayInputError",
    "Scanner",
    "load_scanner",
    "scanner_from_dict",
    "SinogramGeometry",
    "sinogram_geometry",
    "Accounting",
    "EventSource",
    "open_events",
    "iter_event_batches",
    "read_events",
    "event_statistics",
    "BinningState",
    "bin_events",
    "bin_event_arrays",
    "make_sinogram",
    "forward_project",
    "back_project",
    "ReconOptions",
    "reconstruct_arrays",
    "reconstruct_file",
    "derive_calibration",
    "load_phantom",
    "half_life_s",
    "decay_constant_per_s",
    "positron_fraction",
    "Report",
    "run_demo",
    "frame_decay_factor",
    "frame_reference_time",
    "FrameSchedule",
    "parse_schedule",
    "load_schedule",
    "make_dynamic",
    "bin_replicates",
    "make_resample",
    "time_activity_curves",
    "tac_from_image",
    "map_tasks",
    "CorrectionOptions",
    "CorrectionInputs",
    "prepare_corrections",
    "apply_corrections",
    "make_normalization",
    "attenuation_factors",
    "line_integrals",
]

# Heavy modules (pyarrow, numba) load on first use, so `twinray --help` stays quick.
_LAZY = {
    "EventSource": "events", "open_events": "events", "iter_event_batches": "events",
    "read_events": "events", "event_statistics": "events",
    "BinningState": "binning", "bin_events": "binning", "bin_event_arrays": "binning",
    "make_sinogram": "sinogram",
    "forward_project": "projectors", "back_project": "projectors",
    "ReconOptions": "reconstruct.pipeline", "reconstruct_arrays": "reconstruct.pipeline",
    "reconstruct_file": "reconstruct.pipeline", "derive_calibration": "reconstruct.calibration",
    # the simulator itself is twinray.simulate.simulate (a subpackage of that name)
    "load_phantom": "simulate",
    "half_life_s": "isotopes", "decay_constant_per_s": "isotopes", "positron_fraction": "isotopes",
    "Report": "report", "run_demo": "demo",
    "frame_decay_factor": "decay", "frame_reference_time": "decay",
    "FrameSchedule": "schedule", "parse_schedule": "schedule", "load_schedule": "schedule",
    "make_dynamic": "dynamic", "bin_replicates": "resample", "make_resample": "resample",
    "time_activity_curves": "tac", "tac_from_image": "tac", "map_tasks": "parallel",
    "CorrectionOptions": "corrections.apply", "CorrectionInputs": "corrections.apply",
    "prepare_corrections": "corrections.apply", "apply_corrections": "corrections.apply",
    "make_normalization": "corrections.normalization", "attenuation_factors": "corrections.attenuation",
    "line_integrals": "raytrace",
}


def __getattr__(name):
    module = _LAZY.get(name)
    if module is None:
        raise AttributeError(f"module 'twinray' has no attribute {name!r}")
    import importlib

    value = getattr(importlib.import_module(f".{module}", __name__), name)
    globals()[name] = value
    return value
