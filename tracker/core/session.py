"""Trading sessions and their time bins.

A :class:`Session` is the regular day of a venue: an opening time, a closing time, a timezone and a
bin length. Bin ``n`` starts ``n * bin_minutes`` after the regular open, in local (wall-clock) time,
on every day. A half day or a late open does not shift the grid: the bins that exist on such a
day keep their regular index, and the bins outside the shortened day simply do not happen (see
:meth:`Session.bins` with ``open_at`` / ``close_at``). This is what keeps a 13:00 close from being
mis-binned as "the last 78 bins of the day".

Times are handled with :mod:`zoneinfo`, so daylight-saving changes are applied per day. Nothing here
reads the clock: every function takes the day or the timestamp it works on.
"""

from __future__ import annotations

import math
from dataclasses import dataclass
from datetime import date, datetime, time, timedelta
from typing import Any
from zoneinfo import ZoneInfo, ZoneInfoNotFoundError

from tracker.errors import InputError

#: Default bin length in minutes (common practice: 5-minute bins, 78 in a 6.5-hour session).
DEFAULT_BIN_MINUTES = 5


def _minutes(value: time) -> int:
    return value.hour * 60 + value.minute


def parse_clock(value: Any, field: str) -> time:
    """Parse ``HH:MM`` (or accept a :class:`datetime.time`) into a time on a whole minute.

    Raises:
        InputError: naming ``field`` when the value is not a clock time ``HH:MM``.
    """
    if isinstance(value, time):
        parsed = value
    elif isinstance(value, str):
        try:
            parsed = time.fromisoformat(value.strip())
        except ValueError as exc:
            raise InputError(
                f"must be a clock time HH:MM (24-hour); got {value!r}", field=field
            ) from exc
    else:
        raise InputError(f"must be a clock time HH:MM (24-hour); got {value!r}", field=field)
    if parsed.second or parsed.microsecond or parsed.tzinfo is not None:
        raise InputError(
            f"must be a whole minute HH:MM without a timezone; got {value!r}", field=field
        )
    return parsed


