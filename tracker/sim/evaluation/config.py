"""The scenario file of ``tracker evaluate``: market, orders, costs and scenario families.

A scenario file is TOML (``.toml``) or JSON (``.json``) with the tables of the shipped default,
``scenarios.toml`` beside this module, which documents every key with its unit and default.
:func:`load_config` reads one (or the default) into frozen dataclasses and checks every value; a
bad value raises :class:`~tracker.errors.InputError` naming the key (``scenario[2].fill``) and
saying what is allowed. Everything is invented data and says so.
"""

from __future__ import annotations

import json
import math
import tomllib
from collections.abc import Mapping
from dataclasses import dataclass, field, replace
from datetime import time
from importlib import resources
from pathlib import Path
from typing import Any

from tracker.core.formulation import IMPACT_LAWS, URGENCY
from tracker.core.profiles import Profile
from tracker.core.session import Session, parse_clock
from tracker.errors import InputError
from tracker.sim.market import MarketParameters, check_symbol, true_profile

#: The scenario file shipped with the package (read with :func:`load_config` and no path).
DEFAULT_FILE = "scenarios.toml"

#: The impact coefficient the planner assumes (the square-root law's default).
PLANNER_IMPACT = IMPACT_LAWS["sqrt"].coefficient


@dataclass(frozen=True, slots=True)
class MarketSpec:
    """The simulated stock: its profile (the planner's forecast) and the noise around it.

    Attributes mirror :class:`tracker.sim.market.MarketParameters`; ``day_volume_sigma`` is here
    the standard deviation of the log day scale itself (days are drawn independently).
    """

    symbol: str = "X_ZEPH"
    price: float = 42.0
    average_daily_volume: float = 2_000_000.0
    daily_volatility: float = 0.018
    midday_spread: float = 0.015
    day_volume_sigma: float = 0.2
    day_volume_df: float = 4.0
    bin_volume_sigma: float = 0.3
    bin_volume_phi: float = 0.3
    day_spread_sigma: float = 0.1
    bin_spread_sigma: float = 0.15
    substeps: int = 16

    def parameters(self) -> MarketParameters:
        """The generator's parameters (shapes from :class:`MarketParameters`' defaults)."""
        return MarketParameters(
            price=self.price,
            average_daily_volume=self.average_daily_volume,
            daily_volatility=self.daily_volatility,
            midday_spread=self.midday_spread,
        )

    def profile(self, session: Session) -> Profile:
        """The true profile of the simulated stock, which is also the planner's forecast."""
        return true_profile(self.symbol, session, self.parameters())


@dataclass(frozen=True, slots=True)
class OrderSpec:
    """One listed parent order (``size`` as a fraction of ADV, or ``quantity`` in shares)."""

    side: str
    size: float | None = None
    quantity: int | None = None
    urgency: str = "medium"
    max_participation: float = 0.20
    start: time = time(9, 30)
    end: time = time(16, 0)


@dataclass(frozen=True, slots=True)
class OrderDraws:
    """How a day's order is drawn when none is listed."""

    size: tuple[float, float] = (0.05, 0.15)
    sides: tuple[str, ...] = ("buy", "sell")
    max_participation: float = 0.20
    urgency: str = "medium"
    start: time = time(9, 30)
    end: time = time(16, 0)


@dataclass(frozen=True, slots=True)
class CostSpec:
    """How the simulated market charges a trade, and how an unfinished share is valued.

    Attributes:
        penalty_bps: Value of an unfinished share, basis points of the arrival price.
        impact_coefficient: The market's square-root impact coefficient Y (the planner's 0.5).
        permanent_impact: Our trades move the price by this times the daily volatility times the
            shares traded over the average daily volume, for the rest of the day.
        pov_scale: The constant-rate policy trades ``pov_scale x order / forecast volume`` of
            each bin's real volume (capped at the order's participation cap).
    """

    penalty_bps: float = 50.0
    impact_coefficient: float = PLANNER_IMPACT
    permanent_impact: float = 0.2
    pov_scale: float = 1.0


@dataclass(frozen=True, slots=True)
class Window:
    """Over ``[start, end)`` (local time) the volume and the spread are multiplied."""

    start: time
    end: time
    volume: float = 1.0
    spread: float = 1.0


