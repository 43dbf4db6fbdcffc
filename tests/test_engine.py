"""The tracking engine: lifecycle, re-planning, fills, alerts and the summary.

Symbols, prices and volumes here are invented test values (a made-up venue, Harbour Lane
Exchange, X_HLX). The session is the default one (09:30-16:00 America/New_York, 5-minute bins, 78
bins: common practice); on 2026-03-02 the open is 14:30 UTC.
"""

from __future__ import annotations

from datetime import UTC, datetime, timedelta
from pathlib import Path

import numpy as np
import pytest

from tracker.core.engine import Engine, EngineConfig
from tracker.core.forecast import forecast
from tracker.core.formulation import build_problem, preferences
from tracker.core.lifecycle import State
from tracker.core.profiles import default_profile
from tracker.core.solve import solve
from tracker.edge.wire import ErrorMessage, StatusMessage, TargetMessage, encode
from tracker.errors import InputError
from tracker.testing import (
    Recorder,
    amend,
    bin_message,
    cancel,
    control,
    fill,
    fill_correction,
    order,
    tick,
)

OPEN = datetime(2026, 3, 2, 14, 30, tzinfo=UTC)
GOLDEN_DAY = Path(__file__).resolve().parent.parent / "replay_data" / "day-2026-03-10-seed7.jsonl"
BIN = timedelta(minutes=5)


def at(minutes: float) -> str:
    """ISO time ``minutes`` after the open."""
    return (OPEN + timedelta(minutes=minutes)).isoformat().replace("+00:00", "Z")


def closed_bin(index: int, *, volume: int = 12_000, price: float = 20.0, **extra: object):
    """The bin message of bin ``index`` (default profile volumes are about 8,000-30,000)."""
    start = OPEN + index * BIN
    return bin_message(
        "X_ZEPH",
        start,
        start + BIN,
        volume=volume,
        price=price,
        **extra,  # type: ignore[arg-type]
    )


def new_order(order_id: str = "A", quantity: int = 50_000, **extra: object):
    """A buy order over the whole day, sent before the open."""
    return order(
        order_id,
        "X_ZEPH",
        "buy",
        quantity,
        at(0),
        at(390),
        ts=at(-30),
        **extra,  # type: ignore[arg-type]
    )


@pytest.fixture
def recorder() -> Recorder:
    """A recorder around a fresh engine with default settings."""
    return Recorder(Engine())


def started(recorder: Recorder, **extra: object) -> Recorder:
    """Send order A and a tick at the open."""
    recorder.feed(new_order(**extra))
    recorder.feed(tick(at(0)))
    return recorder


# ------------------------------------------------------------------ lifecycle and targets


def test_order_before_start_is_pending_without_target(recorder: Recorder) -> None:
    """An order whose start is ahead is pending and gets no target yet."""
    outputs = recorder.feed(new_order())
    assert [] == [o for o in outputs if isinstance(o, TargetMessage)]
    assert State.PENDING == recorder.engine.state_of("A")  # type: ignore[attr-defined]


def test_start_publishes_first_target_for_first_bin(recorder: Recorder) -> None:
    """At its start the order is planned and its first bin's target is published."""
    started(recorder)
    target = recorder.targets("A")[-1]
    expected = (OPEN, OPEN + BIN, 1, 50_000)
    assert expected == (target.bin_start, target.bin_end, target.plan_version, target.remaining)
    assert 0 < target.quantity < 50_000


def test_bin_close_replans_and_targets_next_bin(recorder: Recorder) -> None:
    """A bin close publishes the next bin's target with a new plan version."""
    started(recorder)
    recorder.feed(fill("A", "f1", 700, 20.0, ts=at(3)))
    recorder.feed(closed_bin(0))
    target = recorder.targets("A")[-1]
    expected = (OPEN + BIN, 2, 700 + target.quantity, 49_300)
    assert expected == (
        target.bin_start,
        target.plan_version,
        target.cumulative_target,
        target.remaining,
    )


