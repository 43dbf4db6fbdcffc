"""Alert rules with hysteresis: each condition is raised once and cleared once."""

from __future__ import annotations

from collections.abc import Callable
from datetime import UTC, datetime

import pytest

from tracker.core import alerts
from tracker.core.alerts import AlertBook, AlertConfig, Check
from tracker.errors import InputError

TS = datetime(2026, 3, 2, 15, 0, tzinfo=UTC)
CONFIG = AlertConfig()


def run(checks: list[Check]) -> list[str | None]:
    """Feed checks through one book and return the transition each one caused."""
    book = AlertBook()
    result: list[str | None] = []
    for check in checks:
        message = book.apply(check, scope="A", order_id="A", symbol="X_ZEPH", ts=TS)
        result.append(None if message is None else message.state)
    return result


def behind(gap: float) -> Check:
    """The behind-plan check of a 100,000-share order, ``gap`` shares behind, 2,000 per bin."""
    return alerts.deviation(
        quantity=100_000, deviation_shares=gap, deviation_bins=gap / 2_000, config=CONFIG
    )[0]


def ahead(gap: float) -> Check:
    """The ahead-of-plan check for the same order, ``gap`` shares ahead."""
    return alerts.deviation(
        quantity=100_000, deviation_shares=-gap, deviation_bins=-gap / 2_000, config=CONFIG
    )[1]


SCENARIOS: list[tuple[str, Callable[[float], Check], list[float], list[str | None]]] = [
    # 5 % raises, below 2.5 % clears; 3 % and 4 % in between change nothing.
    (
        "behind-plan",
        behind,
        [0, 6_000, 7_000, 4_000, 3_000, 2_000, 1_000],
        [None, "raised", None, None, None, "cleared", None],
    ),
    ("ahead-of-plan", ahead, [0, 5_000, 3_000, 2_400], [None, "raised", None, "cleared"]),
    (
        "behind-plan-flapping-around-threshold-raises-once",
        behind,
        [5_100, 4_900, 5_100, 4_900, 5_100],
        ["raised", None, None, None, None],
    ),
    (
        "completion-infeasible",
        lambda s: alerts.completion(quantity=100_000, shortfall=s, config=CONFIG),
        [0, 2_000, 1_000, 300, 100, 0],
        [None, "raised", None, None, "cleared", None],
    ),
    (
        "volume-shock-high",
        lambda r: alerts.volume_shock(observed=r * 1_000, forecast=1_000, config=CONFIG),
        [1.0, 3.5, 2.0, 1.4, 1.0],
        [None, "raised", None, "cleared", None],
    ),
    (
        "volume-shock-low",
        lambda r: alerts.volume_shock(observed=r * 1_000, forecast=1_000, config=CONFIG),
        [1.0, 0.2, 0.5, 0.8],
        [None, "raised", None, "cleared"],
    ),
    (
        "spread-shock",
        lambda r: alerts.spread_shock(observed=r * 0.02, forecast=0.02, config=CONFIG),
        [1.0, 0.1, 3.0, 2.0, 1.2],
        [None, None, "raised", None, "cleared"],
    ),
    (
        "limit-blocking",
        lambda b: alerts.limit_blocking(blocked=bool(b), side="buy", limit=20.0, price=20.5),
        [0, 1, 1, 1, 0, 0],
        [None, "raised", None, None, "cleared", None],
    ),
    (
        "market-data-stale",
        lambda age: alerts.stale(
            age_seconds=None if age < 0 else age, bin_seconds=300, config=CONFIG
        ),
        [300, 600, 601, 900, -1, 300],
        [None, None, "raised", None, "cleared", None],
    ),
    (
        "replan-moved",
        lambda m: alerts.replan_moved(move_shares=m, quantity=100_000, config=CONFIG),
        [1_000, 12_000, 8_000, 6_000, 4_000],
        [None, "raised", None, None, "cleared"],
    ),
]


@pytest.mark.parametrize(
    ("rule", "values", "expected"),
    [(rule, values, expected) for _, rule, values, expected in SCENARIOS],
    ids=[name for name, *_ in SCENARIOS],
)
def test_condition_is_raised_once_and_cleared_once(
    rule: Callable[[float], Check], values: list[float], expected: list[str | None]
) -> None:
    """A condition raises when it crosses the raise level and clears below the clear level."""
    assert expected == run([rule(value) for value in values])


