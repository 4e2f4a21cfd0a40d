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
]
