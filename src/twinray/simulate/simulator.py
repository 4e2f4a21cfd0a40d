"""The streaming photon-pair simulator: phantom + scanner -> event file + truth.

The acquisition is cut into consecutive time steps ("chunks"); each chunk is
simulated by numba kernels (:mod:`._kernels`) from its own random seed,
sorted by time and appended to the event file, so memory stays flat however
long the acquisition and the same seed gives the same file.

Physics, per chunk (every model is a deliberate simplification; the limits
are listed with it, and in DEVELOPERS.md, "Simulator physics"):

* **Decays.** Positron emissions of each shape form an inhomogeneous Poisson
  process of rate ``C * V * f_beta+ * tac(t) * exp(-lambda t)`` with lambda
  = ln 2 / T_half (:mod:`twinray.isotopes`). Per step, a Poisson number of
  candidates uniform inside the whole shape is drawn; a candidate is kept
  only if no later shape covers it (replacement of overlapping shapes:
  thinning of a Poisson process keeps it Poisson). Without a time-activity
  curve the time is drawn from exp(-lambda t) within the step (inverse CDF);
  with one, uniformly and kept with probability
  ``tac(t) exp(-lambda t) / envelope`` (exact thinning, Lewis & Shedler
  1979). Electron capture decays make no photons and are not simulated.
* **Positron range** (optional): isotropic displacement by an exponential
  distance with the isotope's mean range in water (JNM 2022 Table 3). Real
  range distributions are cusp-shaped with long tails and depend on the
  medium; this is a first-order model.
* **Photons.** Back-to-back, isotropic in 3-D; optional non-collinearity: the
  second photon is tilted by two independent Gaussian angles of 0.5 degree
  FWHM (Phelps & Hoffman 1976; 0.0022 * D FWHM blur at the centre).
* **Detection geometry.** Each photon travels to the cylinder of radius
  ``radius_mm``; it is detected in the crystal nearest in angle and in the
  ring whose slab ``[z_r - pitch/2, z_r + pitch/2)`` holds the hit; a photon
  that leaves the axial extent ``rings * pitch`` is lost. No depth of
  interaction, no inter-crystal scatter, no gaps.
* **Attenuation and scatter.** The optical depth to the first interaction is
  exponential(1) and compared with integral(mu) along the path (analytic
  chords through the shapes with replacement, or Siddon 1985 through a
  mu-map). A photon that interacts Compton-scatters once, with a
  Klein-Nishina angle and energy E' = 511 / (2 - cos theta) keV; on its new
  path it must escape at mu scaled by sigma_KN(E') / sigma_KN(511 keV), else
  it is lost (so multiple scatter is dropped, and photoelectric absorption,
  about 0.2 % of interactions in water at 511 keV, is ignored). Without
  attenuation the survival is 1; the unscattered survival of a pair is
  exp(-integral of mu along the whole line).
* **Efficiencies.** Crystal efficiencies eps_c (mean 1; log-normal with the
  seed, or from a file); a photon reaching crystal c is detected with
  probability ``intrinsic_efficiency * eps_c / max(eps)``, so a pair with
  probability proportional to eps_a * eps_b.
* **Energies.** Gaussian energy resolution, FWHM ``energy_resolution_fwhm *
  511 keV * sqrt(E / 511 keV)``; a photon counts as a single only within the
  hardware discriminator [lld_kev, uld_kev]. The scanner's energy window is
  not applied here: the event file keeps both energies so that the reader
  rejects what falls outside it (data contract section 5).
* **Coincidences.** Both photons of a pair detected -> a true or (if either
  scattered) a scatter coincidence. time_ns = decay time + time of flight
  of the earlier photon; tof_ps = t_b - t_a plus Gaussian timing noise of
  the scanner's FWHM (written only when ``tof_fwhm_ps`` > 0), positive when
  the annihilation was nearer crystal a (data contract section 2).
* **Randoms.** From the singles of the chunk, S_c = n_c / dt, accidental
  pairs (a, b), a != b, occur at rate 2 tau S_a S_b with tau half the
  coincidence window (Cherry, Sorenson & Phelps, Physics in Nuclear
  Medicine, 4th ed., ch. 18), added to the prompts; an independent stream
  with the same expectation is written with ``delayed = true``. Every crystal
  pair may form a random (no fan restriction); no dead time, no pile-up, no
  singles from activity outside the phantom.

Random numbers and speed: step ``k`` draws its Poisson counts with numpy from
``SeedSequence(seed, spawn_key=(0, k, 0))`` and everything per event from a
xoshiro256** stream seeded from ``spawn_key=(0, k, 1)`` (:mod:`._rng`), so the
same seed, inputs and step length give a byte-identical file. Two shortcuts
leave every output's distribution unchanged: a photon's exponential depth is
compared with a cheap upper bound of its optical depth before the exact walk
(:func:`._kernels.depth_bound`), and, when photons cannot interact (no
attenuation simulated, or no material), only the candidates whose pair can
reach the ring are followed; the others are counted as annihilations
(:func:`detection_cone`).

References
----------
P. A. W. Lewis and G. S. Shedler, "Simulation of nonhomogeneous Poisson
processes by thinning", Naval Research Logistics Quarterly 26(3):403-413, 1979.
R. L. Siddon, Medical Physics 12(2):252-255, 1985.
O. Klein and Y. Nishina, Z. Physik 52:853-868, 1929.
M. E. Phelps and E. J. Hoffman, J Nucl Med 17(8):757-758, 1976.
S. R. Cherry, J. A. Sorenson and M. E. Phelps, Physics in Nuclear Medicine,
4th ed., Elsevier, 2012.
"""

