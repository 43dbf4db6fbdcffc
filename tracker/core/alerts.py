"""Alert rules and their hysteresis.

Theory of operation
-------------------
A *condition* (behind plan, liquidity shock, stale data, ...) is judged by a pure rule function that
returns a :class:`Check`: whether the condition is now bad enough to raise (``breach``) and whether
it is now good enough to clear (``recovered``). The two thresholds differ (the clear threshold is
:attr:`AlertConfig.clear_ratio` times the raise threshold, or an explicit lower level), so a
value that hovers around one threshold does not flap. :class:`AlertBook` remembers which
conditions are raised, per scope (an order id, or ``symbol:XYZ``) and code, and turns a check into
at most one message: ``raised`` when it crosses up, ``cleared`` when it crosses back, nothing
otherwise. So a condition is reported once and cleared once, not every bin.

*Events* (a fill for an unknown order, an overfill, an order done, ...) are one-shot: each is its
own fact and is reported once when it happens (:func:`event`), with no clear.

Codes: :data:`CODES` maps each code to its severity and meaning; the table below is that mapping
written out (a test holds the two together). A cleared condition is always reported with severity
``info``. A code whose severity depends on the case lists one severity per case
(``case: severity``), and its raiser names the case.

=========================  ====================  ===================================================
code                       severity              meaning
=========================  ====================  ===================================================
behind_plan                warning               filled below the baseline plan beyond the tolerance
ahead_of_plan              warning               filled above the baseline plan beyond the tolerance
completion_infeasible      critical              the participation cap cannot complete the order in
                                                 time
volume_shock               warning               a bin's volume far from its forecast (symbol scope)
spread_shock               warning               a bin's spread far from its forecast (symbol scope)
limit_blocking             warning               the market is beyond the order's limit price
market_data_stale          critical              no bin for the symbol for more than ``stale_bins``
                                                 bins (symbol scope)
replan_moved               info                  a re-plan moved the schedule materially
replan_failed              critical              a re-plan could not be made; the previous plan and
                                                 target stand
fill_unknown_order         critical              a fill names an order the engine does not know
fill_overfill              critical              fills exceed the order quantity
fill_after_close           warning               a fill on an order that is done, cancelled or
                                                 expired
fill_duplicate_conflict    critical              a fill id seen before with different content
                                                 (rejected)
fill_wrong_side            critical              a fill whose side differs from the order's
                                                 (rejected)
fill_price_outside         warning               a fill price far outside its bin's low-high range
order_done                 info                  the order is complete
order_expired              residual: warning,    the order's end passed: with shares left (residual)
                           complete: info        or none (complete)
order_halted               info                  a control message (or a halt of all orders) halted
                                                 the order
order_resumed              info                  a control message resumed the order
default_profile            info                  no liquidity profile for a symbol: the stated
                                                 default is used (symbol scope)
internal_error             critical              handling a message failed inside the engine (a
                                                 bug); the message was not applied
fill_parked                info                  a fill for an order not seen yet waits for it
fill_unassigned            critical              a parked fill's order never came: its shares are
                                                 unassigned
fill_busted                warning               a fill was busted: inventory, price and plan
                                                 recomputed without it
fill_corrected             warning               a fill was corrected: inventory, price and plan
                                                 recomputed
cancel_mismatch            critical              a cancel named another symbol or side than its
                                                 order; the order was cancelled all the same
journal_failed             critical              the daemon's journal cannot be written (deleted,
                                                 replaced, disk full, I/O error): it stops
clock_skew                 warning               a message's ts is outside the tolerance around
                                                 its receive time; it was applied at its receive
                                                 time
source_gap                 critical              a source's sequence numbers skipped: messages
                                                 between them never arrived
source_silent              warning               a source that sends heartbeats has sent nothing
                                                 for several of its intervals
=========================  ====================  ===================================================
"""

from __future__ import annotations

import math
from collections.abc import Callable, Mapping
from dataclasses import dataclass, field, fields
from datetime import datetime
from typing import Any

