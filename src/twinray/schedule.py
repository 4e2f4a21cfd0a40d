"""Frame schedules of dynamic studies.

A schedule is a list of consecutive, half-open time frames
``[start_s, end_s)`` in seconds from acquisition start (data contract,
section 6). It is written as runs of equal frames, ``"6x10,4x30,5x60"``
(six 10-s frames, then four of 30 s, then five of 60 s), either on the command
line or in a TOML schedule file::

    # configs/schedules/example.toml
    description = "what the schedule is for"
    frames = ["6x10", "4x30", "5x60"]   # or one string "6x10,4x30,5x60"
    start_s = 0.0                        # optional: first frame start

Frames are in time order and without gaps; a schedule that runs past the end
of the data is refused unless it is truncated explicitly
(:func:`fit_schedule_to_data`).
"""

from __future__ import annotations

import dataclasses
import math
import re
import tomllib
from pathlib import Path

from .errors import TwinrayInputError

#: More frames than this is almost certainly a typing slip (e.g. "6000x1").
MAX_FRAMES = 10000

_RUN = re.compile(r"^\s*(?:(\d+)\s*[xX*]\s*)?([0-9]*\.?[0-9]+(?:[eE][-+]?\d+)?)\s*$")

#: Folder of the schedules shipped with the source tree.
SHIPPED_SCHEDULES = Path(__file__).resolve().parent / "configs" / "schedules"


@dataclasses.dataclass(frozen=True)
class FrameSchedule:
    """Consecutive time frames of a dynamic study.

    Attributes
    ----------
    starts_s : tuple of float
        Frame starts, s from acquisition start.
    durations_s : tuple of float
        Frame lengths, s (> 0).
    source : str
        Where the schedule came from (for messages and sidecars).
    """

    starts_s: tuple
    durations_s: tuple
    source: str = "schedule"

    @property
    def n_frames(self) -> int:
        return len(self.starts_s)

    @property
    def ends_s(self) -> tuple:
        return tuple(s + d for s, d in zip(self.starts_s, self.durations_s))

    @property
    def mid_s(self) -> tuple:
        """Frame mid-points, s."""
        return tuple(s + 0.5 * d for s, d in zip(self.starts_s, self.durations_s))

    @property
    def start_s(self) -> float:
        return self.starts_s[0]

    @property
    def end_s(self) -> float:
        return self.ends_s[-1]

    def frames(self) -> list:
        """``[(start_s, end_s), ...]``, the form the binning takes."""
        return list(zip(self.starts_s, self.ends_s))

    def describe(self) -> str:
        """Compact run-length text, e.g. ``"6x10,4x30,5x60"`` (plus ``@start`` when not 0)."""
        runs = []
        for d in self.durations_s:
            if runs and runs[-1][1] == d:
                runs[-1][0] += 1
            else:
                runs.append([1, d])
        text = ",".join(f"{n}x{_num(d)}" for n, d in runs)
        return text if self.start_s == 0 else f"{text}@{_num(self.start_s)}"


def _num(x: float) -> str:
    return f"{x:g}"


def schedule_from_runs(runs, start_s: float = 0.0, source: str = "schedule") -> FrameSchedule:
    """Build a schedule from ``[(count, duration_s), ...]`` runs of equal frames.

    Parameters
    ----------
    runs : sequence of (int, float)
        Number of frames and their length, s.
    start_s : float
        Start of the first frame, s from acquisition start (>= 0).
    source : str
        Name used in error messages.

    Returns
    -------
    FrameSchedule
    """
    if not math.isfinite(start_s) or start_s < 0:
        raise TwinrayInputError(f"{source}: the first frame must start at >= 0 s, got {start_s}")
    starts, durations = [], []
    t = float(start_s)
    total = 0
    for count, duration in runs:
        if count < 1:
            raise TwinrayInputError(f"{source}: frame count must be >= 1, got {count}")
        if not math.isfinite(duration) or duration <= 0:
            raise TwinrayInputError(f"{source}: frame length must be a positive number of seconds, got {duration}")
        total += count
        if total > MAX_FRAMES:
            raise TwinrayInputError(f"{source}: more than {MAX_FRAMES} frames")
        for _ in range(count):
            starts.append(t)
            durations.append(float(duration))
            t += float(duration)
    if not starts:
        raise TwinrayInputError(f"{source}: the schedule has no frames")
    return FrameSchedule(tuple(starts), tuple(durations), source)


