"""Corrections that turn binned prompts into quantitative sinograms.

One module per correction: :mod:`.normalization` (fan-sum crystal
efficiencies and geometric factors), :mod:`.randoms` (delayed window with
fan-sum variance reduction, or singles), :mod:`.attenuation` (ACF by Siddon
ray tracing of a mu-map), :mod:`.scatter` (tail fit), :mod:`.deadtime`
(non-paralysable and paralysable models), and :mod:`.apply`, which combines
them for one frame: ``corrected = norm * acf * (prompts - randoms - scatter)``.
The methods, their sources and their limits are in DEVELOPERS.md,
"Corrections".
"""

from .apply import CorrectedSinogram, CorrectionInputs, CorrectionOptions, apply_corrections, prepare_corrections

__all__ = ["CorrectedSinogram", "CorrectionInputs", "CorrectionOptions", "apply_corrections",
           "prepare_corrections"]
