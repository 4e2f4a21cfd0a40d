"""Image units and the LOR volume factor.

twinray images are in **counts/s/mL** unless calibrated. The forward model
of a LOR i over a frame of duration T is (prompts, expected)::

    E[prompts_i] = T * k * (A x)_i / (norm_i * acf_i) + randoms_i + scatter_i

where ``(A x)_i`` is the line integral of the image x along the LOR (mm
times counts/s/mL) and ``k = delta_s * axial_pitch / 1000`` (mL per mm) is a
fixed nominal LOR cross-section: the radial spacing at the centre times the
ring pitch, in mm^2, converted to mL. So an image value x means "x counts
per second, after normalization and attenuation correction, from each mL
inside a nominal LOR tube". It is proportional to the activity
concentration; the proportionality (the scanner's absolute sensitivity and
the true tube cross-section) is what ``twinray calibrate`` measures, giving
Bq/mL per image unit. FBP uses the same k (its input is
``corrected / (T*k)``, a line integral of x), so FBP and OSEM images of the
same data have the same scale.
"""

from __future__ import annotations

from .grid import centre_radial_spacing_mm

UNCALIBRATED_UNITS = "counts/s/mL"
CALIBRATED_UNITS = "Bq/mL"


def lor_ml_per_mm(radial_positions_mm, axial_pitch_mm: float) -> float:
    """The nominal LOR cross-section k, mL per mm of LOR length.

    Parameters
    ----------
    radial_positions_mm : array
        The sinogram's radial positions (the centre spacing is used).
    axial_pitch_mm : float
        Ring pitch, mm.
    """
    return centre_radial_spacing_mm(radial_positions_mm) * float(axial_pitch_mm) / 1000.0
