"""The engine's settings: every alert threshold plus the engine's own."""

from __future__ import annotations

import math
from collections.abc import Mapping
from dataclasses import dataclass, fields
from typing import Any

from tracker.core.alerts import AlertConfig
from tracker.errors import InputError


@dataclass(frozen=True)
class EngineConfig(AlertConfig):
    """Engine settings: every alert threshold (:class:`~tracker.core.alerts.AlertConfig`) plus
    these.

    Attributes:
        expiry_grace_seconds: An order expires this long after its end (fills of its last bin
            that arrive within the grace still count as live).
        default_max_participation: The participation cap (a fraction of the market's volume)
            of an order that names none. 0.25: a desk rarely lets one parent order take more
            than a quarter of the market's volume, where its own trading starts to make the
            price (common practice: caps of 10-25 % are usual); the highest usual cap binds
            only orders that would otherwise dominate the tape. 1 caps at the whole volume.
        fill_parking_seconds: A fill for an order not seen yet waits this long (event time)
            for its order before it is given up as unassigned (with a critical alert).
        fill_parking_max: At most this many fills wait at once; beyond it the oldest is given
            up first.
        event_time: Where the engine's clock comes from. ``"receive"`` (the default): the
            receive time the shell stamps on each record (the daemon's clock, the journal's
            ``ts``); a message's own ``ts`` is data, judged against it at the intake
            (:mod:`tracker.edge.intake`) with the tolerances below. ``"message"``: the
            message's own ``ts``, unchecked -- only for driving a daemon with a recorded day
            faster than its clock (tests); one mis-stamped message can then move the clock.
        ts_ahead_seconds: A message's ``ts`` (a bin's ``end`` too) may be at most this much
            after its receive time: clocks of different machines differ by a little.
        ts_behind_seconds: An order, control or bin message's ``ts`` (a bin's ``end``) may be at
            most this much before its receive time.
        fill_ts_behind_seconds: A fill (or fill correction) stamped more than this before its
            receive time is still applied -- the shares count -- with a ``clock_skew`` alert.
    """

    expiry_grace_seconds: float = 0.0
    default_max_participation: float = 0.25
    fill_parking_seconds: float = 300.0
    fill_parking_max: int = 10_000
    event_time: str = "receive"
    ts_ahead_seconds: float = 5.0
    ts_behind_seconds: float = 900.0
    fill_ts_behind_seconds: float = 3600.0

    def __post_init__(self) -> None:
        super().__post_init__()
        grace = self.expiry_grace_seconds
        if (
            isinstance(grace, bool)
            or not isinstance(grace, int | float)
            or not (math.isfinite(grace) and grace >= 0)
        ):
            raise InputError(
                f"must be a number of seconds >= 0; got {grace!r}", field="expiry_grace_seconds"
            )
        cap = self.default_max_participation
        if isinstance(cap, bool) or not isinstance(cap, int | float) or not 0 < cap <= 1:
            raise InputError(
                f"must be a fraction in (0, 1], e.g. 0.25 for 25 %; got {cap!r}",
                field="default_max_participation",
            )
        wait = self.fill_parking_seconds
        if (
            isinstance(wait, bool)
            or not isinstance(wait, int | float)
            or not (math.isfinite(wait) and wait >= 0)
        ):
            raise InputError(
                f"must be a number of seconds >= 0; got {wait!r}", field="fill_parking_seconds"
            )
        if self.event_time not in ("receive", "message"):
            raise InputError(
                f"must be 'receive' (the shell's receive time, the default) or 'message' (the "
                f"message's own ts, unchecked); got {self.event_time!r}",
                field="event_time",
            )
        for name in ("ts_ahead_seconds", "ts_behind_seconds", "fill_ts_behind_seconds"):
            seconds = getattr(self, name)
            if (
                isinstance(seconds, bool)
                or not isinstance(seconds, int | float)
                or not (math.isfinite(seconds) and seconds >= 0)
            ):
                raise InputError(f"must be a number of seconds >= 0; got {seconds!r}", field=name)
        most = self.fill_parking_max
        if isinstance(most, bool) or not isinstance(most, int) or most < 0:
            raise InputError(f"must be a whole number >= 0; got {most!r}", field="fill_parking_max")

    @classmethod
    def from_mapping(cls, data: Mapping[str, Any]) -> EngineConfig:
        """Build from a JSON object of thresholds; missing keys keep their defaults.

        Raises:
            InputError: an unknown key (named, with the allowed keys) or a bad value.
        """
        if not isinstance(data, Mapping):
            raise InputError(f"must be a JSON object; got {type(data).__name__}", field="config")
        names = [f.name for f in fields(cls)]
        for key in data:
            if key not in names:
                raise InputError(
                    f"is not an engine setting; the settings are {', '.join(sorted(names))}",
                    field=str(key),
                )
        return cls(**dict(data))


__all__ = ["EngineConfig"]
