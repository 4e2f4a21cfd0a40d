"""``twinray calibrate``: Bq/mL per image unit from a uniform cylinder of known concentration."""

from __future__ import annotations

from pathlib import Path

import click

from ._common import common_options
from ._report import report_option, write_report


@click.command("calibrate")
@click.argument("image", type=click.Path(path_type=Path))
@click.option("-o", "--output", required=True, type=click.Path(path_type=Path), metavar="CAL.json",
              help="Calibration file to write (JSON), for 'twinray reconstruct --calibration'.")
@click.option("--concentration", "concentration", required=True, type=float, metavar="BQ_PER_ML",
              help="Known activity concentration of the cylinder, Bq/mL, at --reference-time "
                   "(default: at the acquisition start).")
@click.option("--reference-time", default=None, metavar="ISO",
              help="When the concentration was measured (ISO 8601 date-time); it is decayed to the "
                   "acquisition start.")
@click.option("--acquisition-start", default=None, metavar="ISO",
              help="Acquisition start (ISO 8601); default: from the image's sidecar.")
@click.option("--isotope", default=None,
              help="Radionuclide (e.g. F-18); default: TracerRadionuclide of the sidecar.")
@click.option("--roi-radius-mm", type=float, default=None,
              help="Radius of the central region, mm. Default: 60% of the cylinder's radius, "
                   "found from the image.")
@click.option("--edge-slices", type=click.IntRange(min=0), default=1, show_default=True,
              help="Slices left out at each axial end of the image.")
@report_option
@common_options
def calibrate_command(image, output, concentration, reference_time, acquisition_start, isotope,
                      roi_radius_mm, edge_slices, report_path, run):
    """Derive the calibration factor (Bq/mL per counts/s/mL) from IMAGE, a
    reconstruction of a uniform cylinder of known activity concentration.

    The factor is the expected concentration (decayed to the acquisition start
    and, for an image that is not decay-corrected, averaged over the frame)
    divided by the mean of a central cylindrical region.

    Example:

    \b
        twinray calibrate cylinder.nii.gz -o scanner_cal.json --concentration 5000 \\
            --reference-time 2026-01-05T09:00:00
        twinray reconstruct scan.h5 -o scan.nii.gz --method osem --calibration scanner_cal.json
    """
    from ..reconstruct.calibration import derive_calibration, write_calibration

    cal = derive_calibration(image, concentration, reference_time=reference_time,
                             acquisition_start=acquisition_start, isotope=isotope,
                             roi_radius_mm=roi_radius_mm, edge_slices=edge_slices)
    written = write_calibration(output, cal, inputs=[image])
    run.say(f"wrote {written}")
    run.say(f"  factor {cal.bq_per_ml_per_unit:.6g} Bq/mL per {cal.image_units}")
    run.say(f"  central region: mean {cal.roi_mean:.6g} +- {cal.roi_std:.3g} ({cal.roi_voxels} voxels, "
            f"radius {cal.roi_radius_mm:.3g} mm of a {cal.object_radius_mm:.3g} mm object)")
    run.say(f"  expected {cal.expected_image_bq_per_ml:.6g} Bq/mL in the image")
    report = write_report(run, report_path, "report_for_calibration", written, image_path=image, inputs=[image])
    run.finish({"outputs": [str(written), *report], "accounting": None, "calibration": cal.to_dict()})