from __future__ import annotations

import dataclasses
import json
import math
import time
from pathlib import Path

import numpy as np

from ..atomic import atomic_path, refuse_overwriting_inputs
from ..errors import TwinrayInputError
from ..event_writer import EventWriter
from ..images import centred_affine, write_image
from ..isotopes import get_isotope, mean_positron_range_mm
from ..scanner import Scanner, load_scanner
from . import _kernels as K
from ._rng import state_from_seed
from .phantom import (Phantom, PhysicsOptions, check_phantom_in_fov, check_physics, label_image, rasterize,
                      visible_volumes_ml)

#: 0.5 degree FWHM of the non-collinearity angle, as a Gaussian sigma (rad).
NONCOLLINEARITY_SIGMA_RAD = math.radians(0.5) / (2.0 * math.sqrt(2.0 * math.log(2.0)))
FWHM_TO_SIGMA = 1.0 / (2.0 * math.sqrt(2.0 * math.log(2.0)))

#: Candidates (emission attempts) per chunk above which a chunk is shortened.
MAX_CANDIDATES_PER_CHUNK = 1_000_000

DEFAULT_ACQUISITION_START = "2026-01-01T09:00:00+00:00"

_KIND_NAMES = ("trues", "scatters", "randoms", "delayed")


@dataclasses.dataclass(frozen=True)
class SimulationResult:
    """What a simulation wrote and counted.

    Attributes
    ----------
    events_path : Path
    truth_paths : tuple of Path
        Truth JSON, activity and mu images (and their sidecars).
    counts : dict
        Events written by kind and other counters (see the truth JSON).
    duration_s : float
    chunks : int
    seed : int
    """

    events_path: Path
    truth_paths: tuple
    counts: dict
    duration_s: float
    chunks: int
    seed: int

    @property
    def outputs(self) -> list:
        return [self.events_path, *self.truth_paths]


def truth_paths_for(events_path) -> dict:
    """Names of the truth sidecar files next to an event file."""
    p = Path(events_path)
    stem = p.name[: -len(".parquet")] if p.name.endswith(".parquet") else p.stem
    return {
        "json": p.with_name(f"{stem}_truth.json"),
        "activity": p.with_name(f"{stem}_truth_activity.nii.gz"),
        "mu": p.with_name(f"{stem}_truth_mu.nii.gz"),
        "labels": p.with_name(f"{stem}_truth_labels.nii.gz"),
    }


def crystal_efficiencies(scanner: Scanner, physics: PhysicsOptions, seed: int, base_dir: Path) -> np.ndarray:
    """Per-crystal efficiencies (mean 1), from a file or drawn with the seed.

    Drawn values are log-normal with sigma ``efficiency_spread`` (seeded by
    ``SeedSequence(seed, spawn_key=(1,))``), scaled to mean 1.
    """
    n = scanner.n_crystals
    if physics.efficiency_file:
        path = Path(physics.efficiency_file)
        if not path.is_absolute():
            path = base_dir / path
        eff = _read_efficiency_file(path)
        if eff.shape != (n,):
            raise TwinrayInputError(f"efficiency file {path} has {eff.size} values, the scanner has {n} crystals")
        if not np.all(np.isfinite(eff)) or np.any(eff <= 0):
            raise TwinrayInputError(f"efficiency file {path} has values that are not positive and finite")
    elif physics.efficiency_spread > 0:
        rng = np.random.default_rng(np.random.SeedSequence(seed, spawn_key=(1,)))
        eff = rng.lognormal(0.0, physics.efficiency_spread, n)
    else:
        eff = np.ones(n)
    return eff / eff.mean()


def _read_efficiency_file(path: Path) -> np.ndarray:
    if not path.is_file():
        raise TwinrayInputError(f"efficiency file {path} does not exist")
    try:
        if path.suffix == ".npy":
            return np.load(path).astype(np.float64).ravel()
        if path.suffix in (".h5", ".hdf5"):
            import h5py

            with h5py.File(path, "r") as f:
                if "crystal_efficiency" not in f:
                    raise TwinrayInputError(f"efficiency file {path} has no dataset 'crystal_efficiency'")
                return np.asarray(f["crystal_efficiency"], dtype=np.float64).ravel()
        return np.loadtxt(path, dtype=np.float64).ravel()
    except (OSError, ValueError) as exc:
        if isinstance(exc, TwinrayInputError):
            raise
        raise TwinrayInputError(f"efficiency file {path} cannot be read ({type(exc).__name__})") from None


def truth_grid(scanner: Scanner) -> tuple:
    """Shape and affine of the truth images: about half a crystal pitch in-plane over the
    ring, and the 2*rings-1 direct and cross planes (pitch / 2) axially."""
    voxel = scanner.crystal_pitch_mm / 2.0
    n = 2 * int(math.ceil(scanner.radius_mm / voxel)) + 1
    nz = 2 * scanner.rings - 1
    shape = (n, n, nz)
    return shape, centred_affine(shape, (voxel, voxel, scanner.axial_pitch_mm / 2.0))


