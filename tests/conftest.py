"""Shared test fixtures: small scanners and tiny event files.

The event generators here are deliberately simple numpy code, independent of
the project's simulator, so that the reader and binning tests do not depend
on it. Fixtures that build things return plain callables, so a test can ask
for several variants.
"""

from __future__ import annotations

from pathlib import Path

import numpy as np
import pytest

from twinray.event_writer import COLUMN_TYPES, write_events
from twinray.scanner import Scanner, load_scanner, scanner_from_dict

REPO = Path(__file__).resolve().parents[1]
SCANNER_DIR = REPO / "configs" / "scanners"


def make_small_scanner(**changes) -> Scanner:
    """4 rings x 16 crystals on a 50 mm radius; every ring pair kept, span 1."""
    table = {
        "name": "test-4r16",
        "rings": 4,
        "crystals_per_ring": 16,
        "radius_mm": 50.0,
        "axial_pitch_mm": 4.0,
        "angle_offset_rad": 0.0,
        "coincidence_window_ns": 4.0,
        "energy_window_kev": [425.0, 650.0],
        "tof_fwhm_ps": 0.0,
        "sinogram": {"radial_bins": 11, "max_ring_difference": 3, "span": 1},
    }
    sino = dict(table.pop("sinogram"))
    for key in list(changes):
        if key in ("radial_bins", "max_ring_difference", "span", "views"):
            value = changes.pop(key)
            if value is None:
                sino.pop(key, None)
            else:
                sino[key] = value
    table.update(changes)
    table["sinogram"] = sino
    return scanner_from_dict(table, source="test scanner")


def scanner_toml_text(scanner: Scanner) -> str:
    """The scanner as TOML text (for --scanner files)."""
    d = scanner.to_dict()
    sino = d.pop("sinogram", {})

    def value(v):
        if isinstance(v, str):
            return '"' + v.replace('"', '\\"') + '"'
        if isinstance(v, (list, tuple)):
            return "[" + ", ".join(value(x) for x in v) + "]"
        return repr(v)

    lines = [f"{k} = {value(v)}" for k, v in d.items()]
    if sino:
        lines.append("[sinogram]")
        lines += [f"{k} = {value(v)}" for k, v in sino.items()]
    return "\n".join(lines) + "\n"


