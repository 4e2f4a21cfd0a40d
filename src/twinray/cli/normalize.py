"""``twinray normalize``: crystal efficiencies and normalization factors from a normalization scan."""

from __future__ import annotations

from pathlib import Path

import click

from ._common import common_options, progress
from ._report import report_option, write_report

_DEFAULT_BATCH = 1 << 20


@click.command("normalize")
@click.argument("normscan", type=click.Path(path_type=Path))
@click.option("-o", "--output", required=True, type=click.Path(path_type=Path), metavar="NORM.h5",
              help="Normalization file to write (HDF5; written atomically, never over an input).")
@click.option("--scanner", type=click.Path(path_type=Path), metavar="S.toml",
              help="Scanner TOML; must agree with the geometry embedded in the events. Use the same one "
                   "(and the same --rebin) as for `twinray sinogram`.")
@click.option("--rebin", type=click.Choice(["none", "ssrb"]), default="none", show_default=True,
              help="Sinogram layout the norm dataset is made for.")
@click.option("--source-shape", type=click.Choice(["flood", "cylinder", "rotating-line"]), default=None,
              help="Source of the scan, when its metadata has no normalization_source.")
@click.option("--source-radius-mm", type=click.FloatRange(min=0, min_open=True), default=None,
              help="Radius of that source, mm (flood: half-width of the swept region).")
@click.option("--source-mu-per-cm", type=click.FloatRange(min=0), default=0.0, show_default=True,
              help="Attenuation of a cylinder source, 1/cm at 511 keV (water 0.096).")
@click.option("--iterations", type=click.IntRange(min=1), default=10, show_default=True,
              help="Alternations of the fan-sum and geometric-factor updates.")
@click.option("--batch-size", type=click.IntRange(min=1), default=_DEFAULT_BATCH, show_default=True,
              help="Events decoded per batch; memory use grows with it, not with the scan length.")
@report_option
@common_options
def normalize_command(normscan, output, scanner, rebin, source_shape, source_radius_mm, source_mu_per_cm,
                      iterations, batch_size, report_path, run):
    """Estimate crystal efficiencies (fan sums) and the geometric factors of
    every LOR from a normalization scan NORMSCAN (a Parquet file or folder),
    and write NORM.h5 with `crystal_efficiency` (per global crystal id, mean
    1), `geometric_factor` (per ring difference and radial bin) and `norm`
    (plane, view, radial) = 1 / detection efficiency.

    The source shape (flood, cylinder or rotating-line, with its radius and
    attenuation) comes from the scan's `normalization_source` metadata, or
    from --source-shape and --source-radius-mm. Delayed coincidences are
    subtracted. The events are streamed once into per-crystal fan sums, so
    memory does not grow with the scan.

    Example:

        twinray normalize norm_scan.parquet -o norm.h5

        twinray sinogram scan.parquet -o scan.h5 --norm norm.h5
    """
    from ..corrections.normalization import NormalizationSource, make_normalization
    from ..errors import TwinrayInputError

    source = None
    if source_shape is not None or source_radius_mm is not None:
        if source_shape is None or source_radius_mm is None:
            raise TwinrayInputError("give both --source-shape and --source-radius-mm")
        source = NormalizationSource(source_shape, source_radius_mm, source_mu_per_cm)

    with progress(run, desc="fan sums", unit="ev") as bar:
        def report(done, total):
            if bar.total is None:
                bar.total = total
            bar.update(done)

        result = make_normalization(normscan, output, scanner=scanner, rebin=rebin, source=source,
                                    iterations=iterations, batch_size=batch_size, progress=report)
    for text in result.warnings:
        run.warn(text)
    acc = result.accounting
    eff = result.fit.crystal_efficiency
    src = result.source
    run.say(f"wrote {result.output}")
    run.say(f"  source {src.shape}, radius {src.radius_mm:g} mm"
            + (f", mu {src.mu_per_cm:g}/cm" if src.shape == "cylinder" else ""))
    run.say(f"  events read {acc.read}: prompts binned {acc.prompts_binned}, delayed binned {acc.delayed_binned}")
    for name, value in acc.to_dict().items():
        if name.startswith("rejected_") and value:
            run.say(f"  {name.replace('_', ' ')}: {value}")
    run.say(f"  crystal efficiency: mean 1, standard deviation {eff.std():.4f}, "
            f"range {eff.min():.3f} to {eff.max():.3f}")
    written = write_report(run, report_path, "report_for_normalization", result.output, inputs=[normscan])
    run.finish({"outputs": [str(result.output), *written], "accounting": acc.to_dict(),
                "timings_s": result.timings_s,
                "warnings": list(result.warnings),
                "crystal_efficiency_std": float(eff.std()),
                "normalization_source": {"shape": src.shape, "radius_mm": src.radius_mm,
                                         "mu_per_cm": src.mu_per_cm}})
