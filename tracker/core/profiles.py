"""Liquidity profiles: the seasonal shape of a symbol's trading day.

A :class:`Profile` holds, per bin of the symbol's :class:`~tracker.core.session.Session`, the
expected share of the day's volume, the expected time-averaged quoted spread (currency) and the
volatility (standard deviation of the log return over the bin, dimensionless), plus the average
daily volume (shares). :func:`default_profile` is an invented, stated default for a symbol that has
no calibrated profile; :func:`shaped_profile` builds a profile from U-shaped curves.

Profiles are estimated from history in :mod:`tracker.core.calibration` and updated during the day
in :mod:`tracker.core.forecast`. Everything here is pure: no files, no clock.
"""

from __future__ import annotations

import math
from collections.abc import Mapping
from dataclasses import dataclass, field
from typing import Any

import numpy as np
import numpy.typing as npt

from tracker.core.session import Session
from tracker.errors import InputError

FloatArray = npt.NDArray[np.float64]


#: The invented default (see :func:`default_profile`): shares per day, midday spread in currency,
#: daily volatility of the log price.
DEFAULT_ADV = 1_000_000.0
DEFAULT_MIDDAY_SPREAD = 0.02
DEFAULT_DAILY_VOLATILITY = 0.02


def intraday_shape(
    session: Session, open_weight: float, open_decay: float, close_weight: float, close_decay: float
) -> FloatArray:
    """A U shape over the bins: ``1 + a exp(-x / d_open) + b exp(-(1 - x) / d_close)``.

    ``x`` is the bin midpoint as a fraction of the session (0 at the open, 1 at the close), so the
    same parameters give the same shape for any bin length.
    """
    n = session.n_bins
    x = (np.arange(n) + 0.5) / n
    return (
        1.0
        + open_weight * np.exp(-x / open_decay)
        + close_weight * np.exp(-(1.0 - x) / close_decay)
    )


def _readonly(array: Any, name: str, n: int, *, positive: bool) -> FloatArray:
    try:
        values = np.array(array, dtype=np.float64)
    except (TypeError, ValueError) as exc:
        raise InputError(f"must be {n} numbers, one per bin; got {array!r}", field=name) from exc
    if values.shape != (n,):
        raise InputError(
            f"must have one value per bin of the session ({n}); got shape {values.shape}",
            field=name,
        )
    bad = ~np.isfinite(values) | (values <= 0 if positive else values < 0)
    if bad.any():
        index = int(np.flatnonzero(bad)[0])
        raise InputError(
            f"must be finite and {'> 0' if positive else '>= 0'}; got "
            f"{values[index]!r} at bin {index}",
            field=name,
        )
    values.setflags(write=False)
    return values


