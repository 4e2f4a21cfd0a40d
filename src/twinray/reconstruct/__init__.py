"""Reconstruction: filtered back projection and ordinary-Poisson OSEM.

Modules, one job each: ``filters`` (apodized ramp filters), ``arc`` (arc
correction), ``rebin`` (SSRB), ``grid`` (default image grids), ``units``
(image units and the LOR volume factor), ``fbp``, ``osem``,
``calibration`` (Bq/mL from a uniform cylinder), ``analytic`` (exact ellipse
projections for checks), ``pipeline`` (sinogram file -> image file).
"""