def test_order_starting_mid_session_plans_over_its_own_bins(recorder: Recorder) -> None:
    """An order sent at 12:00 for the rest of the day targets the 12:00 bin first."""
    for index in range(30):
        recorder.feed(closed_bin(index))
    recorder.feed(order("L", "X_ZEPH", "sell", 9_000, at(150), at(390), ts=at(150)))
    target = recorder.targets("L")[-1]
    expected = (OPEN + 30 * BIN, 1)
    assert expected == (target.bin_start, target.plan_version)


def test_cancel_publishes_zero_target_and_stops(recorder: Recorder) -> None:
    """Cancel publishes a zero target and no later bin targets the order."""
    started(recorder)
    recorder.feed(cancel("A", ts=at(2)))
    zero = recorder.targets("A")[-1]
    recorder.clear()
    recorder.feed(closed_bin(0))
    recorder.feed(closed_bin(1))
    expected = (0, [], State.CANCELLED)
    assert expected == (zero.quantity, recorder.targets("A"), recorder.engine.state_of("A"))  # type: ignore[attr-defined]


def test_halt_then_resume(recorder: Recorder) -> None:
    """Halt zeroes the target and skips re-plans; resume re-plans at once."""
    started(recorder)
    recorder.feed(control("halt", order_id="A", ts=at(1)))
    halted_target = recorder.targets("A")[-1]
    recorder.clear()
    recorder.feed(closed_bin(0))
    during_halt = recorder.targets("A")
    assert ["halted"] == [s.state for s in recorder.statuses("A")]
    recorder.feed(control("resume", order_id="A", ts=at(6)))
    resumed = recorder.targets("A")
    assert 0 == halted_target.quantity
    assert [] == during_halt
    assert 1 == len(resumed) and resumed[0].quantity > 0


def test_halt_all_also_holds_orders_that_start_later(recorder: Recorder) -> None:
    """A global halt holds an order that reaches its start during the halt."""
    recorder.feed(new_order())
    recorder.feed(control("halt", ts=at(-10)))
    recorder.feed(tick(at(0)))
    halted = recorder.engine.state_of("A")  # type: ignore[attr-defined]
    recorder.feed(control("resume", ts=at(1)))
    expected = (State.HALTED, State.WORKING)
    assert expected == (halted, recorder.engine.state_of("A"))  # type: ignore[attr-defined]


def test_halting_a_done_order_is_an_error(recorder: Recorder) -> None:
    """An illegal transition is refused with one error and the state is unchanged."""
    started(recorder, quantity=1_000)
    recorder.feed(fill("A", "f1", 1_000, 20.0, ts=at(1)))
    outputs = recorder.feed(control("halt", order_id="A", ts=at(2)))
    assert 1 == len(outputs) and isinstance(outputs[0], ErrorMessage)
    assert "cannot halt: order 'A' is done" in outputs[0].reason
    assert State.DONE == recorder.engine.state_of("A")  # type: ignore[attr-defined]


def test_amend_quantity_replans_at_once(recorder: Recorder) -> None:
    """An amendment re-plans immediately with the next plan version."""
    started(recorder)
    recorder.feed(amend("A", quantity=80_000, ts=at(1)))
    target = recorder.targets("A")[-1]
    expected = (2, 80_000, OPEN)
    assert expected == (target.plan_version, target.remaining, target.bin_start)


def test_amend_below_filled_is_refused(recorder: Recorder) -> None:
    """Amending the quantity below the filled shares is an error naming the minimum."""
    started(recorder)
    recorder.feed(fill("A", "f1", 2_000, 20.0, ts=at(1)))
    outputs = recorder.feed(amend("A", quantity=1_500, ts=at(2)))
    assert ["AckMessage", "ErrorMessage"] == [type(o).__name__ for o in outputs]
    assert "send at least 2,000" in outputs[1].reason  # type: ignore[union-attr]
    assert ("rejected", outputs[1].reason) == (  # type: ignore[union-attr]
        outputs[0].result,  # type: ignore[union-attr]
        outputs[0].reason,  # type: ignore[union-attr]
    )