def parse_schedule(text: str, start_s: float = 0.0, source: str | None = None) -> FrameSchedule:
    """Parse ``"6x10,4x30,5x60"``: runs of ``COUNTxSECONDS`` (a bare number is one frame).

    Parameters
    ----------
    text : str
        Comma-separated runs; ``x``, ``X`` or ``*`` between count and length.
    start_s : float
        Start of the first frame, s.
    source : str, optional
        Name used in error messages (default: the text itself).

    Returns
    -------
    FrameSchedule

    Examples
    --------
    >>> parse_schedule("2x30,60").frames()
    [(0.0, 30.0), (30.0, 60.0), (60.0, 120.0)]
    """
    source = source or f"schedule '{text}'"
    if not isinstance(text, str) or not text.strip():
        raise TwinrayInputError(f"{source}: empty schedule; write runs like 6x10,4x30,5x60")
    runs = []
    for part in text.split(","):
        m = _RUN.match(part)
        if not m:
            raise TwinrayInputError(
                f"{source}: cannot read '{part.strip()}'; write runs like 6x10 (six frames of 10 s)")
        runs.append((int(m.group(1)) if m.group(1) else 1, float(m.group(2))))
    return schedule_from_runs(runs, start_s=start_s, source=source)


def load_schedule_file(path) -> FrameSchedule:
    """Read a TOML schedule file (see the module docstring for its layout)."""
    path = Path(path)
    try:
        data = tomllib.loads(path.read_text(encoding="utf-8"))
    except (OSError, UnicodeDecodeError) as exc:
        raise TwinrayInputError(f"schedule file {path} cannot be read ({exc})") from None
    except tomllib.TOMLDecodeError as exc:
        raise TwinrayInputError(f"schedule file {path} is not valid TOML ({' '.join(str(exc).split())})") from None
    unknown = set(data) - {"description", "frames", "start_s"}
    if unknown:
        raise TwinrayInputError(f"schedule file {path}: unknown key(s) {', '.join(sorted(unknown))}")
    frames = data.get("frames")
    if isinstance(frames, list) and all(isinstance(f, str) for f in frames):
        frames = ",".join(frames)
    if not isinstance(frames, str):
        raise TwinrayInputError(f"schedule file {path}: 'frames' must be a string or a list of strings like \"6x10\"")
    start = data.get("start_s", 0.0)
    if isinstance(start, bool) or not isinstance(start, (int, float)):
        raise TwinrayInputError(f"schedule file {path}: 'start_s' must be a number of seconds")
    return parse_schedule(frames, start_s=float(start), source=f"schedule file {path}")


def load_schedule(spec: str) -> FrameSchedule:
    """A schedule from a run-length text, a TOML file path, or the name of a shipped schedule.

    Parameters
    ----------
    spec : str
        ``"6x10,4x30,5x60"``, ``"path/to/schedule.toml"``, or the stem of a
        file in ``configs/schedules/`` (e.g. ``"fdg-60min"``).

    Returns
    -------
    FrameSchedule
    """
    spec = str(spec).strip()
    path = Path(spec)
    if path.suffix.lower() == ".toml" or path.is_file():
        if not path.is_file():
            raise TwinrayInputError(f"schedule file {path} does not exist")
        return load_schedule_file(path)
    shipped = SHIPPED_SCHEDULES / f"{spec}.toml"
    if re.fullmatch(r"[A-Za-z][\w.-]*", spec):
        if shipped.is_file():
            return load_schedule_file(shipped)
        names = sorted(p.stem for p in SHIPPED_SCHEDULES.glob("*.toml")) if SHIPPED_SCHEDULES.is_dir() else []
        known = f" (shipped: {', '.join(names)})" if names else ""
        raise TwinrayInputError(f"schedule '{spec}' is neither runs like 6x10,4x30 nor a schedule file{known}")
    return parse_schedule(spec)


def fit_schedule_to_data(schedule: FrameSchedule, data_duration_s: float | None,
                         truncate: bool = False) -> FrameSchedule:
    """Check a schedule against the length of the data; cut it there when asked.

    Parameters
    ----------
    schedule : FrameSchedule
    data_duration_s : float or None
        Acquisition length of the events (``duration_s`` of the file
        metadata); ``None`` when unknown (the schedule is kept as is).
    truncate : bool
        Drop frames that start at or after the end of the data and shorten the
        frame that straddles it, instead of refusing the schedule.

    Returns
    -------
    FrameSchedule

    Raises
    ------
    TwinrayInputError
        The schedule runs past the data and ``truncate`` is false, or no frame
        is left after truncation.
    """
    if data_duration_s is None:
        return schedule
    duration = float(data_duration_s)
    # A relative slack of 1e-9 absorbs float round-off in summed frame lengths.
    slack = 1e-9 * max(1.0, duration)
    if schedule.end_s <= duration + slack:
        return schedule
    if not truncate:
        raise TwinrayInputError(
            f"{schedule.source} runs to {schedule.end_s:g} s but the data end at {duration:g} s; "
            "shorten it or pass --truncate")
    starts, durations = [], []
    for s, d in zip(schedule.starts_s, schedule.durations_s):
        if s >= duration - slack:
            break
        starts.append(s)
        durations.append(min(d, duration - s))
    if not starts:
        raise TwinrayInputError(
            f"{schedule.source} starts at {schedule.start_s:g} s, after the data end at {duration:g} s")
    return FrameSchedule(tuple(starts), tuple(durations), schedule.source)