from tracker.core.messages import AlertMessage, Severity
from tracker.errors import InputError

BEHIND_PLAN = "behind_plan"
AHEAD_OF_PLAN = "ahead_of_plan"
COMPLETION_INFEASIBLE = "completion_infeasible"
VOLUME_SHOCK = "volume_shock"
SPREAD_SHOCK = "spread_shock"
LIMIT_BLOCKING = "limit_blocking"
MARKET_DATA_STALE = "market_data_stale"
REPLAN_MOVED = "replan_moved"
FILL_UNKNOWN_ORDER = "fill_unknown_order"
FILL_OVERFILL = "fill_overfill"
FILL_AFTER_CLOSE = "fill_after_close"
FILL_DUPLICATE_CONFLICT = "fill_duplicate_conflict"
FILL_WRONG_SIDE = "fill_wrong_side"
FILL_PRICE_OUTSIDE = "fill_price_outside"
ORDER_DONE = "order_done"
ORDER_EXPIRED = "order_expired"
ORDER_HALTED = "order_halted"
ORDER_RESUMED = "order_resumed"
DEFAULT_PROFILE = "default_profile"
REPLAN_FAILED = "replan_failed"
INTERNAL_ERROR = "internal_error"
FILL_PARKED = "fill_parked"
FILL_UNASSIGNED = "fill_unassigned"
FILL_BUSTED = "fill_busted"
FILL_CORRECTED = "fill_corrected"
CANCEL_MISMATCH = "cancel_mismatch"
JOURNAL_FAILED = "journal_failed"
CLOCK_SKEW = "clock_skew"
SOURCE_GAP = "source_gap"
SOURCE_SILENT = "source_silent"


@dataclass(frozen=True, slots=True)
class Code:
    """What an alert code means and how severe it is.

    Attributes:
        severity: The severity it is raised with, or one severity per case (``{"residual":
            "warning", "complete": "info"}``) when that depends on the case; the raiser then names
            the case.
        meaning: One line for the desk: what happened.
    """

    severity: Severity | Mapping[str, Severity]
    meaning: str

    def severity_of(self, case: str | None = None) -> Severity:
        """The severity of a raise (of ``case``, for a code whose severity depends on the case).

        Raises:
            KeyError: ``case`` is missing, not needed, or not one of the code's cases.
        """
        if isinstance(self.severity, str):
            if case is not None:
                raise KeyError(f"this code has one severity; got case {case!r}")
            return self.severity
        if case is None or case not in self.severity:
            raise KeyError(f"name the case, one of {', '.join(self.severity)}; got {case!r}")
        return self.severity[case]


