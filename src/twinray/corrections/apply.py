"""All corrections of one frame, from binned prompts and delayed to the stored datasets.

:func:`prepare_corrections` loads what does not change from frame to frame
(the normalization file, the ACF ray-traced from the mu-map, the singles
rates of every frame); :func:`apply_corrections` is a plain function over
arrays that returns the datasets of data contract section 3

    randoms, scatter, norm, acf, corrected = norm * acf * (prompts - randoms - scatter)

and the root attributes (decay-correction factor of the frame, isotope,
what was applied). Both are picklable, so ``dynamic`` can run frames in
worker processes.

Order of the estimates: randoms first (delayed fan-sum fit or singles);
then scatter from the tails of ``prompts - randoms`` (it needs the norm and
the ACF). Dead time, when asked for, multiplies ``norm`` (it is a
multiplicative loss of the detector pair, like an efficiency), so OSEM
models it too.
"""

from __future__ import annotations

import dataclasses

import numpy as np

from ..errors import TwinrayInputError
from ..geometry import SinogramGeometry
from .deadtime import DEADTIME_MODELS, deadtime_factors
from .normalization import norm_from_factors, read_norm_file
from .randoms import RANDOMS_METHODS, randoms_from_delayed, randoms_from_singles, read_singles_rates
from .scatter import SCATTER_METHODS, TailFitOptions, estimate_scatter


@dataclasses.dataclass(frozen=True)
class CorrectionOptions:
    """What to correct and how (the command-line choices).

    Attributes
    ----------
    randoms : {"delayed", "singles", "none", "auto"}
        ``"auto"``: delayed when the frame has delayed events, else none.
    scatter : {"none", "tail-fit"}
    deadtime_ns : float
        Dead time per single event, ns; 0 = no dead-time correction.
        Needs singles rates.
    deadtime_model : {"nonparalysable", "paralysable"}
    randoms_iterations : int
        Outer EM iterations of the delayed fan-sum fit (spans > 1; one suffices for span 1).
    decay_reference_s : float
        Time the decay-correction factor refers to, s from acquisition start
        (0: acquisition start; negative for an injection before it).
    tail_fit : TailFitOptions
    """

    randoms: str = "none"
    scatter: str = "none"
    deadtime_ns: float = 0.0
    deadtime_model: str = "nonparalysable"
    randoms_iterations: int = 5
    decay_reference_s: float = 0.0
    tail_fit: TailFitOptions = TailFitOptions()

    def __post_init__(self):
        if self.randoms not in RANDOMS_METHODS + ("auto",):
            raise TwinrayInputError(f"unknown randoms method {self.randoms!r}; choose {', '.join(RANDOMS_METHODS)}")
        if self.scatter not in SCATTER_METHODS:
            raise TwinrayInputError(f"unknown scatter method {self.scatter!r}; choose {', '.join(SCATTER_METHODS)}")
        if self.deadtime_model not in DEADTIME_MODELS:
            raise TwinrayInputError(f"unknown dead-time model {self.deadtime_model!r}; "
                                    f"choose {', '.join(DEADTIME_MODELS)}")
        if not (np.isfinite(self.deadtime_ns) and self.deadtime_ns >= 0):
            raise TwinrayInputError(f"dead time must be >= 0 ns, got {self.deadtime_ns!r}")


@dataclasses.dataclass(frozen=True)
class CorrectionInputs:
    """Frame-independent inputs of the corrections, loaded once.

    Attributes
    ----------
    norm : ndarray or None
        From the normalization file (geometry checked); None: only the
        axial-compression factor (1 / crystal pairs per bin).
    acf : ndarray or None
        ACF sinogram from the mu-map; None: no attenuation correction.
    singles_rate_cps : ndarray or None, shape (n_frames, n_crystals)
        Mean recorded singles rate of every crystal in each frame.
    frames_s : tuple of (start_s, end_s) or None
        The frames the singles rates belong to.
    norm_path, mu_path, singles_path : str or None
        Where they came from (recorded in the attributes).
    """

    norm: np.ndarray | None = None
    acf: np.ndarray | None = None
    singles_rate_cps: np.ndarray | None = None
    frames_s: tuple | None = None
    norm_path: str | None = None
    mu_path: str | None = None
    singles_path: str | None = None


