"""Simulated PET acquisitions with known truth.

``load_phantom`` reads a phantom TOML (shapes or voxel images),
``simulate`` draws Poisson-sampled photon pairs from it and streams an event
file (data contract section 2) plus a truth sidecar. The physics models and
their limits are described in :mod:`twinray.simulate.simulator`.
"""

from .phantom import Phantom, PhysicsOptions, Shape, load_phantom, rasterize
from .simulator import SimulationResult, crystal_efficiencies, simulate, truth_paths_for

__all__ = [
    "Phantom",
    "PhysicsOptions",
    "Shape",
    "SimulationResult",
    "crystal_efficiencies",
    "load_phantom",
    "rasterize",
    "simulate",
    "truth_paths_for",
]