@dataclasses.dataclass
class _Source:
    """Kernel-ready arrays of a phantom (internal)."""

    mode: int                 # 0: no attenuation, 1: shapes, 2: voxel mu-map
    kinds: np.ndarray
    params: np.ndarray
    mus: np.ndarray
    concentrations: np.ndarray
    tac_times: np.ndarray
    tac_values: np.ndarray
    tac_len: np.ndarray
    grid: np.ndarray
    origin: np.ndarray
    voxel: np.ndarray
    bound: np.ndarray         # attenuation bound of K.depth_bound: r, zc, half_z (mm), mu_max (1/cm)
    voxel_cdf: np.ndarray | None
    voxel_total_bq: float
    activity_image: np.ndarray | None
    mu_image: np.ndarray | None
    image_affine: np.ndarray | None
    shape_table: list


_KIND_CODE = {"cylinder": K.CYLINDER, "sphere": K.ELLIPSOID, "ellipsoid": K.ELLIPSOID, "box": K.BOX}


def _prepare_source(phantom: Phantom, scanner: Scanner, physics: PhysicsOptions) -> _Source:
    dummy_grid = np.zeros((1, 1, 1))
    zero3 = np.zeros(3)
    ones3 = np.ones(3)
    if phantom.is_voxel:
        return _prepare_voxel_source(phantom, scanner, physics)
    shapes = phantom.shapes
    s = len(shapes)
    kinds = np.array([_KIND_CODE[sh.kind] for sh in shapes], dtype=np.int32)
    params = np.zeros((s, K.SHAPE_PARAMS))
    for i, sh in enumerate(shapes):
        params[i, 0:3] = sh.centre_mm
        params[i, 3:6] = sh.half_extents_mm
        params[i, 6] = math.cos(sh.rotation_rad)
        params[i, 7] = math.sin(sh.rotation_rad)
    mus = np.array([sh.mu_per_cm for sh in shapes], dtype=np.float64)
    conc = np.array([sh.activity_bq_per_ml for sh in shapes], dtype=np.float64)
    m = max([len(sh.tac_times_s) if sh.tac_times_s else 0 for sh in shapes] + [1])
    tac_times = np.zeros((s, m))
    tac_values = np.zeros((s, m))
    tac_len = np.zeros(s, dtype=np.int64)
    for i, sh in enumerate(shapes):
        if sh.tac_times_s:
            k = len(sh.tac_times_s)
            tac_times[i, :k] = sh.tac_times_s
            tac_values[i, :k] = sh.tac_values
            tac_len[i] = k
    mode = 1 if (physics.attenuation and np.any(mus > 0)) else 0
    volumes = visible_volumes_ml(shapes)
    table = []
    for i, sh in enumerate(shapes):
        table.append({
            "name": sh.name, "type": sh.kind, "centre_mm": list(sh.centre_mm),
            "half_extents_mm": list(sh.half_extents_mm), "rotation_deg": math.degrees(sh.rotation_rad),
            "activity_bq_per_ml": sh.activity_bq_per_ml, "mu_per_cm": sh.mu_per_cm,
            "visible_volume_ml": float(volumes[i]),
            "activity_bq_at_start": float(volumes[i] * sh.activity_bq_per_ml * float(sh.tac(0.0))),
            "tac": None if sh.tac_times_s is None else {"times_s": list(sh.tac_times_s),
                                                        "values": list(sh.tac_values)},
        })
    # the truth images are rasterized only when they are written
    return _Source(mode, kinds, params, mus, conc, tac_times, tac_values, tac_len, dummy_grid, zero3, ones3,
                   _shape_bound(kinds, params, mus), None, 0.0, None, None, None, table)


def _prepare_voxel_source(phantom: Phantom, scanner: Scanner, physics: PhysicsOptions) -> _Source:
    from ..images import read_image
    from ..raytrace import grid_from_affine

    activity, affine, _ = read_image(phantom.voxel_activity, "voxel activity image")
    if activity.ndim != 3:
        raise TwinrayInputError(f"voxel activity image {phantom.voxel_activity} must be 3-D, got {activity.shape}")
    if not np.all(np.isfinite(activity)) or np.any(activity < 0):
        raise TwinrayInputError(f"voxel activity image {phantom.voxel_activity} has negative or non-finite values")
    if not np.any(activity > 0):
        raise TwinrayInputError(f"voxel activity image {phantom.voxel_activity} is all zero")
    if phantom.voxel_mu is not None:
        mu, mu_affine, _ = read_image(phantom.voxel_mu, "voxel mu-map")
        if mu.shape != activity.shape or not np.allclose(mu_affine, affine, atol=1e-4):
            raise TwinrayInputError(f"voxel mu-map {phantom.voxel_mu} is not on the grid of the activity image")
        if not np.all(np.isfinite(mu)) or np.any(mu < 0):
            raise TwinrayInputError(f"voxel mu-map {phantom.voxel_mu} has negative or non-finite values")
    else:
        mu = np.zeros_like(activity)
    act_grid, origin, voxel = grid_from_affine(activity.astype(np.float64), affine)
    mu_grid, _, _ = grid_from_affine(mu.astype(np.float64), affine)
    # every active voxel must lie inside the ring
    idx = np.nonzero(act_grid > 0)
    x = origin[0] + idx[0] * voxel[0]
    y = origin[1] + idx[1] * voxel[1]
    z = origin[2] + idx[2] * voxel[2]
    reach = float(np.max(np.hypot(x, y))) + 0.5 * math.hypot(voxel[0], voxel[1])
    if reach >= scanner.radius_mm:
        raise TwinrayInputError(
            f"voxel activity image {phantom.voxel_activity} is outside the field of view: activity "
            f"{reach:.1f} mm from the axis, ring radius {scanner.radius_mm:g} mm")
    half = 0.5 * scanner.axial_length_mm
    if z.max() + voxel[2] / 2 <= -half or z.min() - voxel[2] / 2 >= half:
        raise TwinrayInputError(f"voxel activity image {phantom.voxel_activity} is outside the axial field of view")
    voxel_ml = float(np.prod(voxel)) / 1000.0
    cdf = np.cumsum(act_grid.ravel() * voxel_ml)
    mode = 2 if (physics.attenuation and np.any(mu_grid > 0)) else 0
    empty = np.zeros(0, dtype=np.int32)
    return _Source(mode, empty, np.zeros((0, K.SHAPE_PARAMS)), np.zeros(0), np.zeros(0), np.zeros((0, 1)),
                   np.zeros((0, 1)), np.zeros(0, dtype=np.int64), np.ascontiguousarray(mu_grid), origin, voxel,
                   _voxel_bound(mu_grid, origin, voxel), cdf, float(cdf[-1]), activity, mu, affine,
                   [{"name": "voxel", "type": "voxel", "activity_bq_at_start": float(cdf[-1])}])