@dataclass(frozen=True, slots=True)
class Scenario:
    """One scenario family (see the shipped ``scenarios.toml`` for the meaning of each key)."""

    name: str
    description: str = ""
    day_volume: float = 1.0
    windows: tuple[Window, ...] = ()
    fill: tuple[float, float] = (1.0, 1.0)
    impact: float = 1.0
    volatility: float = 1.0
    exact: bool = False


@dataclass(frozen=True, slots=True)
class EvaluationConfig:
    """Everything a run of ``tracker evaluate`` needs besides the seed and the number of days."""

    market: MarketSpec = field(default_factory=MarketSpec)
    draws: OrderDraws = field(default_factory=OrderDraws)
    orders: tuple[OrderSpec, ...] = ()
    costs: CostSpec = field(default_factory=CostSpec)
    scenarios: tuple[Scenario, ...] = (Scenario("normal"),)
    session: Session = field(default_factory=Session)
    source: str = "built-in defaults"

    def scenario(self, name: str) -> Scenario:
        """The scenario called ``name``.

        Raises:
            InputError: no scenario has that name (the known names are listed).
        """
        for scenario in self.scenarios:
            if scenario.name == name:
                return scenario
        known = ", ".join(s.name for s in self.scenarios)
        raise InputError(f"no scenario {name!r} in {self.source}; known: {known}", field="scenario")

    def only(self, names: list[str] | None) -> EvaluationConfig:
        """A copy with just the named scenarios, in the order given (all when ``None``)."""
        if not names:
            return self
        return replace(self, scenarios=tuple(self.scenario(name) for name in names))

    def with_penalty(self, penalty_bps: float | None) -> EvaluationConfig:
        """A copy with another completion penalty (``None``: unchanged)."""
        if penalty_bps is None:
            return self
        value = _number(penalty_bps, "--penalty-bps", low=0.0)
        return replace(self, costs=replace(self.costs, penalty_bps=value))


# --------------------------------------------------------------------------------------------
# Reading


def load_config(path: str | Path | None = None) -> EvaluationConfig:
    """Read a scenario file (TOML or JSON by extension), or the shipped default.

    Args:
        path: The file; ``None`` reads the default shipped beside this module.

    Returns:
        The checked configuration.

    Raises:
        InputError: the file cannot be read or parsed, or a key or value is wrong (named).
    """
    if path is None:
        text = resources.files(__package__).joinpath(DEFAULT_FILE).read_text(encoding="utf-8")
        return parse_config(tomllib.loads(text), source=f"the default {DEFAULT_FILE}")
    path = Path(path)
    try:
        text = path.read_text(encoding="utf-8")
    except OSError as exc:
        raise InputError(
            f"cannot read {str(path)!r}: {exc.strerror or exc}", field="--scenarios"
        ) from exc
    try:
        data = json.loads(text) if path.suffix.lower() == ".json" else tomllib.loads(text)
    except (ValueError, tomllib.TOMLDecodeError) as exc:
        kind = "JSON" if path.suffix.lower() == ".json" else "TOML"
        raise InputError(f"{str(path)!r} is not valid {kind}: {exc}", field="--scenarios") from exc
    return parse_config(data, source=str(path))


def parse_config(data: Any, *, source: str = "the scenario file") -> EvaluationConfig:
    """Build the configuration from a parsed file (a JSON object or TOML document).

    Raises:
        InputError: naming the offending key.
    """
    top = _table(data, "the scenario file")
    _known(top, ("market", "orders", "order", "costs", "scenario", "session"), "")
    session = Session.from_mapping(top.get("session", {})) if "session" in top else Session()
    market = _market(_table(top.get("market", {}), "market"))
    draws = _draws(_table(top.get("orders", {}), "orders"))
    listed = top.get("order", [])
    if not isinstance(listed, list):
        raise InputError("must be a list of order tables ([[order]])", field="order")
    orders = tuple(_order(item, f"order[{i}]", draws) for i, item in enumerate(listed))
    costs = _costs(_table(top.get("costs", {}), "costs"))
    raw = top.get("scenario", [])
    if not isinstance(raw, list) or not raw:
        raise InputError(
            "must list at least one scenario ([[scenario]] with a name)", field="scenario"
        )
    scenarios = tuple(_scenario(item, f"scenario[{i}]", session) for i, item in enumerate(raw))
    names = [s.name for s in scenarios]
    for name in names:
        if names.count(name) > 1:
            raise InputError(
                f"two scenarios are named {name!r}; names must differ", field="scenario"
            )
    for where, start, end in [(f"order[{i}]", o.start, o.end) for i, o in enumerate(orders)] + [
        ("orders", draws.start, draws.end)
    ]:
        _check_window(session, start, end, where)
    return EvaluationConfig(
        market=market,
        draws=draws,
        orders=orders,
        costs=costs,
        scenarios=scenarios,
        session=session,
        source=source,
    )