def test_expiry_with_residual_alerts(recorder: Recorder) -> None:
    """An order whose end passes with shares left expires with a warning."""
    recorder.feed(order("S", "X_ZEPH", "buy", 5_000, at(0), at(10), ts=at(-1)))
    recorder.feed(tick(at(0)))
    recorder.feed(fill("S", "f1", 1_000, 20.0, ts=at(4)))
    recorder.feed(tick(at(10)))
    alert = recorder.alerts("order_expired", "S")[-1]
    expected = (State.EXPIRED, "warning", 4_000)
    assert expected == (
        recorder.engine.state_of("S"),  # type: ignore[attr-defined]
        alert.severity,
        alert.details["residual"],
    )


# ------------------------------------------------------------------ fills


def test_redelivered_fill_changes_nothing(recorder: Recorder) -> None:
    """An exact duplicate fill emits nothing and is counted once."""
    started(recorder)
    recorder.feed(fill("A", "f1", 500, 20.0, ts=at(1)))
    outputs = recorder.feed(fill("A", "f1", 500, 20.0, ts=at(1)))
    assert [] == outputs
    assert 500 == recorder.engine.filled("A")  # type: ignore[attr-defined]


def test_conflicting_duplicate_fill_is_rejected(recorder: Recorder) -> None:
    """A reused fill id with other content: one error, one critical alert, not counted."""
    started(recorder)
    recorder.feed(fill("A", "f1", 500, 20.0, ts=at(1)))
    outputs = recorder.feed(fill("A", "f1", 600, 20.0, ts=at(2)))
    kinds = [(type(o).__name__, getattr(o, "code", None)) for o in outputs]
    expected = [("ErrorMessage", None), ("AlertMessage", "fill_duplicate_conflict")]
    assert expected == kinds
    assert 500 == recorder.engine.filled("A")  # type: ignore[attr-defined]


def test_fill_for_unknown_order_is_parked_not_rejected(recorder: Recorder) -> None:
    """A fill for an order not seen yet is parked (one info alert), not an error."""
    outputs = recorder.feed(fill("NOPE", "f1", 500, 20.0, ts=at(1)))
    assert [] == [o for o in outputs if isinstance(o, ErrorMessage)]
    assert [("fill_parked", "NOPE")] == [(a.code, a.order_id) for a in recorder.alerts()]


def test_fill_of_wrong_side_is_rejected(recorder: Recorder) -> None:
    """A fill that says sell on a buy order is an error and is not counted."""
    started(recorder)
    outputs = recorder.feed(fill("A", "f1", 500, 20.0, ts=at(1), side="sell"))
    assert isinstance(outputs[0], ErrorMessage)
    assert 0 == recorder.engine.filled("A")  # type: ignore[attr-defined]


def test_overfill_is_recorded_alerted_and_never_negative(recorder: Recorder) -> None:
    """An overfill is recorded, raises a critical alert, and targets stay at zero."""
    started(recorder, quantity=1_000)
    recorder.feed(fill("A", "f1", 800, 20.0, ts=at(1)))
    recorder.feed(fill("A", "f2", 400, 20.0, ts=at(2)))
    recorder.feed(closed_bin(0))
    alert = recorder.alerts("fill_overfill", "A")[-1]
    last = recorder.targets("A")[-1]
    expected = (1_200, "critical", 200, 0, 0)
    assert expected == (
        recorder.engine.filled("A"),  # type: ignore[attr-defined]
        alert.severity,
        alert.details["excess"],
        last.quantity,
        last.remaining,
    )


def test_done_order_gets_zero_target_and_done_alert(recorder: Recorder) -> None:
    """Completing the order publishes a zero target and an order_done alert."""
    started(recorder, quantity=1_000)
    outputs = recorder.feed(fill("A", "f1", 1_000, 20.0, ts=at(1)))
    targets = [o for o in outputs if isinstance(o, TargetMessage)]
    assert [0] == [t.quantity for t in targets]
    assert ["order_done"] == [a.code for a in recorder.alerts(order_id="A")]