def test_small_order_gap_below_share_minimum_does_not_raise() -> None:
    """A 10 % gap of a 500-share order (50 shares) stays under the 100-share minimum."""
    check = alerts.deviation(quantity=500, deviation_shares=50, deviation_bins=5.0, config=CONFIG)[
        0
    ]
    assert not check.breach


def test_gap_within_one_bin_of_trading_does_not_raise() -> None:
    """A 6 % gap that is less than one bin of planned trading is not yet 'behind'."""
    check = alerts.deviation(
        quantity=100_000, deviation_shares=6_000, deviation_bins=0.8, config=CONFIG
    )[0]
    assert not check.breach


def test_switching_from_behind_to_ahead_clears_then_raises() -> None:
    """Jumping from far behind to far ahead clears behind_plan and raises ahead_of_plan."""
    book = AlertBook()
    seen = []
    for gap in (8_000, -8_000):
        for check in alerts.deviation(
            quantity=100_000, deviation_shares=gap, deviation_bins=gap / 2_000, config=CONFIG
        ):
            message = book.apply(check, scope="A", order_id="A", symbol="X_ZEPH", ts=TS)
            if message is not None:
                seen.append((message.code, message.state))
    expected = [
        ("behind_plan", "raised"),
        ("behind_plan", "cleared"),
        ("ahead_of_plan", "raised"),
    ]
    assert expected == seen


def test_scopes_are_independent() -> None:
    """The same condition on two orders is raised for each of them."""
    book = AlertBook()
    raised = [
        book.apply(behind(9_000), scope=scope, order_id=scope, symbol="X_ZEPH", ts=TS)
        for scope in ("A", "B")
    ]
    expected = ["A", "B"]
    assert expected == [m.order_id for m in raised if m is not None]


def test_cleared_message_is_info_and_keeps_code() -> None:
    """A clear carries the same code, severity info and a plain message."""
    book = AlertBook()
    book.apply(behind(9_000), scope="A", order_id="A", symbol="X_ZEPH", ts=TS)
    message = book.apply(behind(0), scope="A", order_id="A", symbol="X_ZEPH", ts=TS)
    assert message is not None
    expected = ("behind_plan", "info", "cleared")
    assert expected == (message.code, message.severity, message.state)


def test_fill_price_outside_tolerance() -> None:
    """A price more than 1 % outside the bin's range is flagged; inside the margin is not."""
    verdicts = [
        alerts.fill_price_outside(price=p, low=19.0, high=20.0, config=CONFIG)
        for p in (19.5, 20.19, 20.21, 18.82, 18.80)
    ]
    expected = [False, False, True, False, True]
    assert expected == verdicts


@pytest.mark.parametrize(
    ("changes", "field"),
    [
        ({"clear_ratio": 1.0}, "clear_ratio"),
        ({"deviation_pct": -1.0}, "deviation_pct"),
        ({"stale_bins": float("nan")}, "stale_bins"),
        ({"volume_shock_clear": 4.0}, "volume_shock_clear"),
        ({"deviation_shares": "100"}, "deviation_shares"),
    ],
    ids=["clear-ratio-one", "negative", "nan", "clear-above-raise", "string"],
)
def test_bad_threshold_names_the_field(changes: dict[str, object], field: str) -> None:
    """An out-of-range threshold raises InputError naming it."""
    with pytest.raises(InputError) as info:
        AlertConfig(**changes)  # type: ignore[arg-type]
    assert field == info.value.field


@pytest.mark.parametrize(
    ("gap", "expected"),
    [
        (9_000, "9,000 shares behind plan (9.0 % of the order, 4.5 bins of planned trading)."),
        (-9_000, "9,000 shares ahead of plan (9.0 % of the order, 4.5 bins of planned trading)."),
    ],
    ids=["behind", "ahead"],
)
def test_deviation_message_says_which_way(gap: float, expected: str) -> None:
    """The raised message states the gap in shares, % of the order and bins, and its direction."""
    checks = alerts.deviation(
        quantity=100_000, deviation_shares=gap, deviation_bins=gap / 2_000, config=CONFIG
    )
    book = AlertBook()
    messages = [book.apply(c, scope="A", order_id="A", symbol="X_ZEPH", ts=TS) for c in checks]
    assert [expected] == [m.message for m in messages if m is not None]