def _table(value: Any, where: str) -> Mapping[str, Any]:
    if not isinstance(value, Mapping):
        raise InputError(f"must be a table (an object); got {type(value).__name__}", field=where)
    return value


def _known(table: Mapping[str, Any], keys: tuple[str, ...], where: str) -> None:
    for key in table:
        if key not in keys:
            name = f"{where}.{key}" if where else str(key)
            raise InputError(f"is not a key here; the keys are {', '.join(keys)}", field=name)


def _number(
    value: Any,
    where: str,
    *,
    low: float = -math.inf,
    high: float = math.inf,
    open_low: bool = False,
) -> float:
    ok = (
        not isinstance(value, bool)
        and isinstance(value, int | float)
        and math.isfinite(value)
        and (value > low if open_low else value >= low)
        and value <= high
    )
    if not ok:
        sign = ">" if open_low else ">="
        span = f"{sign} {low:g}" + (f" and <= {high:g}" if math.isfinite(high) else "")
        raise InputError(f"must be a number {span}; got {value!r}", field=where)
    return float(value)


def _clock(value: Any, where: str) -> time:
    return parse_clock(value, where)


def _urgency(value: Any, where: str) -> str:
    if value not in URGENCY:
        raise InputError(f"must be one of {', '.join(URGENCY)}; got {value!r}", field=where)
    return str(value)


def _side(value: Any, where: str) -> str:
    if value not in ("buy", "sell"):
        raise InputError(f"must be buy or sell; got {value!r}", field=where)
    return str(value)


def _pair(value: Any, where: str, low: float, high: float) -> tuple[float, float]:
    if not isinstance(value, list | tuple) or len(value) != 2:
        raise InputError(f"must be two numbers [low, high]; got {value!r}", field=where)
    a = _number(value[0], f"{where}[0]", low=low, high=high, open_low=True)
    b = _number(value[1], f"{where}[1]", low=low, high=high, open_low=True)
    if b < a:
        raise InputError(f"low must not exceed high; got {value!r}", field=where)
    return a, b


def _market(table: Mapping[str, Any]) -> MarketSpec:
    keys = tuple(MarketSpec.__dataclass_fields__)
    _known(table, keys, "market")
    base = MarketSpec()
    values: dict[str, Any] = {}
    for key, value in table.items():
        where = f"market.{key}"
        if key == "symbol":
            values[key] = check_symbol(value)
        elif key == "substeps":
            if isinstance(value, bool) or not isinstance(value, int) or not 1 <= value <= 256:
                raise InputError(
                    f"must be a whole number from 1 to 256; got {value!r}", field=where
                )
            values[key] = value
        elif key == "bin_volume_phi":
            values[key] = _number(value, where, low=0.0, high=0.99)
        elif key == "day_volume_df":
            values[key] = _number(value, where, low=2.0, open_low=True)
        elif key.endswith("sigma"):
            values[key] = _number(value, where, low=0.0, high=3.0)
        else:
            values[key] = _number(value, where, low=0.0, open_low=True)
    return replace(base, **values)


def _draws(table: Mapping[str, Any]) -> OrderDraws:
    keys = tuple(OrderDraws.__dataclass_fields__)
    _known(table, keys, "orders")
    base = OrderDraws()
    values: dict[str, Any] = {}
    if "size" in table:
        values["size"] = _pair(table["size"], "orders.size", 0.0, 1.0)
    if "sides" in table:
        sides = table["sides"]
        if not isinstance(sides, list) or not sides:
            raise InputError(f"must be a list of buy/sell; got {sides!r}", field="orders.sides")
        values["sides"] = tuple(_side(s, "orders.sides") for s in sides)
    if "max_participation" in table:
        values["max_participation"] = _number(
            table["max_participation"], "orders.max_participation", low=0.0, high=1.0, open_low=True
        )
    if "urgency" in table:
        values["urgency"] = _urgency(table["urgency"], "orders.urgency")
    for key in ("start", "end"):
        if key in table:
            values[key] = _clock(table[key], f"orders.{key}")
    return replace(base, **values)