#: Every alert code: its severity and meaning (the module docstring's table shows the same).
CODES: Mapping[str, Code] = {
    BEHIND_PLAN: Code("warning", "filled below the baseline plan beyond the tolerance"),
    AHEAD_OF_PLAN: Code("warning", "filled above the baseline plan beyond the tolerance"),
    COMPLETION_INFEASIBLE: Code(
        "critical", "the participation cap cannot complete the order in time"
    ),
    VOLUME_SHOCK: Code("warning", "a bin's volume far from its forecast (symbol scope)"),
    SPREAD_SHOCK: Code("warning", "a bin's spread far from its forecast (symbol scope)"),
    LIMIT_BLOCKING: Code("warning", "the market is beyond the order's limit price"),
    MARKET_DATA_STALE: Code(
        "critical", "no bin for the symbol for more than ``stale_bins`` bins (symbol scope)"
    ),
    REPLAN_MOVED: Code("info", "a re-plan moved the schedule materially"),
    REPLAN_FAILED: Code(
        "critical", "a re-plan could not be made; the previous plan and target stand"
    ),
    FILL_UNKNOWN_ORDER: Code("critical", "a fill names an order the engine does not know"),
    FILL_OVERFILL: Code("critical", "fills exceed the order quantity"),
    FILL_AFTER_CLOSE: Code("warning", "a fill on an order that is done, cancelled or expired"),
    FILL_DUPLICATE_CONFLICT: Code(
        "critical", "a fill id seen before with different content (rejected)"
    ),
    FILL_WRONG_SIDE: Code("critical", "a fill whose side differs from the order's (rejected)"),
    FILL_PRICE_OUTSIDE: Code("warning", "a fill price far outside its bin's low-high range"),
    ORDER_DONE: Code("info", "the order is complete"),
    ORDER_EXPIRED: Code(
        {"residual": "warning", "complete": "info"},
        "the order's end passed: with shares left (residual) or none (complete)",
    ),
    ORDER_HALTED: Code("info", "a control message (or a halt of all orders) halted the order"),
    ORDER_RESUMED: Code("info", "a control message resumed the order"),
    DEFAULT_PROFILE: Code(
        "info", "no liquidity profile for a symbol: the stated default is used (symbol scope)"
    ),
    INTERNAL_ERROR: Code(
        "critical",
        "handling a message failed inside the engine (a bug); the message was not applied",
    ),
    FILL_PARKED: Code("info", "a fill for an order not seen yet waits for it"),
    FILL_UNASSIGNED: Code(
        "critical", "a parked fill's order never came: its shares are unassigned"
    ),
    FILL_BUSTED: Code(
        "warning", "a fill was busted: inventory, price and plan recomputed without it"
    ),
    FILL_CORRECTED: Code("warning", "a fill was corrected: inventory, price and plan recomputed"),
    CANCEL_MISMATCH: Code(
        "critical",
        "a cancel named another symbol or side than its order; the order was cancelled all "
        "the same",
    ),
    JOURNAL_FAILED: Code(
        "critical",
        "the daemon's journal cannot be written (deleted, replaced, disk full, I/O error): "
        "it stops",
    ),
    CLOCK_SKEW: Code(
        "warning",
        "a message's ts is outside the tolerance around its receive time; it was applied at "
        "its receive time",
    ),
    SOURCE_GAP: Code(
        "critical",
        "a source's sequence numbers skipped: messages between them never arrived",
    ),
    SOURCE_SILENT: Code(
        "warning",
        "a source that sends heartbeats has sent nothing for several of its intervals",
    ),
}


def severity(code: str, case: str | None = None) -> Severity:
    """The severity :data:`CODES` gives ``code`` (in ``case``, where it depends on the case).

    Raises:
        KeyError: an unknown code, or a case that does not fit the code.
    """
    return CODES[code].severity_of(case)