def _bound_array(reach_mm, z_lo_mm, z_hi_mm, mu_max_per_cm) -> np.ndarray:
    """Kernel form of the attenuation bound, a little larger than the material against rounding."""
    if mu_max_per_cm <= 0.0:
        return np.array([1.0, 0.0, 1.0, 0.0])
    margin = 1e-6 * (1.0 + reach_mm + abs(z_lo_mm) + abs(z_hi_mm))
    return np.array([reach_mm + margin, 0.5 * (z_lo_mm + z_hi_mm), 0.5 * (z_hi_mm - z_lo_mm) + margin,
                     mu_max_per_cm])


def _shape_bound(kinds, params, mus) -> np.ndarray:
    """A cylinder about the z axis holding every attenuating shape, and the largest mu (1/cm)."""
    reach, z_lo, z_hi, mu_max = 0.0, math.inf, -math.inf, 0.0
    for kind, prm, mu in zip(kinds, params, mus):
        if mu <= 0.0:
            continue
        cx, cy, cz, a, b, c = prm[:6]
        # rotation is about z only: the in-plane extent is within max(a, b) (box: its half-diagonal)
        half = math.hypot(a, b) if kind == K.BOX else max(a, b)
        reach = max(reach, math.hypot(cx, cy) + half)
        z_lo, z_hi = min(z_lo, cz - c), max(z_hi, cz + c)
        mu_max = max(mu_max, float(mu))
    return _bound_array(reach, z_lo, z_hi, mu_max)


def _voxel_bound(mu_grid, origin, voxel) -> np.ndarray:
    """The same for a voxel mu-map (voxel centres at origin + index * voxel)."""
    idx = np.nonzero(mu_grid > 0)
    if idx[0].size == 0:
        return _bound_array(0.0, 0.0, 0.0, 0.0)
    x = origin[0] + idx[0] * voxel[0]
    y = origin[1] + idx[1] * voxel[1]
    z = origin[2] + idx[2] * voxel[2]
    reach = float(np.max(np.hypot(x, y))) + 0.5 * math.hypot(voxel[0], voxel[1])
    return _bound_array(reach, float(z.min()) - 0.5 * abs(voxel[2]), float(z.max()) + 0.5 * abs(voxel[2]),
                        float(mu_grid.max()))


def _chunk_envelopes(src: _Source, lam: float, t0: float, t1: float) -> np.ndarray:
    """Upper bound of tac(t) * exp(-lambda t) over [t0, t1] for every shape with a curve (1 without)."""
    out = np.ones(len(src.kinds))
    for i in range(len(src.kinds)):
        k = src.tac_len[i]
        if k == 0:
            continue
        times = src.tac_times[i, :k]
        values = src.tac_values[i, :k]
        inner = values[(times > t0) & (times < t1)]
        ends = np.interp([t0, t1], times, values)
        peak = float(max(ends.max(), inner.max() if inner.size else 0.0))
        out[i] = peak * math.exp(-lam * t0)
    return out


def _decay_integral_s(lam: float, t0: float, t1: float) -> float:
    """integral of exp(-lambda t) dt from t0 to t1, s."""
    return math.exp(-lam * t0) * -math.expm1(-lam * (t1 - t0)) / lam


def emission_means(src: _Source, lam: float, positron_fraction: float, t0: float, t1: float) -> tuple:
    """Expected emission candidates of every shape in [t0, t1], and the thinning envelopes."""
    envelope = _chunk_envelopes(src, lam, t0, t1)
    volume_ml = np.array([_shape_volume_ml(src.kinds[i], src.params[i]) for i in range(len(src.kinds))])
    time_factor = np.where(src.tac_len > 0, envelope * (t1 - t0), _decay_integral_s(lam, t0, t1))
    return src.concentrations * volume_ml * positron_fraction * time_factor, envelope


