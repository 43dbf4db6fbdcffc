"""Sessions and bins: counts, timezones, half days, late opens, order spans."""

from __future__ import annotations

from datetime import UTC, date, datetime, time, timedelta

import pytest

from tracker.core.session import Session
from tracker.errors import InputError


def test_default_session_has_78_bins() -> None:
    """A 09:30-16:00 session in 5-minute bins has 78 bins (common practice)."""
    expected = 78
    assert expected == Session().n_bins


@pytest.mark.parametrize(
    ("day", "utc_open"),
    [(date(2026, 1, 15), "14:30"), (date(2026, 7, 15), "13:30")],
    ids=["winter-EST", "summer-EDT"],
)
def test_bins_follow_daylight_saving(day: date, utc_open: str) -> None:
    """The first bin opens at 09:30 local, whatever the UTC offset of the day."""
    first_start, _ = Session().bins(day)[0]
    assert utc_open == first_start.astimezone(UTC).strftime("%H:%M")


def test_bins_on_daylight_saving_day_stay_on_wall_clock() -> None:
    """On the Monday after the spring clock change every bin is 5 wall-clock minutes long."""
    bins = Session().bins(date(2026, 3, 9))
    assert [timedelta(minutes=5)] * 78 == [end - start for start, end in bins]


def test_half_day_keeps_regular_indexes() -> None:
    """A 13:00 close keeps bins 0..41 at their regular index instead of re-binning the day."""
    session = Session()
    bins = session.bins(date(2026, 11, 27), close_at=time(13, 0))
    expected = (42, 0, 41)
    assert expected == (
        len(bins),
        session.bin_index(bins[0][0]),
        session.bin_index(bins[-1][0]),
    )


def test_late_open_starts_at_its_regular_index() -> None:
    """A 10:30 late open starts at bin 12, the regular index of 10:30."""
    session = Session()
    bins = session.bins(date(2026, 2, 3), open_at=time(10, 30))
    expected = (66, 12)
    assert expected == (len(bins), session.bin_index(bins[0][0]))


@pytest.mark.parametrize(
    ("stamp", "expected"),
    [
        ("2026-01-15T14:30:00+00:00", 0),
        ("2026-01-15T14:34:59+00:00", 0),
        ("2026-01-15T14:35:00+00:00", 1),
        ("2026-01-15T20:55:00+00:00", 77),
        ("2026-01-15T21:00:00+00:00", None),
        ("2026-01-15T14:29:59+00:00", None),
    ],
    ids=["open", "end-of-first", "second", "last", "close", "pre-open"],
)
def test_bin_index(stamp: str, expected: int | None) -> None:
    """Timestamps map to the bin that contains them; outside the session to None."""
    assert expected == Session().bin_index(datetime.fromisoformat(stamp))


def test_bin_span_mid_bin_start() -> None:
    """An order from 10:02 to 16:00 local starts in bin 6 with 60 % of it ahead."""
    first, end, fraction = Session().bin_span(
        datetime.fromisoformat("2026-01-15T15:02:00+00:00"),
        datetime.fromisoformat("2026-01-15T21:00:00+00:00"),
    )
    expected = (6, 78, pytest.approx(0.6))
    assert expected == (first, end, fraction)


@pytest.mark.parametrize(
    ("kwargs", "field"),
    [
        ({"bin_minutes": 7}, "session.bin_minutes"),
        ({"end": time(9, 0)}, "session.end"),
        ({"timezone": "Mars/Olympus"}, "session.timezone"),
        ({"start": "9h30"}, "session.start"),
    ],
    ids=["bins-do-not-divide", "end-before-start", "unknown-zone", "bad-clock"],
)
def test_bad_session_names_the_field(kwargs: dict[str, object], field: str) -> None:
    """A bad session value raises InputError naming the field."""
    with pytest.raises(InputError) as info:
        Session(**kwargs)  # type: ignore[arg-type]
    assert field == info.value.field


def test_session_mapping_round_trip() -> None:
    """to_mapping / from_mapping give back an equal session."""
    session = Session(time(8, 0), time(16, 30), "Europe/London", 10)
    assert session == Session.from_mapping(session.to_mapping())


@pytest.mark.parametrize(
    ("stamp", "expected"),
    [
        ("2026-01-15T14:30:00+00:00", 0.0),
        ("2026-01-15T15:02:00+00:00", 6.4),
        ("2026-01-15T14:00:00+00:00", -6.0),
        ("2026-01-15T21:00:00+00:00", 78.0),
    ],
    ids=["open", "two-minutes-into-bin-6", "before-open", "close"],
)
def test_bin_offset_counts_bins_since_the_open(stamp: str, expected: float) -> None:
    """The offset is minutes since the 09:30 open over the 5-minute bin length (fractional)."""
    assert pytest.approx(expected) == Session().bin_offset(datetime.fromisoformat(stamp))