def test_fill_after_cancel_is_recorded_with_alert(recorder: Recorder) -> None:
    """A fill after cancel counts (it happened) and raises fill_after_close."""
    started(recorder)
    recorder.feed(cancel("A", ts=at(1)))
    recorder.feed(fill("A", "f1", 300, 20.0, ts=at(2)))
    assert 300 == recorder.engine.filled("A")  # type: ignore[attr-defined]
    assert ["fill_after_close"] == [a.code for a in recorder.alerts(order_id="A")]


def test_fill_price_far_outside_bin_range_alerts(recorder: Recorder) -> None:
    """A fill 5 % above its bin's high is flagged when the bin closes."""
    started(recorder)
    recorder.feed(fill("A", "f1", 300, 21.0, ts=at(2)))
    recorder.feed(closed_bin(0, high=20.0, low=19.9))
    assert ["fill_price_outside"] == [a.code for a in recorder.alerts(order_id="A")]


# ------------------------------------------------------------------ alerts through the engine


def test_behind_plan_raised_once_over_many_bins(recorder: Recorder) -> None:
    """With no fills, behind_plan is raised once however many bins pass."""
    started(recorder)
    for index in range(12):
        recorder.feed(closed_bin(index))
    assert 1 == len(recorder.alerts("behind_plan", "A"))


def test_limit_blocks_next_bin_and_replans(recorder: Recorder) -> None:
    """A close above a buy limit gives a zero target and one alert; back below, it clears."""
    started(recorder, limit_price=20.1)
    recorder.feed(closed_bin(0, price=20.3))
    blocked = recorder.targets("A")[-1]
    recorder.feed(closed_bin(1, price=20.4))
    recorder.feed(closed_bin(2, price=20.0))
    unblocked = recorder.targets("A")[-1]
    states = [a.state for a in recorder.alerts("limit_blocking", "A")]
    assert (0, ["raised", "cleared"]) == (blocked.quantity, states)
    assert unblocked.quantity > 0


def test_stale_market_data_raised_and_cleared(recorder: Recorder) -> None:
    """No bin for more than two bin lengths raises once; the next bin clears it."""
    started(recorder)
    recorder.feed(closed_bin(0))
    for minute in range(6, 20):
        recorder.feed(tick(at(minute)))
    recorder.feed(closed_bin(1))
    states = [(a.state, a.symbol) for a in recorder.alerts("market_data_stale")]
    assert [("raised", "X_ZEPH"), ("cleared", "X_ZEPH")] == states


def test_tiny_participation_cap_makes_completion_infeasible(recorder: Recorder) -> None:
    """A 1 % cap cannot complete 200,000 shares in a day: one critical alert, cap respected."""
    started(recorder, quantity=200_000, max_participation=0.01)
    first = recorder.targets("A")[-1]  # filled in full: the fill ratio stays 1
    recorder.feed(fill("A", "F1", first.quantity, 20.0, ts=at(4)))
    recorder.feed(closed_bin(0))
    alerts = recorder.alerts("completion_infeasible", "A")
    target = recorder.targets("A")[-1]
    assert ["critical"] == [a.severity for a in alerts]
    assert target.max_quantity is not None and target.quantity <= target.max_quantity


def test_volume_shock_is_symbol_level(recorder: Recorder) -> None:
    """A bin with ten times the forecast volume raises volume_shock for the symbol."""
    started(recorder)
    recorder.feed(closed_bin(0, volume=300_000))
    alerts = recorder.alerts("volume_shock")
    assert [(None, "X_ZEPH")] == [(a.order_id, a.symbol) for a in alerts]


def test_default_profile_alert_once_per_symbol(recorder: Recorder) -> None:
    """A symbol without a profile gets one info alert saying the default is used."""
    recorder.feed(new_order("A"))
    recorder.feed(new_order("B"))
    recorder.feed(closed_bin(0))
    assert 1 == len(recorder.alerts("default_profile"))


def test_calibrated_profile_means_no_default_alert() -> None:
    """With a profile for the symbol there is no default-profile alert."""
    recorder = Recorder(Engine(profiles={"X_ZEPH": default_profile("X_ZEPH")}))
    recorder.feed(new_order("A"))
    assert [] == recorder.alerts("default_profile")