@dataclass(frozen=True, eq=False)
class Profile:
    """The seasonal liquidity of one symbol over the bins of its session.

    Args:
        symbol: The symbol.
        session: The session whose bins the arrays follow.
        volume_share: Expected fraction of the day's volume per bin (>= 0, normalised to sum 1).
        spread: Expected time-averaged quoted spread per bin, currency (>= 0).
        volatility: Standard deviation of the log return over each bin, dimensionless (> 0).
        average_daily_volume: Shares in a regular full day (> 0).
        days: Number of days the profile was calibrated on (0 for a default).
        quality: The calibration's quality report (free-form, JSON-serialisable).

    Raises:
        InputError: an array has the wrong length or a value out of range.
    """

    symbol: str
    session: Session
    volume_share: FloatArray
    spread: FloatArray
    volatility: FloatArray
    average_daily_volume: float
    days: int = 0
    quality: Mapping[str, Any] = field(default_factory=dict)

    def __post_init__(self) -> None:
        put = object.__setattr__
        n = self.session.n_bins
        share = _readonly(self.volume_share, "volume_share", n, positive=False)
        total = float(share.sum())
        if total <= 0:
            raise InputError(
                "must have a positive sum (the day's volume has to go somewhere)",
                field="volume_share",
            )
        if abs(total - 1.0) > 1e-12:
            share = share / total
            share.setflags(write=False)
        put(self, "volume_share", share)
        put(self, "spread", _readonly(self.spread, "spread", n, positive=False))
        put(self, "volatility", _readonly(self.volatility, "volatility", n, positive=True))
        adv = self.average_daily_volume
        if (
            isinstance(adv, bool)
            or not isinstance(adv, int | float)
            or not (math.isfinite(adv) and adv > 0)
        ):
            raise InputError(
                f"must be a number of shares > 0; got {adv!r}", field="average_daily_volume"
            )
        put(self, "average_daily_volume", float(adv))

    @property
    def expected_volume(self) -> FloatArray:
        """Expected shares per bin on a regular day: ``average_daily_volume * volume_share``."""
        return self.average_daily_volume * self.volume_share

    def to_mapping(self) -> dict[str, Any]:
        """The PROFILE.json object written by ``tracker calibrate``."""
        labels = self.session.bin_labels()
        return {
            "symbol": self.symbol,
            "session": self.session.to_mapping(),
            "units": {
                "volume_share": "fraction of the day's volume",
                "spread": "time-averaged quoted spread, currency",
                "volatility": "standard deviation of the log return over one bin",
                "average_daily_volume": "shares",
            },
            "average_daily_volume": self.average_daily_volume,
            "days": self.days,
            "bins": [
                {
                    "start": label,
                    "volume_share": float(share),
                    "spread": float(spread),
                    "volatility": float(vol),
                }
                for label, share, spread, vol in zip(
                    labels, self.volume_share, self.spread, self.volatility, strict=True
                )
            ],
            "quality": dict(self.quality),
        }

    @classmethod
    def from_mapping(cls, data: Any) -> Profile:
        """Read a PROFILE.json object (as written by :meth:`to_mapping`).

        Raises:
            InputError: naming the missing or malformed key.
        """
        if not isinstance(data, dict):
            raise InputError(f"a profile must be a JSON object; got {type(data).__name__}")
        for key in ("symbol", "session", "bins", "average_daily_volume"):
            if key not in data:
                raise InputError(
                    "is missing; a profile needs symbol, session, bins and average_daily_volume",
                    field=key,
                )
        symbol = data["symbol"]
        if not isinstance(symbol, str) or not symbol:
            raise InputError(f"must be a non-empty string; got {symbol!r}", field="symbol")
        session = Session.from_mapping(data["session"])
        bins = data["bins"]
        if not isinstance(bins, list) or len(bins) != session.n_bins:
            got = len(bins) if isinstance(bins, list) else type(bins).__name__
            raise InputError(
                f"must be a list of {session.n_bins} bin objects, one per bin of the "
                f"session; got {got}",
                field="bins",
            )
        labels = session.bin_labels()
        columns: dict[str, list[float]] = {"volume_share": [], "spread": [], "volatility": []}
        for index, (item, label) in enumerate(zip(bins, labels, strict=True)):
            where = f"bins[{index}]"
            if not isinstance(item, dict):
                raise InputError(
                    "must be an object with start, volume_share, spread, volatility", field=where
                )
            if item.get("start") != label:
                raise InputError(
                    f"start must be {label} (bin {index} of the session); got "
                    f"{item.get('start')!r}",
                    field=f"{where}.start",
                )
            for key, values in columns.items():
                value = item.get(key)
                if isinstance(value, bool) or not isinstance(value, int | float):
                    raise InputError(f"must be a number; got {value!r}", field=f"{where}.{key}")
                values.append(float(value))
        days = data.get("days", 0)
        if isinstance(days, bool) or not isinstance(days, int) or days < 0:
            raise InputError(f"must be a whole number >= 0; got {days!r}", field="days")
        quality = data.get("quality", {})
        if not isinstance(quality, dict):
            raise InputError(f"must be an object; got {type(quality).__name__}", field="quality")
        return cls(
            symbol=symbol,
            session=session,
            volume_share=np.array(columns["volume_share"]),
            spread=np.array(columns["spread"]),
            volatility=np.array(columns["volatility"]),
            average_daily_volume=data["average_daily_volume"],
            days=days,
            quality=quality,
        )


Shape = tuple[float, float, float, float]


def shaped_profile(
    symbol: str,
    session: Session,
    *,
    volume_shape: Shape,
    spread_shape: Shape,
    variance_shape: Shape,
    midday_spread: float,
    daily_volatility: float,
    average_daily_volume: float,
    quality: Mapping[str, Any],
) -> Profile:
    """A profile drawn from :func:`intraday_shape` U curves (invented defaults, demo market truth).

    Args:
        symbol: The symbol.
        session: Its session.
        volume_shape: ``intraday_shape`` parameters of the volume curve (normalised to shares).
        spread_shape: The same for the spread, scaled to ``midday_spread`` where flat.
        variance_shape: The same for the per-bin return variance, scaled so the day's variance is
            ``daily_volatility`` squared.
        midday_spread: Spread at the flat middle of the day, currency.
        daily_volatility: Standard deviation of the day's log return.
        average_daily_volume: Shares a day.
        quality: Where the profile comes from.
    """
    share = intraday_shape(session, *volume_shape)
    spread = midday_spread * intraday_shape(session, *spread_shape)
    variance = intraday_shape(session, *variance_shape)
    variance *= daily_volatility**2 / variance.sum()
    return Profile(
        symbol=symbol,
        session=session,
        volume_share=share / share.sum(),
        spread=spread,
        volatility=np.sqrt(variance),
        average_daily_volume=average_daily_volume,
        days=0,
        quality=dict(quality),
    )


def default_profile(symbol: str, session: Session | None = None) -> Profile:
    """An invented, stated default for a symbol without a calibrated profile.

    1,000,000 shares a day; a U-shaped volume curve (the first bin about 2.4 times the midday
    level, the last about 2.2 times); a spread of 0.02 (currency) at midday, 2.5 times wider at the
    open; 2 % daily volatility, higher at the open. The shapes are invented to look like a liquid
    stock (common practice: U-shaped volume, spreads widest at the open); use a calibrated profile
    for real decisions.
    """
    return shaped_profile(
        symbol,
        session or Session(),
        volume_shape=(1.5, 0.08, 1.2, 0.04),
        spread_shape=(1.5, 0.05, 0.0, 1.0),
        variance_shape=(1.5, 0.08, 0.4, 0.04),
        midday_spread=DEFAULT_MIDDAY_SPREAD,
        daily_volatility=DEFAULT_DAILY_VOLATILITY,
        average_daily_volume=DEFAULT_ADV,
        quality={
            "source": "default",
            "note": "invented default profile, not calibrated on any data",
        },
    )