@dataclass(frozen=True)
class AlertConfig:
    """Alert thresholds. Every raise threshold has a lower clear threshold (hysteresis).

    Attributes:
        deviation_pct: Behind/ahead of plan raises when the gap is at least this % of the order...
        deviation_shares: ...and at least this many shares...
        deviation_bins: ...and at least this many bins of the baseline plan's average trading.
        clear_ratio: A raised condition clears when its measure falls below ``clear_ratio`` times
            the raise threshold (all three deviation measures: clearing needs only one of them
            below its clear level).
        volume_shock_ratio: A bin's volume at least this many times its forecast, or at most
            its inverse, raises ``volume_shock``.
        volume_shock_clear: ...which clears when a bin is back within this ratio either way.
        spread_shock_ratio: Like ``volume_shock_ratio``, for the spread (wider only).
        spread_shock_clear: Like ``volume_shock_clear``, for the spread.
        stale_bins: ``market_data_stale`` when no bin arrived for more than this many bin
            lengths of event time during the session; clears on the next bin.
        replan_move_pct: ``replan_moved`` when a re-plan's cumulative schedule differs from the
            previous plan's by at least this % of the order in some bin.
        infeasible_pct: ``completion_infeasible`` when the capped plan leaves at least this % of
            the order (and at least one share) undone at the end; clears below
            ``clear_ratio`` times it.
        fill_price_tolerance_pct: ``fill_price_outside`` when a fill's price is more than this
            % of the price outside its bin's low-high range.
    """

    deviation_pct: float = 5.0
    deviation_shares: float = 100.0
    deviation_bins: float = 1.0
    clear_ratio: float = 0.5
    volume_shock_ratio: float = 3.0
    volume_shock_clear: float = 1.5
    spread_shock_ratio: float = 3.0
    spread_shock_clear: float = 1.5
    stale_bins: float = 2.0
    replan_move_pct: float = 10.0
    infeasible_pct: float = 0.5
    fill_price_tolerance_pct: float = 1.0

    def __post_init__(self) -> None:
        for item in fields(AlertConfig):
            value = getattr(self, item.name)
            if isinstance(value, bool) or not isinstance(value, int | float):
                raise InputError(f"must be a number; got {value!r}", field=item.name)
            if not math.isfinite(value) or value < 0:
                raise InputError(f"must be a finite number >= 0; got {value!r}", field=item.name)
        if not 0 < self.clear_ratio < 1:
            raise InputError(
                f"must be in (0, 1) so that clearing needs a clear recovery; got "
                f"{self.clear_ratio!r}",
                field="clear_ratio",
            )
        for raise_key, clear_key in (
            ("volume_shock_ratio", "volume_shock_clear"),
            ("spread_shock_ratio", "spread_shock_clear"),
        ):
            if not 1 <= getattr(self, clear_key) < getattr(self, raise_key):
                raise InputError(
                    f"must be at least 1 and below {raise_key} ({getattr(self, raise_key)}); "
                    f"got {getattr(self, clear_key)!r}",
                    field=clear_key,
                )


Text = str | Callable[[], str]


def _text(text: Text) -> str:
    return text() if callable(text) else text


def _details(details: Mapping[str, Any] | Callable[[], Mapping[str, Any]]) -> dict[str, Any]:
    return dict(details() if callable(details) else details)


@dataclass(frozen=True)
class Check:
    """The verdict of one rule on one condition, before hysteresis.

    Attributes:
        code: The alert code (its severity comes from :data:`CODES`).
        breach: The condition is bad enough to raise now.
        recovered: The condition is good enough to clear now (never true with ``breach``).
        message: Plain-language message for a raise (or a function making it: the text is
            only built when the alert is actually raised, which keeps a bin close cheap).
        clear_message: Plain-language message for a clear (or a function making it).
        details: Numbers behind the verdict (JSON-able), or a function making them (built only
            on a raise or a clear).
    """

    code: str
    breach: bool
    recovered: bool
    message: Text
    clear_message: Text
    details: Mapping[str, Any] | Callable[[], Mapping[str, Any]] = field(default_factory=dict)

    @property
    def severity(self) -> Severity:
        """The severity of a raise of this code."""
        return severity(self.code)


