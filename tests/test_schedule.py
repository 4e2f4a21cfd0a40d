"""Frame schedules (twinray.schedule)."""

import pytest

from twinray.errors import TwinrayInputError
from twinray.schedule import (FrameSchedule, fit_schedule_to_data, load_schedule, load_schedule_file,
                              parse_schedule, SHIPPED_SCHEDULES)


def test_runs_make_consecutive_half_open_frames():
    s = parse_schedule("6x10,4x30,5x60")
    assert s.n_frames == 15
    assert s.frames()[:2] == [(0.0, 10.0), (10.0, 20.0)]
    assert s.frames()[6] == (60.0, 90.0)
    assert s.end_s == 6 * 10 + 4 * 30 + 5 * 60
    # consecutive without gaps: each end is the next start
    assert all(e == s2 for e, s2 in zip(s.ends_s[:-1], s.starts_s[1:]))
    assert s.mid_s[0] == 5.0
    assert s.describe() == "6x10,4x30,5x60"


def test_spellings_and_offset():
    assert parse_schedule("2X30, 60").durations_s == (30.0, 30.0, 60.0)
    assert parse_schedule("3*0.5").ends_s == (0.5, 1.0, 1.5)
    s = parse_schedule("2x10", start_s=100.0)
    assert s.frames() == [(100.0, 110.0), (110.0, 120.0)]
    assert s.describe() == "2x10@100"


@pytest.mark.parametrize("bad", ["", "6x", "x10", "6x10,,2x5", "6x-10", "0x10", "6x0", "six x ten", "6x10;2x5"])
def test_bad_text_is_refused_with_a_clear_message(bad):
    with pytest.raises(TwinrayInputError) as err:
        parse_schedule(bad)
    assert "schedule" in str(err.value)
    assert "\n" not in str(err.value)


def test_too_many_frames():
    with pytest.raises(TwinrayInputError, match="more than"):
        parse_schedule("20000x1")


def test_shipped_schedules_load():
    names = sorted(p.stem for p in SHIPPED_SCHEDULES.glob("*.toml"))
    assert "fdg-60min" in names and "water-4min" in names
    fdg = load_schedule("fdg-60min")
    assert fdg.end_s == 3600.0 and fdg.n_frames == 25
    water = load_schedule(str(SHIPPED_SCHEDULES / "water-4min.toml"))
    assert water.end_s == 240.0 and water.durations_s[0] == 5.0


def test_schedule_file_layout(tmp_path):
    p = tmp_path / "s.toml"
    p.write_text('frames = ["2x5", "1x10"]\nstart_s = 30\n')
    s = load_schedule(str(p))
    assert s.frames() == [(30.0, 35.0), (35.0, 40.0), (40.0, 50.0)]
    p.write_text('frames = ["2x5"]\nstrat_s = 30\n')
    with pytest.raises(TwinrayInputError, match="unknown key"):
        load_schedule_file(p)
    p.write_text('frames = [2, 5]\n')
    with pytest.raises(TwinrayInputError, match="'frames'"):
        load_schedule_file(p)
    p.write_text('frames = "2x5\n')
    with pytest.raises(TwinrayInputError, match="not valid TOML"):
        load_schedule_file(p)
    with pytest.raises(TwinrayInputError, match="does not exist"):
        load_schedule(str(tmp_path / "missing.toml"))
    with pytest.raises(TwinrayInputError, match="neither"):
        load_schedule("no-such-schedule")


def test_past_the_data_is_an_error_unless_truncated():
    """Data contract s.6: a schedule past duration_s is an error unless truncated."""
    s = parse_schedule("6x10,4x30")  # ends at 180 s
    assert fit_schedule_to_data(s, 180.0) is s
    assert fit_schedule_to_data(s, None) is s
    with pytest.raises(TwinrayInputError, match="runs to 180 s but the data end at 150 s.*--truncate"):
        fit_schedule_to_data(s, 150.0)
    t = fit_schedule_to_data(s, 150.0, truncate=True)
    assert t.end_s == 150.0
    assert t.n_frames == 9 and t.durations_s[-1] == 30.0
    t = fit_schedule_to_data(s, 135.0, truncate=True)
    assert t.n_frames == 9 and t.durations_s[-1] == 15.0
    late = parse_schedule("2x10", start_s=500.0)
    with pytest.raises(TwinrayInputError, match="after the data end"):
        fit_schedule_to_data(late, 100.0, truncate=True)


def test_schedule_is_a_frozen_value():
    s = parse_schedule("2x10")
    assert isinstance(s, FrameSchedule)
    with pytest.raises(AttributeError):
        s.starts_s = (1.0,)