# ------------------------------------------------------------------ bins and time


def test_redelivered_bin_changes_nothing(recorder: Recorder) -> None:
    """An exact duplicate bin emits nothing."""
    started(recorder)
    recorder.feed(closed_bin(0))
    assert [] == recorder.feed(closed_bin(0))


@pytest.mark.parametrize(
    ("message", "expected"),
    [
        (closed_bin(0, volume=1), "already accepted"),
        (closed_bin(0, spread=0.5), "already accepted"),
    ],
    ids=["different-volume", "different-spread"],
)
def test_changed_bin_is_rejected(recorder: Recorder, message: object, expected: str) -> None:
    """A second, different bin for the same interval is an error."""
    started(recorder)
    recorder.feed(closed_bin(0))
    outputs = recorder.feed(message)  # type: ignore[arg-type]
    assert 1 == len(outputs) and expected in outputs[0].reason  # type: ignore[union-attr]


def test_bin_going_backwards_is_rejected(recorder: Recorder) -> None:
    """A bin earlier than the last one of its symbol is an error."""
    recorder.feed(closed_bin(3))
    outputs = recorder.feed(closed_bin(2))
    assert 1 == len(outputs) and "bins must move forward" in outputs[0].reason  # type: ignore[union-attr]


def test_bin_off_the_session_grid_is_rejected(recorder: Recorder) -> None:
    """A bin that is not one of the session's 5-minute bins is an error."""
    start = OPEN + timedelta(minutes=2)
    outputs = recorder.feed(bin_message("X_ZEPH", start, start + BIN, volume=100, price=20.0))
    errors = [o for o in outputs if isinstance(o, ErrorMessage)]
    assert 1 == len(errors) and "is not a bin of X_ZEPH's session" in errors[0].reason


def test_tick_going_backwards_is_rejected(recorder: Recorder) -> None:
    """A tick earlier than the previous tick is an error."""
    recorder.feed(tick(at(5)))
    outputs = recorder.feed(tick(at(4)))
    assert 1 == len(outputs) and isinstance(outputs[0], ErrorMessage)


def test_second_new_order_with_the_same_id_is_an_error(recorder: Recorder) -> None:
    """An order id is created once: a new order under it again, equal or not, is refused.

    (A broker's redelivery of the same message never reaches the engine: the intake drops it,
    see tests/test_replay.py.)
    """
    recorder.feed(new_order())
    again = recorder.feed(new_order())
    changed = recorder.feed(new_order(quantity=1))
    reasons = [o.reason for o in [*again, *changed] if isinstance(o, ErrorMessage)]
    assert 2 == len(reasons) and all("already exists" in r for r in reasons)


def test_order_spanning_two_days_is_rejected(recorder: Recorder) -> None:
    """An order must start and end on the same trading day."""
    message = order("X", "X_ZEPH", "buy", 100, at(0), at(24 * 60), ts=at(-1))
    outputs = recorder.feed(message)
    errors = [o for o in outputs if isinstance(o, ErrorMessage)]
    assert 1 == len(errors) and "same local trading day" in errors[0].reason


# ------------------------------------------------------------------ prices and summary


def test_arrival_price_is_open_of_first_bin_at_or_after_start(recorder: Recorder) -> None:
    """Without an arrival price the open of the first bin from the start is used."""
    started(recorder)
    recorder.feed(closed_bin(0, price=20.5))
    recorder.feed(closed_bin(1, price=21.0))
    summary = recorder.engine.summary()  # type: ignore[attr-defined]
    assert 20.5 == summary["orders"][0]["arrival_price"]


def test_given_arrival_price_wins(recorder: Recorder) -> None:
    """An order's own arrival_price is kept."""
    started(recorder, arrival_price=19.0)
    recorder.feed(closed_bin(0, price=20.5))
    assert 19.0 == recorder.engine.summary()["orders"][0]["arrival_price"]  # type: ignore[attr-defined]