def docstring_table() -> dict[str, tuple[str, str]]:
    """The module docstring's code table as ``{code: (severity text, meaning)}``."""
    assert alerts.__doc__ is not None
    lines = alerts.__doc__.split("\n")
    rules = [i for i, line in enumerate(lines) if line.startswith("=====")]
    rows: dict[str, tuple[str, str]] = {}
    code = ""
    for line in lines[rules[1] + 1 : rules[2]]:
        first, second, third = line[:27].strip(), line[27:49].strip(), line[49:].strip()
        if first:
            code = first
            rows[code] = (second, third)
        else:  # a continuation line of the row above
            severity, meaning = rows[code]
            rows[code] = (f"{severity} {second}".strip(), f"{meaning} {third}".strip())
    return rows


def table_severity(code: alerts.Code) -> str:
    """A code's severity as the docstring writes it."""
    if isinstance(code.severity, str):
        return code.severity
    return ", ".join(f"{case}: {severity}" for case, severity in code.severity.items())


def test_docstring_table_is_the_codes_mapping() -> None:
    """The table in the module docstring says exactly what CODES says, code by code."""
    expected = {name: (table_severity(code), code.meaning) for name, code in alerts.CODES.items()}
    assert expected == docstring_table()


def test_every_code_constant_is_in_the_mapping() -> None:
    """Each upper-case code constant of the module has a severity and a meaning."""
    constants = {
        value
        for name, value in vars(alerts).items()
        if name.isupper() and isinstance(value, str) and name not in ("CODES",)
    }
    assert constants == set(alerts.CODES)


@pytest.mark.parametrize(
    ("code", "case", "expected"),
    [
        ("fill_overfill", None, "critical"),
        ("replan_failed", None, "critical"),
        ("internal_error", None, "critical"),
        ("order_expired", "residual", "warning"),
        ("order_expired", "complete", "info"),
    ],
    ids=["overfill", "replan-failed", "internal-error", "expired-residual", "expired-complete"],
)
def test_event_takes_its_severity_from_the_table(
    code: str, case: str | None, expected: str
) -> None:
    """A one-shot alert carries the severity CODES gives its code (and case)."""
    message = alerts.event(code, "text", order_id="A", symbol="X_ZEPH", ts=TS, case=case)
    assert expected == message.severity


@pytest.mark.parametrize(
    ("code", "case"),
    [
        ("order_expired", None),
        ("order_expired", "late"),
        ("order_done", "residual"),
        ("nope", None),
    ],
    ids=["case-missing", "case-unknown", "case-not-needed", "unknown-code"],
)
def test_event_refuses_a_case_that_does_not_fit(code: str, case: str | None) -> None:
    """A missing, unknown or needless case, or an unknown code, is a caller's bug: KeyError."""
    with pytest.raises(KeyError):
        alerts.event(code, "text", order_id="A", symbol="X_ZEPH", ts=TS, case=case)


def test_a_check_raises_with_the_severity_of_its_code() -> None:
    """A condition raised through the book carries its code's severity from CODES."""
    book = AlertBook()
    check = alerts.completion(quantity=100_000, shortfall=5_000, config=CONFIG)
    message = book.apply(check, scope="A", order_id="A", symbol="X_ZEPH", ts=TS)
    assert message is not None
    assert ("completion_infeasible", "critical") == (message.code, message.severity)


def test_rollback_undoes_every_change_since_the_mark() -> None:
    """Raises, clears and silent clears after mark() are undone by rollback(); earlier ones stay."""
    book = AlertBook()
    book.apply(behind(9_000), scope="A", order_id="A", symbol="X_ZEPH", ts=TS)
    book.apply(behind(9_000), scope="B", order_id="B", symbol="X_ZEPH", ts=TS)
    book.mark()
    book.apply(behind(0), scope="A", order_id="A", symbol="X_ZEPH", ts=TS)  # cleared
    book.apply(behind(9_000), scope="C", order_id="C", symbol="X_ZEPH", ts=TS)  # raised
    book.clear_silently("B")
    book.rollback()
    expected = [True, True, False]
    assert expected == [book.is_raised(scope, "behind_plan") for scope in ("A", "B", "C")]


def test_shock_messages_write_numbers_as_people_read_them() -> None:
    """Volumes in whole shares with separators, spreads in currency: no scientific notation."""
    config = alerts.AlertConfig()
    volume = alerts.volume_shock(observed=2_352.0, forecast=12_186.786, config=config)
    spread = alerts.spread_shock(observed=0.0634, forecast=0.01869, config=config)
    assert "Observed volume 2,352 shares is far below the forecast 12,187 shares (0.19 times)." == (
        volume.message()
    )
    assert "Observed spread 0.0634 is far above the forecast 0.0187 (3.39 times)." == (
        spread.message()
    )