class AlertBook:
    """Which conditions are raised, per scope and code; turns checks into raise/clear messages.

    Changes can be undone: after :meth:`mark`, the book remembers each change until
    :meth:`rollback` (undo them all) or :meth:`release` (keep them). The engine marks the book
    before an event and rolls it back if the event fails inside the engine.
    """

    __slots__ = ("_log", "_raised")

    def __init__(self) -> None:
        self._raised: set[tuple[str, str]] = set()
        self._log: list[tuple[bool, tuple[str, str]]] | None = None  # (was added, key)

    def mark(self) -> None:
        """Start remembering changes (from now on, until :meth:`rollback` or :meth:`release`)."""
        self._log = []

    def rollback(self) -> None:
        """Undo every change since :meth:`mark` and stop remembering."""
        for added, key in reversed(self._log or []):
            if added:
                self._raised.discard(key)
            else:
                self._raised.add(key)
        self._log = None

    def release(self) -> None:
        """Keep the changes since :meth:`mark` and stop remembering."""
        self._log = None

    def _add(self, key: tuple[str, str]) -> None:
        self._raised.add(key)
        if self._log is not None:
            self._log.append((True, key))

    def _discard(self, key: tuple[str, str]) -> None:
        self._raised.discard(key)
        if self._log is not None:
            self._log.append((False, key))

    def forget(self, scopes: set[str]) -> None:
        """Drop what is raised for ``scopes`` (orders the engine no longer keeps)."""
        self._raised = {key for key in self._raised if key[0] not in scopes}

    def is_raised(self, scope: str, code: str) -> bool:
        """Whether ``code`` is currently raised for ``scope``."""
        return (scope, code) in self._raised

    def apply(
        self,
        check: Check,
        *,
        scope: str,
        order_id: str | None,
        symbol: str | None,
        ts: datetime,
    ) -> AlertMessage | None:
        """The message the check causes: a raise, a clear, or ``None`` (no change)."""
        key = (scope, check.code)
        if key not in self._raised and check.breach:
            self._add(key)
            return AlertMessage(
                order_id=order_id,
                symbol=symbol,
                code=check.code,
                severity=check.severity,
                state="raised",
                message=_text(check.message),
                details=_details(check.details),
                ts=ts,
            )
        if key in self._raised and check.recovered and not check.breach:
            self._discard(key)
            return AlertMessage(
                order_id=order_id,
                symbol=symbol,
                code=check.code,
                severity="info",
                state="cleared",
                message=_text(check.clear_message),
                details=_details(check.details),
                ts=ts,
            )
        return None

    def clear_silently(self, scope: str) -> None:
        """Forget every raised condition of ``scope`` (an order that ended)."""
        for key in sorted(key for key in self._raised if key[0] == scope):
            self._discard(key)


def event(
    code: str,
    message: str,
    *,
    order_id: str | None,
    symbol: str | None,
    ts: datetime,
    details: Mapping[str, Any] | None = None,
    case: str | None = None,
) -> AlertMessage:
    """A one-shot alert (an event, not a condition): raised once, never cleared.

    Args:
        code: One of :data:`CODES`; the alert's severity comes from there.
        message: Plain-language text for the desk.
        order_id: The order it concerns (``None``: a symbol as a whole).
        symbol: The symbol it concerns.
        ts: Event time.
        details: Numbers behind it (JSON-able).
        case: For a code whose severity depends on the case, which case this is.

    Raises:
        KeyError: an unknown code, or a case that does not fit the code (a bug of the caller).
    """
    return AlertMessage(
        order_id=order_id,
        symbol=symbol,
        code=code,
        severity=severity(code, case),
        state="raised",
        message=message,
        details=dict(details or {}),
        ts=ts,
    )


# --------------------------------------------------------------------------------------------
# Rules (pure)
# --------------------------------------------------------------------------------------------


def _shares(value: float) -> str:
    return f"{round(value):,}"


def deviation(
    *,
    quantity: float,
    deviation_shares: float,
    deviation_bins: float | None,
    config: AlertConfig,
) -> tuple[Check, Check]:
    """Behind and ahead of plan.

    Args:
        quantity: The order quantity (shares).
        deviation_shares: Planned minus filled shares at this time (> 0 behind, < 0 ahead).
        deviation_bins: The gap in bins of the baseline plan's average trading per bin
            (absolute value used), or ``None`` when unknown (then the bins test is skipped).
        config: Thresholds.

    Returns:
        ``(behind_plan check, ahead_of_plan check)``.
    """
    gap = abs(deviation_shares)
    pct = 100.0 * gap / quantity if quantity > 0 else 0.0
    bins = abs(deviation_bins) if deviation_bins is not None else None
    r = config.clear_ratio
    big = (
        pct >= config.deviation_pct
        and gap >= config.deviation_shares
        and (bins is None or bins >= config.deviation_bins)
    )
    small = (
        pct < r * config.deviation_pct
        or gap < r * config.deviation_shares
        or (bins is not None and bins < r * config.deviation_bins)
    )
    bins_text = f", {bins:.1f} bins of planned trading" if bins is not None else ""
    details = lambda: {  # noqa: E731 - built only on a raise or clear
        "deviation_shares": round(deviation_shares),
        "deviation_pct": pct,
        "deviation_bins": bins,
    }
    checks = []
    for code, sign, word in ((BEHIND_PLAN, 1.0, "behind"), (AHEAD_OF_PLAN, -1.0, "ahead of")):
        this_side = sign * deviation_shares > 0
        checks.append(
            Check(
                code=code,
                breach=big and this_side,
                recovered=small or not this_side,
                message=lambda word=word: (  # type: ignore[misc]
                    f"{_shares(gap)} shares {word} plan ({pct:.1f} % of the order{bins_text})."
                ),
                clear_message=lambda: (
                    f"Back within tolerance of the plan ({pct:.1f} % of the order)."
                ),
                details=details,
            )
        )
    return checks[0], checks[1]