@pytest.mark.parametrize(
    ("side", "fill_price", "expected_bps"),
    [("buy", 20.1, 50.0), ("buy", 19.9, -50.0), ("sell", 19.9, 50.0), ("sell", 20.1, -50.0)],
    ids=["buy-above-cost", "buy-below-gain", "sell-below-cost", "sell-above-gain"],
)
def test_shortfall_sign_positive_is_cost(side: str, fill_price: float, expected_bps: float) -> None:
    """Shortfall against arrival is positive when it cost money, for buys and sells alike."""
    recorder = Recorder(Engine())
    recorder.feed(order("A", "X_ZEPH", side, 10_000, at(0), at(390), ts=at(-1), arrival_price=20.0))
    recorder.feed(tick(at(0)))
    recorder.feed(fill("A", "f1", 1_000, fill_price, ts=at(1)))
    recorder.feed(closed_bin(0, price=20.0))
    row = recorder.engine.summary()["orders"][0]  # type: ignore[attr-defined]
    # Definition of implementation shortfall in bps: side * (avg - arrival) / arrival * 1e4
    # (common practice); (20.1 - 20) / 20 * 1e4 = 50 bps.
    assert expected_bps == pytest.approx(row["shortfall_bps"])
    assert expected_bps == pytest.approx(row["vwap_bps"])


def test_summary_counts_alerts_by_code(recorder: Recorder) -> None:
    """The summary counts each order's raised alerts by code."""
    started(recorder, quantity=1_000)
    recorder.feed(fill("A", "f1", 1_000, 20.0, ts=at(1)))
    recorder.feed(fill("A", "f2", 10, 20.0, ts=at(2)))
    row = recorder.engine.summary()["orders"][0]  # type: ignore[attr-defined]
    expected = {"fill_after_close": 1, "fill_overfill": 1, "order_done": 1}
    assert expected == row["alerts"]


# ------------------------------------------------------------------ determinism and config


def day_of_messages() -> list[object]:
    """A short invented morning: two orders, fills, bins, a halt and ticks."""
    messages: list[object] = [
        new_order("B", 30_000),
        order("A", "X_ZEPH", "sell", 20_000, at(0), at(120), ts=at(-5), limit_price=19.5),
        tick(at(0)),
    ]
    for index in range(8):
        messages.append(
            fill("A", f"a{index}", 400 + 10 * index, 20.0 - 0.01 * index, ts=at(5 * index + 2))
        )
        messages.append(fill("B", f"b{index}", 600, 20.0 + 0.01 * index, ts=at(5 * index + 3)))
        messages.append(closed_bin(index, volume=10_000 + 1_000 * index, price=20 + 0.01 * index))
        if index == 4:
            messages.append(control("halt", order_id="B", ts=at(5 * index + 5)))
    return messages


def test_two_runs_give_identical_bytes() -> None:
    """The same input gives byte-identical outputs and summaries."""
    runs = []
    for _ in range(2):
        engine = Engine()
        outputs = [encode(o) for m in day_of_messages() for o in engine.handle(m)]  # type: ignore[arg-type]
        runs.append((outputs, engine.summary()))
    assert runs[0] == runs[1]


def test_outputs_of_one_event_are_ordered_by_order_id() -> None:
    """Within one bin close, outputs come grouped in order-id order."""
    engine = Engine()
    for order_id in ("C", "A", "B"):
        engine.handle(new_order(order_id))
    engine.handle(tick(at(0)))
    outputs = engine.handle(closed_bin(0))
    ids = [o.order_id for o in outputs if isinstance(o, TargetMessage | StatusMessage)]
    assert sorted(ids) == ids


def test_config_from_mapping_rejects_unknown_key() -> None:
    """An unknown setting is named in the error."""
    with pytest.raises(InputError) as info:
        EngineConfig.from_mapping({"deviation_pct": 4.0, "deviaton_bins": 2})
    assert "deviaton_bins" == info.value.field


def test_config_from_mapping_sets_values() -> None:
    """Known settings are applied."""
    config = EngineConfig.from_mapping({"deviation_pct": 4.0, "stale_bins": 3})
    assert (4.0, 3) == (config.deviation_pct, config.stale_bins)