def _shape_volume_ml(kind, params) -> float:
    a, b, c = params[3:6]
    if kind == K.BOX:
        return 8.0 * a * b * c / 1000.0
    if kind == K.CYLINDER:
        return math.pi * a * b * 2.0 * c / 1000.0
    return 4.0 / 3.0 * math.pi * a * b * c / 1000.0


def _peak_candidate_rate(src: _Source, pf: float) -> float:
    if src.voxel_cdf is not None:
        return src.voxel_total_bq * pf
    rate = 0.0
    for i in range(len(src.kinds)):
        k = src.tac_len[i]
        peak = 1.0 if k == 0 else float(src.tac_values[i, :k].max())
        rate += src.concentrations[i] * _shape_volume_ml(src.kinds[i], src.params[i]) * pf * peak
    return rate


#: Positron ranges beyond this many mean ranges are split off and followed in every direction,
#: so that the detection cone needs only this margin (probability exp(-5) = 0.7 % per decay).
RANGE_MARGIN_MEANS = 5.0
#: Largest radius sqrt(g1^2 + g2^2) of a polar-method normal pair (u, v multiples of 2**-52,
#: so s = u^2 + v^2 >= 2**-104): sqrt(-2 ln 2**-104).
NORMAL_PAIR_MAX = math.sqrt(2.0 * 104.0 * math.log(2.0))


@dataclasses.dataclass(frozen=True)
class StepSettings:
    """Per-simulation constants of :func:`simulate_step` (internal)."""

    lam: float                        # decay constant, 1/s
    positron_fraction: float
    range_mm: float                   # mean positron range, 0 = off
    noncollinearity_sigma_rad: float  # 0 = off
    energy_sigma_kev: float           # Gaussian sigma at 511 keV
    tau_s: float                      # half the coincidence window
    cone: float                       # detection_cone()


def detection_cone(src: _Source, scanner: Scanner, physics: PhysicsOptions, range_mm: float,
                   noncollinearity_sigma_rad: float) -> float:
    """|cos| of the polar angle beyond which neither photon of a pair can reach the crystals.

    Only without photon interactions (no attenuation simulated, or no material): then a
    pair whose first photon lies outside this cone makes no single and no coincidence, so
    the simulator draws the candidates inside and outside the cone as independent Poisson
    counts (binomial split of the Poisson count with p = cone, exact for isotropic pairs,
    whose cos is uniform) and follows only those inside. A photon from in-plane radius
    r <= r_e travels at least R - r_e in-plane, hence at least (R - r_e) tan(elevation)
    axially, and misses the ring when that exceeds L/2 + |z|max. The emission region is
    widened by RANGE_MARGIN_MEANS mean positron ranges (the decays outside the cone with a
    longer range are split off again and followed, see :func:`simulate_step`) and the
    elevation by the largest non-collinearity tilt the sampler can draw (NORMAL_PAIR_MAX
    sigma), so the cut is exact for the generator, not just probable.
    Returns 1 (no cut) for voxel phantoms, with attenuation, or when the region reaches
    the ring.
    """
    if src.voxel_cdf is not None or src.mode != 0:
        return 1.0
    reach, z_max = 0.0, 0.0
    for kind, prm, conc in zip(src.kinds, src.params, src.concentrations):
        if conc <= 0.0:
            continue
        cx, cy, cz, a, b, c = prm[:6]
        half = math.hypot(a, b) if kind == K.BOX else max(a, b)
        reach = max(reach, math.hypot(cx, cy) + half)
        z_max = max(z_max, abs(cz - c), abs(cz + c))
    margin = RANGE_MARGIN_MEANS * range_mm * (1.0 + 1e-9) + 1e-6
    reach += margin
    z_max += margin
    if reach >= scanner.radius_mm:
        return 1.0
    elevation = math.atan2(0.5 * scanner.axial_length_mm + z_max, scanner.radius_mm - reach)
    elevation += 1.001 * NORMAL_PAIR_MAX * noncollinearity_sigma_rad + 1e-9
    if elevation >= 0.5 * math.pi:
        return 1.0
    return math.sin(elevation)