def completion(*, quantity: float, shortfall: float, config: AlertConfig) -> Check:
    """Completion infeasible under the participation cap: ``shortfall`` shares left at the end."""
    pct = 100.0 * shortfall / quantity if quantity > 0 else 0.0
    return Check(
        code=COMPLETION_INFEASIBLE,
        breach=shortfall >= 1 and pct >= config.infeasible_pct,
        recovered=shortfall < 1 or pct < config.clear_ratio * config.infeasible_pct,
        message=lambda: (
            f"The order cannot complete under its participation cap: about {_shares(shortfall)} "
            f"shares ({pct:.1f} %) would be left at the end. Raise the cap or extend the end."
        ),
        clear_message=lambda: "Completion is feasible again under the participation cap.",
        details=lambda: {"shortfall_shares": round(shortfall), "shortfall_pct": pct},
    )


def _amount(what: str, value: float) -> str:
    """A volume in whole shares, a spread in currency: never in scientific notation."""
    return f"{value:,.0f} shares" if what == "volume" else f"{value:,.4f}"


def _ratio_check(
    *,
    code: str,
    what: str,
    observed: float,
    expected: float,
    raise_ratio: float,
    clear_ratio: float,
    both_ways: bool,
) -> Check:
    # No forecast (0) and some volume counts as infinitely far; nothing against nothing is normal.
    ratio = (math.inf if observed > 0 else 1.0) if expected <= 0 else observed / expected
    high = ratio >= raise_ratio
    low = both_ways and ratio <= 1.0 / raise_ratio
    within = ratio < clear_ratio and (not both_ways or ratio > 1.0 / clear_ratio)
    direction = "above" if ratio >= 1 else "below"
    shown = "inf" if math.isinf(ratio) else f"{ratio:.2f}"
    return Check(
        code=code,
        breach=high or low,
        recovered=within,
        message=lambda: (
            f"Observed {what} {_amount(what, observed)} is far {direction} the forecast "
            f"{_amount(what, expected)} ({shown} times)."
        ),
        clear_message=lambda: f"{what.capitalize()} is back near its forecast ({shown} times).",
        details=lambda: {
            "observed": observed,
            "forecast": expected,
            "ratio": None if math.isinf(ratio) else ratio,
        },
    )


def volume_shock(*, observed: float, forecast: float, config: AlertConfig) -> Check:
    """A bin's volume far above or below its forecast (forecast made before the bin arrived)."""
    return _ratio_check(
        code=VOLUME_SHOCK,
        what="volume",
        observed=observed,
        expected=forecast,
        raise_ratio=config.volume_shock_ratio,
        clear_ratio=config.volume_shock_clear,
        both_ways=True,
    )


def spread_shock(*, observed: float, forecast: float, config: AlertConfig) -> Check:
    """A bin's spread far wider than its forecast."""
    return _ratio_check(
        code=SPREAD_SHOCK,
        what="spread",
        observed=observed,
        expected=forecast,
        raise_ratio=config.spread_shock_ratio,
        clear_ratio=config.spread_shock_clear,
        both_ways=False,
    )


