"""Accounting: every event read is binned or rejected for exactly one reason.

Data contract, section 5. The reasons are checked in this order and a row is
counted under the first that applies.
"""

from __future__ import annotations

import dataclasses

import numpy as np

#: Order of the counters in the kernels' int64 accounting arrays.
FIELDS = (
    "read",
    "prompts_binned",
    "delayed_binned",
    "rejected_invalid_crystal",
    "rejected_outside_frame",
    "rejected_energy_window",
    "rejected_no_lor",
    "rejected_ring_difference",
    "rejected_radial_fov",
)
REJECTION_REASONS = FIELDS[3:]

# Indices into the kernels' counter arrays.
READ, PROMPTS, DELAYED, INVALID_CRYSTAL, OUTSIDE_FRAME, ENERGY, NO_LOR, RING_DIFF, RADIAL_FOV = range(len(FIELDS))


@dataclasses.dataclass(frozen=True)
class Accounting:
    """Counts of events read, binned and rejected (data contract, section 5)."""

    read: int = 0
    prompts_binned: int = 0
    delayed_binned: int = 0
    rejected_invalid_crystal: int = 0
    rejected_outside_frame: int = 0
    rejected_energy_window: int = 0
    rejected_no_lor: int = 0
    rejected_ring_difference: int = 0
    rejected_radial_fov: int = 0

    @classmethod
    def from_counts(cls, counts) -> "Accounting":
        """From an integer array ordered as :data:`FIELDS`."""
        counts = np.asarray(counts)
        return cls(**{name: int(counts[i]) for i, name in enumerate(FIELDS)})

    @classmethod
    def from_dict(cls, d: dict) -> "Accounting":
        return cls(**{name: int(d.get(name, 0)) for name in FIELDS})

    def to_counts(self) -> np.ndarray:
        return np.array([getattr(self, f) for f in FIELDS], dtype=np.int64)

    def to_dict(self) -> dict:
        return {name: getattr(self, name) for name in FIELDS}

    @property
    def rejected(self) -> int:
        return sum(getattr(self, r) for r in REJECTION_REASONS)

    @property
    def binned(self) -> int:
        return self.prompts_binned + self.delayed_binned

    def balances(self) -> bool:
        """``read == prompts_binned + delayed_binned + sum(rejected_*)``."""
        return self.read == self.binned + self.rejected

    def __add__(self, other: "Accounting") -> "Accounting":
        return Accounting.from_counts(self.to_counts() + other.to_counts())