@dataclass(frozen=True)
class Session:
    """The regular trading day of a venue, cut into bins of equal length.

    Args:
        start: Regular opening time, local wall-clock time.
        end: Regular closing time, local wall-clock time (after ``start``, same day).
        timezone: IANA timezone name of the venue (e.g. ``"America/New_York"``).
        bin_minutes: Bin length in minutes; the session must be a whole number of bins.

    Raises:
        InputError: naming the field when a value is out of range.
    """

    start: time = time(9, 30)
    end: time = time(16, 0)
    timezone: str = "America/New_York"
    bin_minutes: int = DEFAULT_BIN_MINUTES

    def __post_init__(self) -> None:
        put = object.__setattr__
        put(self, "start", parse_clock(self.start, "session.start"))
        put(self, "end", parse_clock(self.end, "session.end"))
        if (
            isinstance(self.bin_minutes, bool)
            or not isinstance(self.bin_minutes, int)
            or not (1 <= self.bin_minutes <= 240)
        ):
            raise InputError(
                f"must be a whole number of minutes from 1 to 240; got {self.bin_minutes!r}",
                field="session.bin_minutes",
            )
        length = _minutes(self.end) - _minutes(self.start)
        if length <= 0:
            raise InputError(
                f"must be after session.start ({self.start:%H:%M}); got {self.end:%H:%M}",
                field="session.end",
            )
        if length % self.bin_minutes:
            raise InputError(
                f"the session {self.start:%H:%M}-{self.end:%H:%M} ({length} minutes) "
                f"is not a whole number of {self.bin_minutes}-minute bins; choose a "
                "bin length that divides it",
                field="session.bin_minutes",
            )
        try:
            zone = ZoneInfo(self.timezone)
        except (ZoneInfoNotFoundError, ValueError, TypeError) as exc:
            raise InputError(
                f"must be an IANA timezone name such as America/New_York; got {self.timezone!r}",
                field="session.timezone",
            ) from exc
        put(self, "_zone", zone)

    @property
    def zone(self) -> ZoneInfo:
        """The venue's timezone."""
        zone: ZoneInfo = self.__dict__["_zone"]
        return zone

    @property
    def n_bins(self) -> int:
        """Number of bins in a regular session."""
        return (_minutes(self.end) - _minutes(self.start)) // self.bin_minutes

    @property
    def minutes(self) -> int:
        """Length of a regular session in minutes."""
        return _minutes(self.end) - _minutes(self.start)

    def bin_start_times(self) -> list[time]:
        """Local start time of every bin of a regular session."""
        first = _minutes(self.start)
        return [time(*divmod(first + n * self.bin_minutes, 60)) for n in range(self.n_bins)]

    def bin_labels(self) -> list[str]:
        """``HH:MM`` start label of every bin (the ``bins[].start`` of a profile)."""
        return [f"{t:%H:%M}" for t in self.bin_start_times()]

    def index_of_clock(self, clock: time) -> int | None:
        """Index of the bin that starts exactly at local ``clock``, or ``None`` if none does."""
        offset = _minutes(clock) - _minutes(self.start)
        if clock.second or clock.microsecond or offset % self.bin_minutes:
            return None
        index = offset // self.bin_minutes
        return index if 0 <= index < self.n_bins else None

    def bins(
        self, day: date, *, open_at: time | None = None, close_at: time | None = None
    ) -> list[tuple[datetime, datetime]]:
        """The (start, end) of each bin of ``day``, timezone-aware in the venue's zone.

        Args:
            day: The local trading date.
            open_at: A late open (local time on the bin grid); bins before it are left out.
            close_at: An early close, e.g. a half day at 13:00; bins from it on are left out.

        Returns:
            The bins that trade that day, in order. Their index in the regular session is
            ``self.bin_index(start)``; a shortened day keeps the regular indexes.

        Raises:
            InputError: ``open_at`` / ``close_at`` is off the bin grid or outside the session.
        """
        first, last = 0, self.n_bins
        if open_at is not None:
            first = self._grid_index(open_at, "open_at")
        if close_at is not None:
            last = self._grid_index(close_at, "close_at", allow_end=True)
        if last <= first:
            raise InputError(
                "the shortened day has no bins: close_at must be after open_at", field="close_at"
            )
        opening = datetime.combine(day, self.start, tzinfo=self.zone)
        step = timedelta(minutes=self.bin_minutes)
        # Wall-clock arithmetic: add to the local naive time, then attach the zone, so a bin
        # at 15:55 stays at 15:55 even on a daylight-saving day.
        naive = opening.replace(tzinfo=None)
        return [
            (
                (naive + n * step).replace(tzinfo=self.zone),
                (naive + (n + 1) * step).replace(tzinfo=self.zone),
            )
            for n in range(first, last)
        ]

    def _grid_index(self, clock: time, field: str, *, allow_end: bool = False) -> int:
        if allow_end and clock == self.end:
            return self.n_bins
        index = self.index_of_clock(clock)
        if index is None:
            raise InputError(
                f"must be a bin boundary of the session {self.start:%H:%M}-"
                f"{self.end:%H:%M} ({self.bin_minutes}-minute bins); got "
                f"{clock:%H:%M}",
                field=field,
            )
        return index

    def local(self, ts: datetime) -> datetime:
        """``ts`` in the venue's local time; a naive ``ts`` is taken as local time already."""
        if ts.tzinfo is None:
            return ts.replace(tzinfo=self.zone)
        return ts.astimezone(self.zone)

    def bin_offset(self, ts: datetime) -> float:
        """How far ``ts`` is into the session, in bins: minutes since the regular open on its
        local day, divided by the bin length (fractional; 6.4 is 40 % into bin 6).

        Negative before the open, ``n_bins`` or more at and after the close.
        """
        local = self.local(ts)
        minutes = local.hour * 60 + local.minute + (local.second + local.microsecond / 1e6) / 60
        return (minutes - _minutes(self.start)) / self.bin_minutes

    def bin_index(self, ts: datetime) -> int | None:
        """Index of the regular bin that contains ``ts`` (start inclusive), ``None`` outside."""
        offset = self.bin_offset(ts)
        if offset < 0 or offset >= self.n_bins:
            return None
        return math.floor(offset)

    def bin_span(self, start: datetime, end: datetime) -> tuple[int, int, float]:
        """The bins an interval [start, end) touches on its local day.

        Returns:
            ``(first_bin, end_bin, first_fraction)``: ``first_bin`` inclusive, ``end_bin`` exclusive
            (``end_bin`` counts a bin when the interval reaches into it), and the fraction of the
            first bin that is still ahead at ``start`` (1.0 on a bin boundary or before the open).

        Raises:
            InputError: the interval is empty, spans two days or misses the session.
        """
        if end <= start:
            raise InputError(
                f"must be after start ({start.isoformat()}); got {end.isoformat()}", field="end"
            )
        if self.local(start).date() != self.local(end - timedelta(microseconds=1)).date():
            raise InputError(
                "an order must start and end on the same local trading day "
                f"({self.timezone}); got {start.isoformat()} to {end.isoformat()}",
                field="end",
            )
        first_offset = max(self.bin_offset(start), 0.0)
        end_offset = min(self.bin_offset(end), float(self.n_bins))
        if first_offset >= self.n_bins or end_offset <= 0 or end_offset <= first_offset:
            raise InputError(
                f"the interval {start.isoformat()} to {end.isoformat()} does not "
                f"overlap the session {self.start:%H:%M}-{self.end:%H:%M} "
                f"{self.timezone}",
                field="start",
            )
        first = math.floor(first_offset)
        end_bin = math.ceil(end_offset)
        fraction = 1.0 - (first_offset - first)
        return first, end_bin, fraction

    def to_mapping(self) -> dict[str, Any]:
        """The ``session`` object of a profile file."""
        return {
            "start": f"{self.start:%H:%M}",
            "end": f"{self.end:%H:%M}",
            "timezone": self.timezone,
            "bin_minutes": self.bin_minutes,
        }

    @classmethod
    def from_mapping(cls, data: Any, field: str = "session") -> Session:
        """Build a session from ``{"start", "end", "timezone", "bin_minutes"}`` (all optional).

        Raises:
            InputError: naming the offending key.
        """
        if not isinstance(data, dict):
            raise InputError(
                "must be an object with start, end (HH:MM), timezone and "
                f"bin_minutes; got {type(data).__name__}",
                field=field,
            )
        unknown = sorted(set(data) - {"start", "end", "timezone", "bin_minutes"})
        if unknown:
            raise InputError(
                "is not a session key; the keys are start, end, timezone, bin_minutes",
                field=f"{field}.{unknown[0]}",
            )
        default = cls()
        timezone = data.get("timezone", default.timezone)
        if not isinstance(timezone, str):
            raise InputError(
                f"must be an IANA timezone name; got {timezone!r}", field=f"{field}.timezone"
            )
        return cls(
            start=parse_clock(data.get("start", default.start), f"{field}.start"),
            end=parse_clock(data.get("end", default.end), f"{field}.end"),
            timezone=timezone,
            bin_minutes=data.get("bin_minutes", default.bin_minutes),
        )