@dataclasses.dataclass(frozen=True)
class CorrectedSinogram:
    """Output of :func:`apply_corrections`.

    Attributes
    ----------
    datasets : dict of str to ndarray (float32)
        ``randoms``, ``scatter``, ``norm``, ``acf``, ``corrected``.
    attrs : dict
        Root attributes: ``decay_correction_factor``, ``isotope``,
        ``half_life_s``, ``decay_reference_s``, ``corrections`` (what was
        applied), ``randoms_fraction``, ``scatter_fraction``.
    notes : tuple of str
        Warnings for the user.
    """

    datasets: dict
    attrs: dict
    notes: tuple


def prepare_corrections(geometry: SinogramGeometry, options: CorrectionOptions, *, norm_path=None, mu_path=None,
                        singles_path=None, frames_s=None) -> CorrectionInputs:
    """Load the normalization, ray-trace the mu-map and read singles rates.

    Parameters
    ----------
    geometry : SinogramGeometry
        Layout of the sinograms to correct.
    options : CorrectionOptions
    norm_path : path-like, optional
        NORM.h5 from ``twinray normalize`` (refused if made for another geometry).
    mu_path : path-like, optional
        mu-map NIfTI, 1/cm at 511 keV, scanner frame.
    singles_path : path-like, optional
        Singles Parquet file (data contract section 2).
    frames_s : sequence of (start_s, end_s), optional
        Frames whose singles rates are needed.

    Returns
    -------
    CorrectionInputs

    Raises
    ------
    TwinrayInputError
        Bad files, or options that need an input that is missing
        (``randoms="singles"`` or a dead time without singles, tail-fit
        scatter without a mu-map).
    """
    from .attenuation import attenuation_factors_from_file

    if options.randoms == "singles" and singles_path is None:
        raise TwinrayInputError("--randoms singles needs a singles file (--singles FILE)")
    if options.deadtime_ns > 0 and singles_path is None:
        raise TwinrayInputError("a dead-time correction needs the singles rates (--singles FILE)")
    if options.scatter == "tail-fit" and mu_path is None:
        raise TwinrayInputError("--scatter tail-fit needs a mu-map (--mu): the object edge comes from the ACF")
    norm = read_norm_file(norm_path, geometry) if norm_path is not None else None
    acf = attenuation_factors_from_file(mu_path, geometry) if mu_path is not None else None
    rates = None
    if singles_path is not None:
        if frames_s is None:
            raise ValueError("frames_s is needed to read singles rates")
        frames_s = tuple((float(a), float(b)) for a, b in frames_s)
        rates = read_singles_rates(singles_path, geometry.scanner.n_crystals, frames_s)
    return CorrectionInputs(norm=norm, acf=acf, singles_rate_cps=rates,
                            frames_s=None if frames_s is None else tuple(frames_s),
                            norm_path=None if norm_path is None else str(norm_path),
                            mu_path=None if mu_path is None else str(mu_path),
                            singles_path=None if singles_path is None else str(singles_path))


def _decay(isotope, frame_start_s, frame_duration_s, reference_s, notes):
    from ..decay import frame_decay_factor
    from ..isotopes import get_isotope

    if not isotope:
        notes.append("the events name no isotope; decay_correction_factor is 1 (no decay correction)")
        return 1.0, None
    try:
        iso = get_isotope(str(isotope), "the event metadata")
    except TwinrayInputError as exc:
        notes.append(f"{exc}; decay_correction_factor is 1 (no decay correction)")
        return 1.0, None
    return float(frame_decay_factor(iso.half_life_s, frame_start_s, frame_duration_s, reference_s)), iso