def simulate_step(src: _Source, scanner: Scanner, physics: PhysicsOptions, settings: StepSettings,
                  detection_probability: np.ndarray, seed: int, k: int, t0: float, t1: float) -> tuple:
    """Simulate step ``k``, [t0, t1) s: emission, photon pairs, randoms and delayed.

    Poisson counts come from numpy (``SeedSequence(seed, spawn_key=(0, k, 0))``),
    everything per event from the kernels' xoshiro256** stream
    (``spawn_key=(0, k, 1)``). Returns ``(parts, single_crystal, single_energy,
    counters, (expected randoms, expected delayed))`` where ``parts`` is a list of
    (time_ns, crystal_a, crystal_b, tof_ps, energy_a, energy_b, kind) tuples, kind 3
    for delayed; ``counters[N_ANNIHILATIONS]`` includes the annihilations outside the
    detection cone, which are counted but not followed.
    """
    counts_rng = np.random.default_rng(np.random.SeedSequence(seed, spawn_key=(0, k, 0)))
    rng = state_from_seed(np.random.SeedSequence(seed, spawn_key=(0, k, 1)))
    lam, pf, dt = settings.lam, settings.positron_fraction, t1 - t0
    n_outside = 0
    far = None
    if src.voxel_cdf is not None:
        n_emit = int(counts_rng.poisson(src.voxel_total_bq * pf * _decay_integral_s(lam, t0, t1)))
        xs, ys, zs, ts, _ = K.emit_from_voxels(
            rng, src.voxel_cdf, np.array(src.activity_image.shape, dtype=np.int64), src.origin, src.voxel,
            n_emit, lam, t0, dt, settings.range_mm)
    else:
        means, env = emission_means(src, lam, pf, t0, t1)
        counts = counts_rng.poisson(means).astype(np.int64)
        if settings.cone < 1.0:
            inside = counts_rng.binomial(counts, settings.cone).astype(np.int64)
            outside = counts - inside
            counts = inside
            if settings.range_mm > 0.0:
                # outside the cone, positron ranges beyond the cone's margin may still reach the
                # ring: that tail (exponential, memoryless) is split off and followed
                far = counts_rng.binomial(outside, math.exp(-RANGE_MARGIN_MEANS)).astype(np.int64)
                outside = outside - far
            # outside the cone nothing is detected; only the annihilation count is
            # needed, and it needs the thinning (replacement, time-activity curve) only
            # where a later shape or a curve can reject a candidate
            thinned = (src.tac_len > 0) | (np.arange(len(src.kinds)) < len(src.kinds) - 1)
            n_outside = int(outside[~thinned].sum())
            if np.any(outside[thinned] > 0):
                kept = K.emit_from_shapes(rng, src.kinds, src.params, np.where(thinned, outside, 0), env,
                                          src.tac_times, src.tac_values, src.tac_len, lam, t0, dt, 0.0, 0.0)[0]
                n_outside += len(kept)
        xs, ys, zs, ts, _ = K.emit_from_shapes(
            rng, src.kinds, src.params, counts, env, src.tac_times, src.tac_values, src.tac_len,
            lam, t0, dt, settings.range_mm, 0.0)
    groups = [((xs, ys, zs, ts), 0.0, settings.cone)]
    if far is not None:
        points = K.emit_from_shapes(rng, src.kinds, src.params, far, env, src.tac_times, src.tac_values,
                                    src.tac_len, lam, t0, dt, settings.range_mm,
                                    RANGE_MARGIN_MEANS * settings.range_mm)[:4]
        groups.append((points, settings.cone, 1.0))
    parts = []
    singles = []
    ctr = np.zeros(K.N_COUNTERS, dtype=np.int64)
    for (gx, gy, gz, gt), cos_lo, cos_hi in groups:
        (c_time, c_a, c_b, c_tof, c_ea, c_eb, c_kind, g_crystal, g_energy, g_ctr) = K.detect_pairs(
            rng, gx, gy, gz, gt, src.mode, src.kinds, src.params, src.mus, src.grid, src.origin, src.voxel,
            src.bound, scanner.radius_mm, 0.5 * scanner.axial_length_mm, scanner.axial_pitch_mm, scanner.rings,
            scanner.crystals_per_ring, scanner.angle_offset_rad, physics.attenuation, physics.scatter,
            settings.noncollinearity_sigma_rad, detection_probability, settings.energy_sigma_kev,
            physics.lld_kev, physics.uld_kev, scanner.tof_fwhm_ps * FWHM_TO_SIGMA, cos_lo, cos_hi)
        parts.append((c_time, c_a, c_b, c_tof, c_ea, c_eb, c_kind))
        singles.append((g_crystal, g_energy))
        ctr += g_ctr
    s_crystal = np.concatenate([g[0] for g in singles])
    s_energy = np.concatenate([g[1] for g in singles])
    ctr[K.N_ANNIHILATIONS] += n_outside
    expected = [0.0, 0.0]
    for i, (kind, wanted) in enumerate(((K.RANDOM, physics.randoms), (3, physics.delayed))):
        if not wanted:
            continue
        expected[i] = K.expected_randoms(s_crystal, scanner.n_crystals, settings.tau_s, dt)
        r_time, r_a, r_b, r_tof, r_ea, r_eb = K.draw_randoms(
            rng, int(counts_rng.poisson(expected[i])), s_crystal, s_energy, t0, dt,
            scanner.coincidence_window_ns)
        parts.append((r_time, r_a, r_b, r_tof, r_ea, r_eb, np.full(len(r_time), kind, dtype=np.int8)))
    return parts, s_crystal, s_energy, ctr, tuple(expected)