# ------------------------------------------------------------------ receding horizon


def test_replan_from_expected_inventory_reproduces_remaining_plan() -> None:
    """Re-solving from the plan's own expected inventory gives the rest of the plan.

    Bellman's principle of optimality (Bellman 1957, Dynamic Programming): the tail of an optimal
    schedule is optimal for the tail problem started from the schedule's own inventory.
    """
    profile = default_profile("X_ZEPH")
    today = forecast(profile, {})
    prefs = preferences("high")
    full = solve(
        build_problem(
            quantity=50_000.0,
            first_bin=0,
            end_bin=78,
            forecast=today,
            preferences=prefs,
            max_participation=None,
            price=20.0,
            reference_quantity=50_000.0,
        )
    )
    tail = solve(
        build_problem(
            quantity=float(full.trajectory[10]),
            first_bin=10,
            end_bin=78,
            forecast=today,
            preferences=prefs,
            max_participation=None,
            price=20.0,
            reference_quantity=50_000.0,
        )
    )
    np.testing.assert_allclose(tail.trades, full.trades[10:], rtol=1e-6, atol=1e-3)


def test_engine_replan_on_plan_reproduces_remaining_plan() -> None:
    """When fills and volumes follow the plan and forecast, re-plans keep the first plan."""
    profile = default_profile("X_ZEPH")
    expected_volume = profile.expected_volume
    engine = Engine(profiles={"X_ZEPH": profile})
    engine.handle(new_order("A", 50_000, arrival_price=20.0, urgency="high"))
    first = next(o for o in engine.handle(tick(at(0))) if isinstance(o, TargetMessage))
    first_plan = engine._state.orders["A"].plan  # white-box: the first plan's cumulative schedule
    assert first_plan is not None
    planned = first_plan.cumulative.copy()
    target = first
    for index in range(5):
        engine.handle(fill("A", f"f{index}", target.quantity, 20.0, ts=at(5 * index + 1)))
        # A high/low range whose Parkinson (1980) variance ln(H/L)^2 / (4 ln 2) is the profile's.
        half_range = float(profile.volatility[index]) * np.sqrt(4 * np.log(2)) / 2
        outputs = engine.handle(
            closed_bin(
                index,
                volume=round(expected_volume[index]),
                price=20.0,
                spread=float(profile.spread[index]),
                high=20.0 * float(np.exp(half_range)),
                low=20.0 * float(np.exp(-half_range)),
            )
        )
        target = next(o for o in outputs if isinstance(o, TargetMessage))
        # Cumulative target by the end of the next bin against the first plan: within rounding.
        assert abs(target.cumulative_target - planned[index + 1]) <= 2.0


def test_engine_error_keeps_the_fields_sent(recorder: Recorder) -> None:
    """An error raised by the engine carries the message's fields as sent (no added nulls)."""
    started(recorder)
    recorder.feed(fill("A", "f1", 500, 20.0, ts=at(1)))
    outputs = recorder.feed(fill("A", "f1", 600, 20.0, ts=at(2)))
    error = next(o for o in outputs if isinstance(o, ErrorMessage))
    expected = (
        '{"type":"fill","fill_id":"f1","order_id":"A","quantity":600,"price":20.0,'
        '"ts":"2026-03-02T14:32:00Z"}'
    )
    assert expected == error.payload


# ------------------------------------------------------------------ more transitions and rules


def test_resume_before_start_returns_to_pending(recorder: Recorder) -> None:
    """An order halted before its start resumes to pending, not working."""
    recorder.feed(new_order())
    recorder.feed(control("halt", order_id="A", ts=at(-20)))
    recorder.feed(control("resume", order_id="A", ts=at(-10)))
    assert State.PENDING == recorder.engine.state_of("A")  # type: ignore[attr-defined]


def test_removing_the_limit_unblocks(recorder: Recorder) -> None:
    """An amend with limit_price null removes the limit: the target is no longer zero."""
    started(recorder, limit_price=20.1)
    recorder.feed(closed_bin(0, price=20.3))
    recorder.feed(amend("A", limit_price=None, ts=at(6)))
    target = recorder.targets("A")[-1]
    states = [a.state for a in recorder.alerts("limit_blocking", "A")]
    assert target.quantity > 0
    assert ["raised", "cleared"] == states


