"""``twinray reconstruct``: a sinogram file to an image (FBP or ordinary-Poisson OSEM)."""

from __future__ import annotations

from pathlib import Path

import click

from ._common import common_options, progress
from ._report import report_option, write_report

_FILTERS = ["ramp", "shepp-logan", "cosine", "hamming", "hann"]


@click.command("reconstruct")
@click.argument("sinogram", type=click.Path(path_type=Path))
@click.option("-o", "--output", required=True, type=click.Path(path_type=Path), metavar="IMAGE.nii.gz",
              help="Image to write (NIfTI, plus a JSON sidecar of the same stem).")
@click.option("--method", required=True, type=click.Choice(["fbp", "osem"]),
              help="fbp: filtered back projection of the stored corrected data (2-D per plane, after SSRB); "
                   "osem: ordinary-Poisson OSEM of the stored prompts with norm, acf, randoms and scatter "
                   "in the model.")
@click.option("--iterations", type=click.IntRange(min=1), default=3, show_default=True,
              help="OSEM: full passes through the data.")
@click.option("--subsets", type=click.IntRange(min=1), default=8, show_default=True,
              help="OSEM: subsets of interleaved views; 1 gives MLEM.")
@click.option("--mode", type=click.Choice(["3d", "2d"]), default="3d", show_default=True,
              help="OSEM: 3d models every stored oblique plane; 2d rebins by SSRB first and "
                   "reconstructs plane by plane (faster, axially less exact away from the axis).")
@click.option("--filter", "filter_name", type=click.Choice(_FILTERS), default="ramp", show_default=True,
              help="FBP: apodization window of the ramp filter.")
@click.option("--cutoff", type=float, default=1.0, show_default=True,
              help="FBP: window cutoff as a fraction of the Nyquist frequency, 0 < F <= 1.")
@click.option("--matrix", type=click.IntRange(min=1), default=None,
              help="Voxels along x and y. Default: enough to cover the transaxial field of view.")
@click.option("--voxel-mm", type=float, default=None,
              help="Transaxial voxel size, mm. Default: the radial spacing at the centre (or "
                   "field of view / --matrix).")
@click.option("--postfilter-mm", type=float, default=0.0, show_default=True,
              help="Gaussian post-filter FWHM, mm (0 = none).")
@click.option("--calibration", type=click.Path(path_type=Path), default=None, metavar="CAL.json",
              help="Calibration file from 'twinray calibrate': the image is written in Bq/mL.")
@click.option("--calibration-factor", type=float, default=None, metavar="F",
              help="Bq/mL per counts/s/mL, given directly (instead of --calibration).")
@report_option
@common_options
def reconstruct_command(sinogram, output, method, iterations, subsets, mode, filter_name, cutoff, matrix,
                        voxel_mm, postfilter_mm, calibration, calibration_factor, report_path, run):
    """Reconstruct the sinogram file SINOGRAM into a NIfTI image.

    Geometry (view angles, radial positions, plane z, ring differences) comes
    from the file. Values are counts/s/mL (counts per second, after
    normalization and attenuation correction, per mL of a nominal LOR tube),
    or Bq/mL with a calibration. A root attribute decay_correction_factor in
    the file is applied and recorded (ImageDecayCorrected). Image slices sit
    at the planes' z (after SSRB for 3-D data).

    FBP needs the stored `corrected` dataset; a file with no corrections at
    all is reconstructed from its prompts (with a warning), a file with
    corrections but no `corrected` dataset is refused. OSEM uses the raw
    prompts with norm, acf, randoms and scatter in its Poisson model (absent
    ones count as 1 and 0). For --mode 2d, 3-D data are rebinned by SSRB:
    counts, randoms, scatter and 1/(norm*acf) are summed over the ring pairs
    of a plane, so the model holds for the summed data as far as SSRB does.

    Examples:

    \b
        twinray reconstruct scan.h5 -o scan_osem.nii.gz --method osem --iterations 4 --subsets 8
        twinray reconstruct scan.h5 -o scan_fbp.nii.gz --method fbp --filter hann --cutoff 0.8
    """
    from ..errors import TwinrayInputError
    from ..reconstruct.calibration import read_calibration
    from ..reconstruct.pipeline import ReconOptions, reconstruct_file

    if calibration is not None and calibration_factor is not None:
        raise TwinrayInputError("give --calibration or --calibration-factor, not both")
    source = None
    if calibration is not None:
        calibration_factor, source = read_calibration(calibration), str(calibration)
    elif calibration_factor is not None:
        source = "--calibration-factor"
    options = ReconOptions(method=method, iterations=iterations, subsets=subsets, filter_name=filter_name,
                           cutoff=cutoff, matrix=matrix, voxel_mm=voxel_mm, mode=mode,
                           postfilter_fwhm_mm=postfilter_mm, calibration_bq_per_ml=calibration_factor,
                           calibration_source=source)
    total = iterations * subsets if method == "osem" else None
    with progress(run, total=total, desc=f"{method} sub-iterations", unit="it") as bar:
        result = reconstruct_file(sinogram, output, options, progress=bar.update if total else None)
    for text in result["warnings"]:
        run.warn(text)
    nx, ny, nz = result["shape"]
    vx, _, vz = result["voxel_mm"]
    run.say(f"wrote {result['outputs'][0]}")
    what = (f"OSEM {iterations} iterations x {subsets} subsets ({mode})" if method == "osem"
            else f"FBP, {filter_name} filter, cutoff {cutoff:g} x Nyquist")
    run.say(f"  {what}")
    run.say(f"  image {nx} x {ny} x {nz} voxels of {vx:.3g} x {vx:.3g} x {vz:.3g} mm, units {result['units']}")
    written = write_report(run, report_path, "report_for_image", output, inputs=[sinogram, calibration])
    run.finish({**result, "outputs": [*result["outputs"], *written]})