def simulate(phantom: Phantom, output, *, scanner: Scanner | None = None, duration_s: float | None = None,
             seed: int = 0, acquisition_start: str | None = None, chunk_s: float = 1.0,
             physics: PhysicsOptions | None = None, write_truth: bool = True, on_chunk=None) -> SimulationResult:
    """Simulate an acquisition of a phantom and write the event file and its truth.

    Parameters
    ----------
    phantom : Phantom
        From :func:`twinray.simulate.load_phantom`.
    output : path-like
        Event file to write (Parquet, data contract section 2), atomically.
    scanner : Scanner, optional
        Overrides the phantom's ``scanner`` key.
    duration_s : float, optional
        Acquisition length, s; overrides the phantom's ``duration_s``.
    seed : int
        Random seed (>= 0); the same seed and inputs give the same file.
    acquisition_start : str, optional
        ISO 8601 date-time of time_ns = 0.
    chunk_s : float
        Length of a simulation step, s (shortened automatically so that a
        step draws at most about 1 million emission candidates).
    physics : PhysicsOptions, optional
        Overrides the phantom's ``[physics]`` table.
    write_truth : bool
        Also write ``<stem>_truth.json`` and the activity and mu images.
    on_chunk : callable, optional
        Called with the simulated seconds after every step (progress).

    Returns
    -------
    SimulationResult
    """
    t_start = time.perf_counter()
    output = Path(output)
    if scanner is None:
        if phantom.scanner_path is None:
            raise TwinrayInputError(f"{phantom.path} names no scanner; give --scanner")
        scanner = load_scanner(phantom.scanner_path)
    physics = check_physics(physics or phantom.physics)
    duration = duration_s if duration_s is not None else phantom.duration_s
    if duration is None:
        raise TwinrayInputError(f"{phantom.path} has no duration_s; give --duration")
    if not (duration > 0 and math.isfinite(duration)):
        raise TwinrayInputError(f"the duration must be a positive number of seconds, got {duration}")
    if not (chunk_s > 0 and math.isfinite(chunk_s)):
        raise TwinrayInputError(f"the chunk length must be a positive number of seconds, got {chunk_s}")
    if isinstance(seed, bool) or not isinstance(seed, (int, np.integer)) or seed < 0:
        raise TwinrayInputError(f"the seed must be a non-negative integer, got {seed!r}")
    seed = int(seed)
    if not output.name.endswith(".parquet"):
        raise TwinrayInputError(f"event output {output} must end in .parquet")
    check_phantom_in_fov(phantom, scanner)
    truth = truth_paths_for(output)
    inputs = [phantom.path, phantom.scanner_path, phantom.voxel_activity, phantom.voxel_mu]
    for out in [output, *truth.values()]:
        refuse_overwriting_inputs(out, inputs)

    iso = get_isotope(phantom.isotope)
    lam = iso.decay_constant_per_s
    pf = iso.positron_fraction
    src = _prepare_source(phantom, scanner, physics)
    eff = crystal_efficiencies(scanner, physics, seed, phantom.path.parent)
    detection_probability = physics.intrinsic_efficiency * eff / eff.max()

    peak_rate = _peak_candidate_rate(src, pf)
    step = chunk_s
    if peak_rate * step > MAX_CANDIDATES_PER_CHUNK:
        step = MAX_CANDIDATES_PER_CHUNK / peak_rate
    n_chunks = max(1, int(math.ceil(duration / step - 1e-9)))
    step = duration / n_chunks

    tof = scanner.tof_fwhm_ps > 0
    columns = ["time_ns", "crystal_a", "crystal_b", "delayed"] + (["tof_ps"] if tof else []) + \
        ["energy_a_kev", "energy_b_kev"]
    start = acquisition_start or phantom.acquisition_start or DEFAULT_ACQUISITION_START
    total_activity_start = float(sum(row["activity_bq_at_start"] for row in src.shape_table))
    metadata = {
        "scanner": scanner.to_dict(),
        "isotope": iso.name,
        "acquisition_start": start,
        "duration_s": float(duration),
        "simulation": {"phantom": phantom.name, "seed": seed},
    }
    if phantom.injection_time:
        metadata["injection_time"] = phantom.injection_time
    if phantom.injected_activity_bq is not None:
        metadata["injected_activity_bq"] = phantom.injected_activity_bq
    elif all(s.tac_times_s is None for s in phantom.shapes):
        # a static phantom: the activity it holds, decayed back to the injection time when known
        elapsed = _seconds_between(phantom.injection_time, start) if phantom.injection_time else 0.0
        metadata["injected_activity_bq"] = total_activity_start * math.exp(lam * elapsed)
    if phantom.normalization_source is not None:
        metadata["normalization_source"] = phantom.normalization_source

    counts = dict.fromkeys(_KIND_NAMES, 0)
    window_counts = dict.fromkeys(_KIND_NAMES, 0)
    other = {"annihilations": 0, "singles": 0, "photons_scattered": 0, "photons_absorbed": 0,
             "expected_randoms": 0.0, "expected_delayed": 0.0}
    singles_per_crystal = np.zeros(scanner.n_crystals, dtype=np.int64)
    half_length = 0.5 * scanner.axial_length_mm
    tau_s = 0.5 * scanner.coincidence_window_ns * 1e-9
    e_sigma = physics.energy_resolution_fwhm * 511.0 * FWHM_TO_SIGMA
    nc_sigma = NONCOLLINEARITY_SIGMA_RAD if physics.non_collinearity else 0.0
    range_mm = mean_positron_range_mm(iso.name) if physics.positron_range else 0.0
    lo, hi = scanner.energy_window_kev
    settings = StepSettings(lam=lam, positron_fraction=pf, range_mm=range_mm, noncollinearity_sigma_rad=nc_sigma,
                            energy_sigma_kev=e_sigma, tau_s=tau_s,
                            cone=detection_cone(src, scanner, physics, range_mm, nc_sigma))
    kernel_s = 0.0
    writer = EventWriter(output, metadata, columns)
    try:
        for k in range(n_chunks):
            t0 = k * step
            t1 = duration if k == n_chunks - 1 else (k + 1) * step
            dt = t1 - t0
            tk = time.perf_counter()
            parts, s_crystal, s_energy, ctr, expected = simulate_step(
                src, scanner, physics, settings, detection_probability, seed, k, t0, t1)
            other["expected_randoms"] += expected[0]
            other["expected_delayed"] += expected[1]
            kernel_s += time.perf_counter() - tk
            time_ns, ca, cb, tof_ps, ea, eb, kinds = (np.concatenate(col) for col in zip(*parts))
            order = np.argsort(time_ns, kind="stable")
            batch = {"time_ns": time_ns[order], "crystal_a": ca[order], "crystal_b": cb[order],
                     "delayed": kinds[order] == 3, "energy_a_kev": ea[order], "energy_b_kev": eb[order]}
            if tof:
                batch["tof_ps"] = tof_ps[order]
            writer.write(batch)
            in_window = (ea >= lo) & (ea <= hi) & (eb >= lo) & (eb <= hi)
            for code, name in enumerate(_KIND_NAMES):
                sel = kinds == code
                counts[name] += int(sel.sum())
                window_counts[name] += int((sel & in_window).sum())
            other["annihilations"] += int(ctr[K.N_ANNIHILATIONS])
            other["photons_scattered"] += int(ctr[K.N_PHOTONS_SCATTERED])
            other["photons_absorbed"] += int(ctr[K.N_PHOTONS_ABSORBED])
            other["singles"] += len(s_crystal)
            singles_per_crystal += np.bincount(s_crystal, minlength=scanner.n_crystals)
            if on_chunk is not None:
                on_chunk(dt)
        writer.close()
    except BaseException:
        writer.abort()
        raise

    result_counts = {
        **counts,
        "prompts": counts["trues"] + counts["scatters"] + counts["randoms"],
        "events_written": sum(counts.values()),
        "in_energy_window": window_counts,
        **other,
    }
    written = []
    if write_truth:
        written = _write_truth(truth, phantom, scanner, physics, src, iso, seed, duration, n_chunks, start,
                               result_counts, eff, singles_per_crystal, total_activity_start)
    result_counts["kernel_s"] = round(kernel_s, 3)
    result_counts["wall_s"] = round(time.perf_counter() - t_start, 3)
    return SimulationResult(output, tuple(written), result_counts, float(duration), n_chunks, seed)