def test_amend_resets_the_baseline(recorder: Recorder) -> None:
    """After an amendment the deviation is measured against the new plan (zero at first)."""
    started(recorder)
    for index in range(6):
        recorder.feed(closed_bin(index))
    behind = recorder.statuses("A")[-1].deviation_shares
    recorder.feed(amend("A", quantity=60_000, ts=at(31)))
    after = recorder.statuses("A")[-1].deviation_shares
    assert behind > 0
    assert 0 == after


def test_large_fill_ahead_moves_the_plan_materially(recorder: Recorder) -> None:
    """Filling a third of the order at once raises ahead_of_plan and replan_moved once each."""
    started(recorder, quantity=90_000)
    recorder.feed(fill("A", "big", 30_000, 20.0, ts=at(2)))
    recorder.feed(closed_bin(0))
    recorder.feed(closed_bin(1))
    codes = sorted(a.code for a in recorder.alerts(order_id="A") if a.state == "raised")
    assert ["ahead_of_plan", "replan_moved"] == codes


def test_expiry_grace_lets_last_fills_count_as_live() -> None:
    """With a grace period, a fill just after the end arrives before the order expires."""
    recorder = Recorder(Engine(EngineConfig(expiry_grace_seconds=30)))
    recorder.feed(order("S", "X_ZEPH", "buy", 5_000, at(0), at(10), ts=at(-1)))
    recorder.feed(tick(at(0)))
    recorder.feed(tick(at(10)))
    recorder.feed(fill("S", "late", 1_000, 20.0, ts=at(10.2)))
    recorder.feed(tick(at(11)))
    expected = (State.EXPIRED, [])
    assert expected == (
        recorder.engine.state_of("S"),  # type: ignore[attr-defined]
        recorder.alerts("fill_after_close"),
    )


def test_reject_names_the_order_of_the_topic() -> None:
    """An error for a payload on an order topic carries that order id."""
    error = Engine().reject("tracker/fills/X_ZEPH-1", b"{", "not JSON", None)
    expected = ("X_ZEPH-1", "tracker/fills/X_ZEPH-1", "{")
    assert expected == (error.order_id, error.topic, error.payload)


def test_custom_root_names_the_topic_of_engine_errors() -> None:
    """The engine's own errors use the root it was given."""
    engine = Engine(root="desk7")
    error = engine.handle(fill_correction("NOPE", "f1", ts=at(1)))[0]
    assert isinstance(error, ErrorMessage)
    assert "desk7/fills/NOPE" == error.topic


def test_status_is_retained_per_order_in_memory_publisher() -> None:
    """The in-memory publisher keeps the latest status of each order as retained."""
    from tracker.testing import MemoryPublisher

    publisher = MemoryPublisher()
    recorder = Recorder(Engine(), publisher=publisher)
    started(recorder)
    recorder.feed(fill("A", "f1", 500, 20.0, ts=at(1)))
    retained = publisher.retained["tracker/status/A"].json()
    assert (500, "working") == (retained["filled"], retained["state"])
    assert "tracker/targets/A" in publisher.topics()


def test_solver_failure_keeps_previous_plan_and_alerts(
    recorder: Recorder, monkeypatch: pytest.MonkeyPatch
) -> None:
    """If the solver fails, the engine goes on: one critical alert, no new plan version."""
    import tracker.core.engine.planning as engine_module
    from tracker.errors import SolveError

    started(recorder)

    def fail(*_: object, **__: object) -> None:
        raise SolveError("did not converge")

    monkeypatch.setattr(engine_module, "solve_batch", fail)
    monkeypatch.setattr(engine_module, "solve", fail)
    recorder.feed(closed_bin(0))
    alerts = recorder.alerts("replan_failed", "A")
    assert ["critical"] == [a.severity for a in alerts]
    assert 1 == recorder.targets("A")[-1].plan_version