def _order(item: Any, where: str, draws: OrderDraws) -> OrderSpec:
    table = _table(item, where)
    _known(table, tuple(OrderSpec.__dataclass_fields__), where)
    if ("size" in table) == ("quantity" in table):
        raise InputError(
            "give exactly one of size (fraction of ADV) or quantity (shares)", field=where
        )
    quantity = table.get("quantity")
    if quantity is not None and (
        isinstance(quantity, bool) or not isinstance(quantity, int) or quantity < 1
    ):
        raise InputError(f"must be whole shares >= 1; got {quantity!r}", field=f"{where}.quantity")
    size = table.get("size")
    return OrderSpec(
        side=_side(table.get("side"), f"{where}.side"),
        size=None if size is None else _number(size, f"{where}.size", low=0.0, open_low=True),
        quantity=quantity,
        urgency=_urgency(table.get("urgency", draws.urgency), f"{where}.urgency"),
        max_participation=_number(
            table.get("max_participation", draws.max_participation),
            f"{where}.max_participation",
            low=0.0,
            high=1.0,
            open_low=True,
        ),
        start=_clock(table.get("start", draws.start), f"{where}.start"),
        end=_clock(table.get("end", draws.end), f"{where}.end"),
    )


def _costs(table: Mapping[str, Any]) -> CostSpec:
    _known(table, tuple(CostSpec.__dataclass_fields__), "costs")
    values = {key: _number(value, f"costs.{key}", low=0.0) for key, value in table.items()}
    if "pov_scale" in values and values["pov_scale"] <= 0:
        raise InputError("must be a number > 0", field="costs.pov_scale")
    return replace(CostSpec(), **values)


def _scenario(item: Any, where: str, session: Session) -> Scenario:
    table = _table(item, where)
    keys = ("name", "description", "day_volume", "window", "fill", "impact", "volatility", "exact")
    _known(table, keys, where)
    name = table.get("name")
    if not isinstance(name, str) or not name.strip():
        raise InputError(f"must be a non-empty string; got {name!r}", field=f"{where}.name")
    description = table.get("description", "")
    if not isinstance(description, str):
        raise InputError("must be a string", field=f"{where}.description")
    raw_windows = table.get("window", [])
    if not isinstance(raw_windows, list):
        raise InputError(
            "must be a list of window tables ([[scenario.window]])", field=f"{where}.window"
        )
    windows = []
    for i, raw in enumerate(raw_windows):
        at = f"{where}.window[{i}]"
        window_table = _table(raw, at)
        _known(window_table, ("start", "end", "volume", "spread"), at)
        if "start" not in window_table or "end" not in window_table:
            raise InputError("needs start and end (HH:MM, local time)", field=at)
        window = Window(
            start=_clock(window_table["start"], f"{at}.start"),
            end=_clock(window_table["end"], f"{at}.end"),
            volume=_number(window_table.get("volume", 1.0), f"{at}.volume", low=0.0),
            spread=_number(window_table.get("spread", 1.0), f"{at}.spread", low=0.0, open_low=True),
        )
        _check_window(session, window.start, window.end, at)
        windows.append(window)
    exact = table.get("exact", False)
    if not isinstance(exact, bool):
        raise InputError(f"must be true or false; got {exact!r}", field=f"{where}.exact")
    return Scenario(
        name=name.strip(),
        description=description,
        day_volume=_number(
            table.get("day_volume", 1.0), f"{where}.day_volume", low=0.0, open_low=True
        ),
        windows=tuple(windows),
        fill=_pair(table.get("fill", [1.0, 1.0]), f"{where}.fill", 0.0, 1.0),
        impact=_number(table.get("impact", 1.0), f"{where}.impact", low=0.0),
        volatility=_number(
            table.get("volatility", 1.0), f"{where}.volatility", low=0.0, open_low=True
        ),
        exact=exact,
    )


def _check_window(session: Session, start: time, end: time, where: str) -> None:
    first = session.index_of_clock(start)
    last = session.n_bins if end == session.end else session.index_of_clock(end)
    if first is None or last is None or last <= first:
        raise InputError(
            f"{start:%H:%M}-{end:%H:%M} must be bin boundaries of the session "
            f"{session.start:%H:%M}-{session.end:%H:%M} ({session.bin_minutes}-minute bins), "
            "start before end",
            field=where,
        )
