"""How well the engine's intraday forecast finds the day's volume scale, measured on the days.

The engine plans the rest of the day with the profile times today's volume scale
(:func:`tracker.core.forecast.forecast`). On a simulated day the true scale is known: the day's
draw times the scenario's ``day_volume`` (:attr:`~.market_day.MarketDay.day_scale`), outside any
scenario window -- a midday collapse is a transient shock, not a smaller day. At each checkpoint
(:data:`CHECKPOINTS`, local venue time) the forecast is made from the bins closed by then, as the
engine makes it, and the error is ``log(forecast scale / true scale)``: positive when the forecast
is too high (0.12 is about 12 % too high). Recorded days have no known scale and are skipped.
"""

from __future__ import annotations

import math
from datetime import time

from tracker.core.forecast import ObservedBin, forecast
from tracker.sim.evaluation.market_day import MarketDay

#: When the forecast is judged, local venue time: an hour into the day, and just after midday.
CHECKPOINTS = (time(10, 30), time(13, 0))


def checkpoint_label(at: time) -> str:
    """``HH:MM`` of a checkpoint."""
    return at.strftime("%H:%M")


def scale_errors(day: MarketDay) -> dict[str, float]:
    """``log(forecast scale / true scale)`` at each checkpoint (empty for a recorded day).

    Args:
        day: The market day (with its true scale).

    Returns:
        Checkpoint label -> the error, for the checkpoints with at least one bin closed.
    """
    if not math.isfinite(day.day_scale) or day.day_scale <= 0:
        return {}
    session = day.session
    out: dict[str, float] = {}
    for at in CHECKPOINTS:
        seen = {
            n: ObservedBin(float(day.volume[n]))
            for n, (_, end) in enumerate(day.bins)
            if session.local(end).time() <= at
        }
        if seen:
            scale = forecast(day.profile, seen).volume_scale
            out[checkpoint_label(at)] = math.log(scale / day.day_scale)
    return out


__all__ = ["CHECKPOINTS", "checkpoint_label", "scale_errors"]