def limit_blocking(*, blocked: bool, side: str, limit: float | None, price: float | None) -> Check:
    """The market is beyond the order's limit: the next bin's target is zero."""
    beyond = "above" if side == "buy" else "below"
    return Check(
        code=LIMIT_BLOCKING,
        breach=blocked,
        recovered=not blocked,
        message=lambda: (
            f"The market ({price}) is {beyond} the {side} limit {limit}: the next bin's target is "
            "zero and the rest of the order is re-planned over the bins left."
        ),
        clear_message=lambda: f"The market ({price}) is back within the limit {limit}.",
        details=lambda: {"limit_price": limit, "price": price},
    )


def stale(*, age_seconds: float | None, bin_seconds: float, config: AlertConfig) -> Check:
    """No bin for a symbol for more than ``stale_bins`` bin lengths (``None``: a bin just came)."""
    limit = config.stale_bins * bin_seconds
    breach = age_seconds is not None and age_seconds > limit
    age_text = f"{age_seconds:.0f} s" if age_seconds is not None else "now"
    return Check(
        code=MARKET_DATA_STALE,
        breach=breach,
        recovered=age_seconds is None,
        message=lambda: (
            f"No market bin for {age_text} (more than {config.stale_bins:g} bins): forecasts "
            "and targets are running on old data. Check the market data feed."
        ),
        clear_message=lambda: "Market bins are arriving again.",
        details=lambda: {"age_seconds": age_seconds, "limit_seconds": limit},
    )


def replan_moved(*, move_shares: float, quantity: float, config: AlertConfig) -> Check:
    """A re-plan moved the cumulative schedule by ``move_shares`` in some bin."""
    pct = 100.0 * abs(move_shares) / quantity if quantity > 0 else 0.0
    return Check(
        code=REPLAN_MOVED,
        breach=pct >= config.replan_move_pct,
        recovered=pct < config.clear_ratio * config.replan_move_pct,
        message=lambda: (
            f"The re-plan moved the schedule by up to {_shares(abs(move_shares))} shares "
            f"({pct:.1f} % of the order) against the previous plan."
        ),
        clear_message=lambda: f"Re-plans are stable again (largest move {pct:.1f} % of the order).",
        details=lambda: {"move_shares": round(move_shares), "move_pct": pct},
    )


def fill_price_outside(*, price: float, low: float, high: float, config: AlertConfig) -> bool:
    """Whether a fill price is more than the tolerance outside the bin's low-high range."""
    tolerance = config.fill_price_tolerance_pct / 100.0
    return price > high * (1.0 + tolerance) or price < low * (1.0 - tolerance)


__all__ = [
    "AHEAD_OF_PLAN",
    "BEHIND_PLAN",
    "CANCEL_MISMATCH",
    "CODES",
    "COMPLETION_INFEASIBLE",
    "DEFAULT_PROFILE",
    "FILL_AFTER_CLOSE",
    "FILL_BUSTED",
    "FILL_CORRECTED",
    "FILL_DUPLICATE_CONFLICT",
    "FILL_OVERFILL",
    "FILL_PARKED",
    "FILL_PRICE_OUTSIDE",
    "FILL_UNASSIGNED",
    "FILL_UNKNOWN_ORDER",
    "FILL_WRONG_SIDE",
    "INTERNAL_ERROR",
    "JOURNAL_FAILED",
    "LIMIT_BLOCKING",
    "MARKET_DATA_STALE",
    "ORDER_DONE",
    "ORDER_EXPIRED",
    "ORDER_HALTED",
    "ORDER_RESUMED",
    "REPLAN_FAILED",
    "REPLAN_MOVED",
    "SPREAD_SHOCK",
    "VOLUME_SHOCK",
    "AlertBook",
    "AlertConfig",
    "Check",
    "Code",
    "completion",
    "deviation",
    "event",
    "fill_price_outside",
    "limit_blocking",
    "replan_moved",
    "severity",
    "spread_shock",
    "stale",
    "volume_shock",
]