def random_events(scanner: Scanner, n: int, rng: np.random.Generator, *, duration_s: float = 10.0,
                  delayed_fraction: float | None = 0.1, energies: bool = False, invalid_fraction: float = 0.0,
                  time_ordered: bool = True) -> dict:
    """Uniformly random crystal pairs (any rings) with times, delayed flags and energies.

    A fraction of the pairs is drawn across the ring (opposite half) so that
    most land inside the radial field of view; ``invalid_fraction`` of the
    rows get a crystal id outside the scanner (negative or too large).
    """
    n_cry = scanner.n_crystals
    cpr = scanner.crystals_per_ring
    ra = rng.integers(0, scanner.rings, n)
    rb = rng.integers(0, scanner.rings, n)
    ja = rng.integers(0, cpr, n)
    jb = (ja + cpr // 2 + rng.integers(-(3 * cpr) // 8, (3 * cpr) // 8 + 1, n)) % cpr
    same = rng.random(n) < 0.05
    jb = np.where(same, ja, jb)          # a few "no LOR" pairs
    a = (ra * cpr + ja).astype(np.int64)
    b = (rb * cpr + jb).astype(np.int64)
    if invalid_fraction:
        bad = rng.random(n) < invalid_fraction
        which = rng.random(n) < 0.5
        a = np.where(bad & which, rng.choice([-1, n_cry, n_cry + 7], n), a)
        b = np.where(bad & ~which, rng.choice([-3, n_cry, 2 * n_cry], n), b)
    t = rng.integers(0, int(duration_s * 1e9), n)
    if time_ordered:
        t = np.sort(t)
    cols = {"time_ns": t.astype(np.int64), "crystal_a": a.astype(np.int32), "crystal_b": b.astype(np.int32)}
    if delayed_fraction is not None:
        cols["delayed"] = rng.random(n) < delayed_fraction
    if energies:
        lo, hi = scanner.energy_window_kev
        for key in ("energy_a_kev", "energy_b_kev"):
            e = rng.normal(511.0, 60.0, n).astype(np.float32)
            # Put some exactly on the limits: they are inside (inclusive window).
            edge = rng.random(n) < 0.05
            e = np.where(edge, np.where(rng.random(n) < 0.5, lo, hi), e).astype(np.float32)
            cols[key] = e
    return cols


def point_source_events(scanner: Scanner, x0: float, y0: float, n: int, rng: np.random.Generator,
                        ring: int = 0) -> dict:
    """Coincidences from a point at (x0, y0) mm in one ring plane (2-D).

    Each decay emits back-to-back photons along a uniform random direction;
    the line meets the detector circle at two points, and each photon is
    detected in the crystal nearest its intersection.
    """
    R = scanner.radius_mm
    cpr = scanner.crystals_per_ring
    psi = rng.uniform(0.0, np.pi, n)
    ux, uy = np.cos(psi), np.sin(psi)
    # |p + t u| = R  ->  t^2 + 2 t (p.u) + |p|^2 - R^2 = 0
    pu = x0 * ux + y0 * uy
    disc = np.sqrt(pu ** 2 - (x0 ** 2 + y0 ** 2 - R ** 2))
    ends = []
    for t in (-pu + disc, -pu - disc):
        ang = np.arctan2(y0 + t * uy, x0 + t * ux) - scanner.angle_offset_rad
        j = np.rint(ang / (2 * np.pi / cpr)).astype(np.int64) % cpr
        ends.append(ring * cpr + j)
    return {"time_ns": np.sort(rng.integers(0, 10**9, n)).astype(np.int64),
            "crystal_a": ends[0].astype(np.int32), "crystal_b": ends[1].astype(np.int32)}


def event_metadata(scanner: Scanner, duration_s: float = 10.0, **extra) -> dict:
    """A ``twinray`` metadata object for an event file."""
    return {"scanner": scanner.to_dict(), "duration_s": duration_s, "isotope": "F-18",
            "acquisition_start": "2026-01-01T09:00:00+00:00", **extra}


@pytest.fixture
def small_scanner() -> Scanner:
    """4 rings x 16 crystals, radius 50 mm, 11 radial bins, span 1, all ring differences."""
    return make_small_scanner()


@pytest.fixture
def benchtop_scanner() -> Scanner:
    """The bench-top ring of configs/scanners/benchtop.toml."""
    return load_scanner(SCANNER_DIR / "benchtop.toml")


@pytest.fixture
def rng() -> np.random.Generator:
    return np.random.default_rng(20260101)


@pytest.fixture
def write_event_file(tmp_path):
    """``write_event_file(columns, scanner=None, name="events.parquet", metadata=..., row_group_size=...)``.

    Writes through the project's EventWriter; with a scanner and no
    ``metadata`` the file carries a ``twinray`` metadata object for it;
    ``metadata=None`` with ``scanner=None`` writes a file without one.
    """

    def write(columns, scanner=None, name="events.parquet", metadata="auto", duration_s=10.0,
              row_group_size=1 << 20, folder=None):
        folder = Path(folder) if folder is not None else tmp_path
        folder.mkdir(parents=True, exist_ok=True)
        if isinstance(metadata, str) and metadata == "auto":
            metadata = event_metadata(scanner, duration_s) if scanner is not None else None
        cols = {k: v for k, v in columns.items() if k in COLUMN_TYPES}
        return write_events(folder / name, cols, metadata, row_group_size=row_group_size)

    return write


@pytest.fixture
def write_scanner_toml(tmp_path):
    """``write_scanner_toml(scanner, name="scanner.toml")`` -> path of a TOML file."""

    def write(scanner, name="scanner.toml"):
        path = tmp_path / name
        path.write_text(scanner_toml_text(scanner), encoding="utf-8")
        return path

    return write


@pytest.fixture
def tiny_event_file(write_event_file, small_scanner, rng):
    """2000 random events (with delayed flags and energies) on the small scanner, 10 s long."""
    cols = random_events(small_scanner, 2000, rng, energies=True)
    return write_event_file(cols, small_scanner)