def apply_corrections(prompts, delayed, geometry: SinogramGeometry, options: CorrectionOptions,
                      inputs: CorrectionInputs | None = None, *, frame_index: int = 0, frame_start_s: float = 0.0,
                      frame_duration_s: float = 0.0, isotope: str | None = None) -> CorrectedSinogram:
    """Randoms, scatter, normalization, attenuation, dead time and decay of one frame.

    Parameters
    ----------
    prompts : ndarray, shape ``geometry.shape``
        Binned prompt counts of the frame.
    delayed : ndarray or None, shape ``geometry.shape``
        Binned delayed counts (None when the events have no delayed column).
    geometry : SinogramGeometry
    options : CorrectionOptions
    inputs : CorrectionInputs, optional
        From :func:`prepare_corrections`; default: nothing loaded.
    frame_index : int
        Which row of ``inputs.singles_rate_cps`` belongs to this frame.
    frame_start_s, frame_duration_s : float
        The frame, seconds from acquisition start.
    isotope : str, optional
        For the decay-correction factor (``frame_decay_factor`` of
        :mod:`twinray.decay`, referred to ``options.decay_reference_s``).

    Returns
    -------
    CorrectedSinogram

    Raises
    ------
    TwinrayInputError
        ``randoms="delayed"`` without delayed events.
    """
    inputs = inputs or CorrectionInputs()
    notes = []
    prompts = np.asarray(prompts)
    if prompts.shape != geometry.shape:
        raise ValueError(f"prompts have shape {prompts.shape}, geometry says {geometry.shape}")
    rates = None
    if inputs.singles_rate_cps is not None:
        rates = np.asarray(inputs.singles_rate_cps)[frame_index]

    # Randoms.
    method = options.randoms
    if method == "auto":
        method = "delayed" if delayed is not None and np.asarray(delayed).sum() > 0 else "none"
        if method == "none" and prompts.sum() > 0:
            notes.append("no delayed events: no randoms correction (--randoms auto)")
    if method == "delayed":
        if delayed is None:
            raise TwinrayInputError("--randoms delayed: the events have no delayed column; "
                                    "use --randoms singles (with --singles) or --randoms none")
        delayed = np.asarray(delayed)
        if delayed.sum() == 0 and prompts.sum() > 0:
            raise TwinrayInputError(f"--randoms delayed: no delayed event was binned in the frame "
                                    f"{frame_start_s:g} s + {frame_duration_s:g} s; "
                                    "use --randoms singles (with --singles) or --randoms none")
        randoms = randoms_from_delayed(delayed, geometry, options.randoms_iterations)
    elif method == "singles":
        if rates is None:
            raise TwinrayInputError("--randoms singles needs a singles file (--singles FILE)")
        randoms = randoms_from_singles(rates, geometry, frame_duration_s)
    else:
        randoms = np.zeros(geometry.shape, np.float32)

    # Normalization (times dead time) and attenuation.
    norm = inputs.norm if inputs.norm is not None else norm_from_factors(geometry)
    norm = np.asarray(norm, dtype=np.float32)
    deadtime_mean = None
    if options.deadtime_ns > 0:
        if rates is None:
            raise TwinrayInputError("a dead-time correction needs the singles rates (--singles FILE)")
        dt = deadtime_factors(rates, options.deadtime_ns * 1e-9, geometry, options.deadtime_model)
        deadtime_mean = float(dt.mean())
        norm = (norm * dt).astype(np.float32)
    acf = inputs.acf if inputs.acf is not None else np.ones(geometry.shape, np.float32)
    acf = np.asarray(acf, dtype=np.float32)

    # Scatter from the tails of the randoms-subtracted data.
    # float32 is exact for counts up to 2**24 per bin and halves the memory of large sinograms.
    emission = prompts.astype(np.float32) - randoms
    scatter, scatter_notes = estimate_scatter(options.scatter, emission, norm,
                                              inputs.acf if options.scatter != "none" else None, geometry,
                                              options.tail_fit)
    notes.extend(scatter_notes)

    corrected = emission - scatter
    corrected *= norm
    corrected *= acf
    dcf, iso = _decay(isotope, frame_start_s, frame_duration_s, options.decay_reference_s, notes)

    total = float(prompts.sum())
    net = total - float(randoms.sum())
    attrs = {
        "decay_correction_factor": dcf,
        "isotope": iso.name if iso is not None else (isotope or "unknown"),
        "half_life_s": iso.half_life_s if iso is not None else None,
        "decay_reference_s": float(options.decay_reference_s),
        "randoms_fraction": float(randoms.sum()) / total if total > 0 else 0.0,
        "scatter_fraction": float(scatter.sum()) / net if net > 0 else 0.0,
        "corrections": {
            "randoms": method,
            "randoms_method": {"delayed": "delayed window, fan-sum ML crystal factors (Casey & Hoffman 1986)",
                               "singles": "2*tau*S_a*S_b*T from singles rates",
                               "none": "none"}[method],
            "scatter": options.scatter,
            "norm": inputs.norm_path or "axial compression only (1 / crystal pairs per bin)",
            "attenuation": inputs.mu_path or "none",
            "attenuation_method": "Siddon ray tracing of the mu-map" if inputs.mu_path else "none",
            "singles": inputs.singles_path,
            "deadtime_ns": float(options.deadtime_ns),
            "deadtime_model": options.deadtime_model if options.deadtime_ns > 0 else "none",
            "deadtime_mean_factor": deadtime_mean,
            "decay": "decay_correction_factor to be applied to images (not to the sinograms)",
        },
    }
    datasets = {"randoms": randoms.astype(np.float32), "scatter": scatter.astype(np.float32), "norm": norm,
                "acf": acf, "corrected": corrected}
    return CorrectedSinogram(datasets=datasets, attrs=attrs, notes=tuple(notes))