def _seconds_between(earlier: str, later: str) -> float:
    """Seconds from one ISO 8601 date-time to another (naive times are taken as UTC)."""
    from datetime import datetime, timezone

    def parse(text):
        value = datetime.fromisoformat(text.replace("Z", "+00:00"))
        return value if value.tzinfo else value.replace(tzinfo=timezone.utc)

    try:
        return (parse(later) - parse(earlier)).total_seconds()
    except ValueError:
        raise TwinrayInputError(f"cannot compare the date-times {earlier!r} and {later!r}") from None


def _write_truth(truth, phantom, scanner, physics, src, iso, seed, duration, n_chunks, start, counts, eff,
                 singles_per_crystal, total_activity_start) -> list:
    dynamic = any(s.tac_times_s is not None for s in phantom.shapes)
    if src.activity_image is None:
        img_shape, src.image_affine = truth_grid(scanner)
        # with time-activity curves the image holds the reference concentrations
        # (multiplier 1); the curves are in the truth JSON, the regions in the label image
        src.activity_image, src.mu_image = rasterize(phantom.shapes, img_shape, src.image_affine,
                                                     time_s=None if dynamic else 0.0)
    common = {"TracerRadionuclide": iso.name, "twinray": {"phantom": phantom.name, "seed": seed}}
    written = []
    description = ("reference activity concentration of each shape (time-activity multiplier 1, no decay); "
                   "the concentration at time t is this times the shape's tac(t) (truth JSON 'shapes', "
                   "regions in the label image)" if dynamic else
                   "true activity concentration at acquisition start")
    written += write_image(truth["activity"], src.activity_image, src.image_affine,
                           {**common, "Units": "Bq/mL", "ImageDecayCorrected": True,
                            "ImageDecayCorrectionTime": 0.0, "Description": description})
    if phantom.shapes:
        labels = label_image(phantom.shapes, src.activity_image.shape, src.image_affine)
        written += write_image(truth["labels"], labels, src.image_affine,
                               {**common, "Units": "label",
                                "Description": "shape at each voxel centre: 0 none, i + 1 for shapes[i] of "
                                               "the truth JSON"})
    written += write_image(truth["mu"], src.mu_image, src.image_affine,
                           {**common, "Units": "1/cm",
                            "Description": "linear attenuation coefficient at 511 keV"})
    doc = {
        "phantom": phantom.name,
        "phantom_file": str(phantom.path),
        "isotope": iso.name,
        "half_life_s": iso.half_life_s,
        "positron_fraction": iso.positron_fraction,
        "seed": seed,
        "duration_s": duration,
        "chunks": n_chunks,
        "acquisition_start": start,
        "scanner": scanner.to_dict(),
        "physics": dataclasses.asdict(physics),
        "total_activity_bq_at_start": total_activity_start,
        "shapes": src.shape_table,
        "counts": counts,
        "singles_per_crystal": singles_per_crystal.tolist(),
        "crystal_efficiency": np.round(eff, 6).tolist(),
        "images": {"activity": truth["activity"].name, "mu": truth["mu"].name,
                   "labels": truth["labels"].name if phantom.shapes else None},
    }
    with atomic_path(truth["json"], suffix=".json") as tmp:
        tmp.write_text(json.dumps(doc, indent=1, sort_keys=True) + "\n")
    written.append(truth["json"])
    return written
