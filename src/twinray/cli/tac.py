"""``twinray tac``: time-activity curves of spherical regions in a dynamic image."""

from __future__ import annotations

from pathlib import Path

import click

from ._common import common_options
from ._report import report_option, write_report


@click.command("tac")
@click.argument("image4d", type=click.Path(path_type=Path))
@click.option("-o", "--output", "output", required=True, type=click.Path(path_type=Path),
              help="Long CSV: region,frame,start_s,duration_s,mid_s,mean,std,voxels.")
@click.option("--roi", "rois", multiple=True, required=True, metavar="NAME=sphere:X,Y,Z,R",
              help="A spherical region, centre and radius in mm (scanner frame); repeat for more. "
                   "A voxel is in when its centre is inside.")
@click.option("--plot", "plot", type=click.Path(path_type=Path), default=None,
              help="PNG plot of the curves [default: the CSV name with .png].")
@click.option("--no-plot", is_flag=True, help="Write the CSV only.")
@report_option
@common_options
def tac(image4d, output, rois, plot, no_plot, report_path, run):
    """Time-activity curves: mean, SD and voxel count of each region in each frame.

    IMAGE4D is a 4-D NIfTI (e.g. DIR/dynamic.nii.gz of `twinray dynamic`) whose
    JSON sidecar gives FrameTimesStart and FrameDuration. The SD is the spread
    of the voxel values in the region (ddof 0).

    Example:

        twinray tac study/dynamic.nii.gz -o tac.csv --roi blood=sphere:0,0,0,10 --roi tumour=sphere:30,0,5,6
    """
    from ..tac import parse_region, tac_from_image

    regions = [parse_region(text) for text in rois]
    plot_path = None if no_plot else (plot or output.with_suffix(".png"))
    result = tac_from_image(image4d, regions, output, plot_path)
    curves = result["curves"]
    run.say(f"{len(curves.regions)} region(s) x {len(curves.frame_start_s)} frame(s) from {image4d}")
    for r, region in enumerate(curves.regions):
        run.say(f"  {region.describe()}: {curves.voxels[r]} voxels, mean {curves.mean[r].min():.4g} .. "
                f"{curves.mean[r].max():.4g} {curves.units}".rstrip())
    for path in result["outputs"]:
        run.say(f"wrote {path}")
    written = write_report(run, report_path, "report_for_tac", output, units=curves.units, inputs=[image4d])
    run.finish({"outputs": [*(str(p) for p in result["outputs"]), *written],
                "regions": {region.name: int(curves.voxels[r]) for r, region in enumerate(curves.regions)}})
