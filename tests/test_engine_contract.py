"""The engine's side of wire contract v1.1: cancels and halts win, fills are parked, busted and
corrected but never lost, each order message is acknowledged, targets say why, and an order
without a cap gets the stated default."""

from __future__ import annotations

import math
from datetime import UTC, datetime, timedelta

import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from tracker.core.engine import Engine, EngineConfig
from tracker.edge.wire import AckMessage, ErrorMessage, StatusMessage, TargetMessage
from tracker.errors import InputError
from tracker.testing import (
    Recorder,
    cancel,
    control,
    fill,
    fill_correction,
    order,
    tick,
)

OPEN = datetime(2026, 3, 2, 14, 30, tzinfo=UTC)


def at(minutes: float) -> str:
    """ISO time ``minutes`` after the open."""
    return (OPEN + timedelta(minutes=minutes)).isoformat().replace("+00:00", "Z")


def new_order(order_id: str = "A", ts: str | None = None, **extra: object):  # type: ignore[no-untyped-def]
    """A buy of 50,000 X_ZEPH over the whole day, sent before the open, cap 20 %."""
    values: dict[str, object] = {"max_participation": 0.2, **extra}
    return order(order_id, "X_ZEPH", "buy", 50_000, at(0), at(390), ts=ts or at(-30), **values)


def started(config: EngineConfig | None = None, **extra: object) -> Recorder:
    """A recorder whose order A has started (a tick at the open)."""
    recorder = Recorder(Engine(config))
    recorder.feed(new_order(**extra))
    recorder.feed(tick(at(0)))
    return recorder


def codes(outputs: list[object]) -> list[str]:
    """The alert codes among outputs, in order."""
    return [o.code for o in outputs if hasattr(o, "code")]  # type: ignore[attr-defined]


# ------------------------------------------------------------------ cancels and halts win


def test_cancel_naming_another_side_still_cancels_with_a_critical_alert() -> None:
    """A cancel whose side contradicts the order cancels it and raises cancel_mismatch."""
    recorder = started()
    outputs = recorder.feed(cancel("A", ts=at(1), symbol="X_ZEPH", side="sell"))
    alert = recorder.alerts("cancel_mismatch")[0]
    ack = next(o for o in outputs if isinstance(o, AckMessage))
    assert "cancelled" == recorder.engine.state_of("A")  # type: ignore[attr-defined]
    assert ("critical", "accepted") == (alert.severity, ack.result)
    assert "side sell" in str(ack.reason)


def test_cancel_with_an_earlier_ts_still_cancels() -> None:
    """A cancel is not refused for its time: it wins even when stamped before the last amend."""
    recorder = started()
    recorder.feed(order("A", "X_ZEPH", "buy", 40_000, at(0), at(390), ts=at(5), action="amend"))
    recorder.feed(cancel("A", ts=at(2)))
    assert "cancelled" == recorder.engine.state_of("A")  # type: ignore[attr-defined]


def test_cancel_of_an_ended_order_is_acknowledged_with_a_remark() -> None:
    """Cancelling an order already cancelled is accepted and says there was nothing to do."""
    recorder = started()
    recorder.feed(cancel("A", ts=at(1)))
    outputs = recorder.feed(cancel("A", ts=at(2)))
    expected = [("accepted", "the order is already cancelled; nothing to cancel")]
    assert expected == [(o.result, o.reason) for o in outputs if isinstance(o, AckMessage)]


def test_halt_with_an_earlier_ts_is_honoured() -> None:
    """A halt stamped before the previous control message still halts."""
    recorder = started()
    recorder.feed(control("resume", ts=at(5)))
    recorder.feed(control("halt", ts=at(3), order_id="A"))
    assert "halted" == recorder.engine.state_of("A")  # type: ignore[attr-defined]


# ------------------------------------------------------------------ acks


def test_every_order_message_gets_one_ack() -> None:
    """new, amend and cancel are each acknowledged once; a refused new says why."""
    recorder = started()
    recorder.feed(new_order())  # the same id again: refused
    recorder.feed(order("A", "X_ZEPH", "buy", 40_000, at(0), at(390), ts=at(1), action="amend"))
    recorder.feed(cancel("A", ts=at(2)))
    acks = [(a.action, a.result) for a in recorder.acks("A")]
    expected = [
        ("new", "accepted"),
        ("new", "rejected"),
        ("amend", "accepted"),
        ("cancel", "accepted"),
    ]
    assert expected == acks
    assert "already exists" in str(recorder.acks("A")[1].reason)


# ------------------------------------------------------------------ fills


def test_fill_before_its_order_is_counted_when_the_order_arrives() -> None:
    """A parked fill is applied when its order comes, in arrival order."""
    recorder = Recorder(Engine())
    recorder.feed(fill("A", "f1", 300, 20.0, ts=at(-31)))
    recorder.feed(fill("A", "f2", 200, 21.0, ts=at(-30.5)))
    recorder.feed(new_order())
    assert 500 == recorder.engine.filled("A")  # type: ignore[attr-defined]
    assert 2 == len(recorder.alerts("fill_parked"))


def test_parked_fill_whose_order_never_comes_is_unassigned_not_lost() -> None:
    """After the parking window a critical alert and the summary keep the shares."""
    recorder = Recorder(Engine(EngineConfig(fill_parking_seconds=60.0)))
    recorder.feed(fill("NOPE", "f1", 300, 20.0, ts=at(0)))
    recorder.feed(tick(at(0.5)))
    outputs = recorder.feed(tick(at(1.5)))
    unassigned = recorder.engine.summary()["unassigned_fills"]  # type: ignore[attr-defined]
    assert ["fill_unassigned"] == codes(outputs)
    assert [("f1", 300, "order never came")] == [
        (row["fill_id"], row["quantity"], row["why"]) for row in unassigned
    ]


def test_parking_is_bounded_in_count() -> None:
    """Past fill_parking_max waiting fills, the oldest is given up first."""
    recorder = Recorder(Engine(EngineConfig(fill_parking_max=1)))
    recorder.feed(fill("X", "f1", 100, 20.0, ts=at(0)))
    outputs = recorder.feed(fill("Y", "f2", 100, 20.0, ts=at(0.1)))
    assert ["fill_parked", "fill_unassigned"] == sorted(codes(outputs))
    assert "X" == recorder.alerts("fill_unassigned")[0].order_id


def test_fill_resent_with_a_new_ts_counts_once_without_alert() -> None:
    """Same id, shares, price and side with another ts is a redelivery."""
    recorder = started()
    recorder.feed(fill("A", "f1", 500, 20.0, ts=at(1)))
    outputs = recorder.feed(fill("A", "f1", 500, 20.0, ts=at(2)))
    assert ([], 500) == (outputs, recorder.engine.filled("A"))  # type: ignore[attr-defined]


def test_fill_id_reused_with_other_shares_points_to_a_correction() -> None:
    """A conflicting fill is refused; the reason says how to change a fill."""
    recorder = started()
    recorder.feed(fill("A", "f1", 500, 20.0, ts=at(1)))
    outputs = recorder.feed(fill("A", "f1", 600, 20.0, ts=at(2)))
    error = next(o for o in outputs if isinstance(o, ErrorMessage))
    assert "fill_correction" in error.reason
    assert 500 == recorder.engine.filled("A")  # type: ignore[attr-defined]


def test_bust_takes_a_fill_back_and_replans() -> None:
    """A bust recomputes filled shares and average price, alerts, and re-plans the order."""
    recorder = started()
    recorder.feed(fill("A", "f1", 1_000, 20.0, ts=at(1)))
    recorder.feed(fill("A", "f2", 500, 21.0, ts=at(2)))
    outputs = recorder.feed(fill_correction("A", "f1", ts=at(3)))
    status = [o for o in outputs if isinstance(o, StatusMessage)][-1]
    target = [o for o in outputs if isinstance(o, TargetMessage)][-1]
    assert ["fill_busted"] == codes(outputs)
    assert (500, 21.0, 49_500) == (status.filled, status.average_price, target.remaining)


def test_busted_fill_sent_again_is_not_counted_again() -> None:
    """The original fill redelivered after its bust changes nothing."""
    recorder = started()
    recorder.feed(fill("A", "f1", 1_000, 20.0, ts=at(1)))
    recorder.feed(fill_correction("A", "f1", ts=at(2)))
    recorder.feed(fill("A", "f1", 1_000, 20.0, ts=at(3)))
    assert 0 == recorder.engine.filled("A")  # type: ignore[attr-defined]


def test_correction_changes_shares_and_price() -> None:
    """A correction recomputes inventory and average price (exact sum), with an alert."""
    recorder = started()
    recorder.feed(fill("A", "f1", 1_000, 20.0, ts=at(1)))
    recorder.feed(fill("A", "f2", 1_000, 20.3, ts=at(2)))
    outputs = recorder.feed(fill_correction("A", "f1", ts=at(3), quantity=800, price=20.1))
    status = [o for o in outputs if isinstance(o, StatusMessage)][-1]
    expected_average = math.fsum([800 * 20.1, 1_000 * 20.3]) / 1_800
    assert ["fill_corrected"] == codes(outputs)
    assert (1_800, expected_average) == (status.filled, status.average_price)


def test_bust_of_an_unknown_fill_is_refused_naming_it() -> None:
    """A bust must name a fill the order has."""
    recorder = started()
    outputs = recorder.feed(fill_correction("A", "nope", ts=at(1)))
    assert "fill_id" in outputs[0].reason  # type: ignore[union-attr]


# ------------------------------------------------------------------ targets and the cap


def test_target_carries_state_reason_and_the_next_bins_of_the_plan() -> None:
    """The first target: working, a reason, and the plan's next three bins after it."""
    recorder = started()
    target = recorder.targets("A")[-1]
    starts = [row["bin_start"] for row in target.next_bins]
    expected = [at(5), at(10), at(15)]
    assert "working" == target.state
    assert target.reason in ("on_plan", "capped")
    assert expected == starts
    assert all(row["quantity"] >= 0 for row in target.next_bins)


def test_halt_target_says_halted() -> None:
    """A halt's zero target gives the reason."""
    recorder = started()
    recorder.feed(control("halt", ts=at(1), order_id="A"))
    target = recorder.targets("A")[-1]
    assert (0, "halted", "halted", ()) == (
        target.quantity,
        target.state,
        target.reason,
        target.next_bins,
    )


def test_completion_publishes_a_final_zero_target() -> None:
    """Filling the order ends it with one zero target whose reason is done."""
    recorder = started()
    recorder.feed(fill("A", "f1", 50_000, 20.0, ts=at(1)))
    final = recorder.targets("A")[-1]
    assert (0, "done", "done") == (final.quantity, final.state, final.reason)


def test_expiry_publishes_a_final_zero_target() -> None:
    """An order whose end passes gets one last zero target saying expired."""
    recorder = started()
    recorder.feed(tick(at(391)))
    final = recorder.targets("A")[-1]
    assert (0, "expired") == (final.quantity, final.reason)


def test_order_without_a_cap_gets_the_default_cap_in_its_status() -> None:
    """No max_participation: the configured default (0.25) applies and the status says so."""
    recorder = Recorder(Engine())
    recorder.feed(order("B", "X_ZEPH", "buy", 50_000, at(0), at(390), ts=at(-30)))
    status = recorder.statuses("B")[-1]
    assert (0.25, "default") == (status.max_participation, status.cap_source)


@pytest.mark.parametrize("bad", [0.0, 1.5, "a"], ids=["zero", "above-one", "text"])
def test_default_cap_must_be_a_fraction(bad: object) -> None:
    """default_max_participation outside (0, 1] is refused by name."""
    with pytest.raises(InputError, match="default_max_participation"):
        EngineConfig.from_mapping({"default_max_participation": bad})


# ------------------------------------------------------------------ interleavings (property)

FILLS = [("f1", 1_000, 20.01), ("f2", 700, 20.07), ("f3", 1_300, 19.98), ("f4", 250, 20.11)]


@settings(max_examples=60, deadline=None)
@given(
    arrival=st.permutations(["order", *[name for name, _, _ in FILLS]]),
    resent=st.lists(st.sampled_from([name for name, _, _ in FILLS]), max_size=3),
)
def test_any_interleaving_of_fills_and_their_order_gives_the_same_result(
    arrival: list[str], resent: list[str]
) -> None:
    """Whatever the order of arrival (within the parking window), and with fills re-sent under
    a new ts, the filled shares and the average price are the same."""
    by_name = {name: (quantity, price) for name, quantity, price in FILLS}
    engine = Engine()
    sequence = [*arrival, *resent]
    for position, name in enumerate(sequence):
        ts = at(-30 + position / 60)  # one second apart: well within the parking window
        if name == "order":
            engine.handle(new_order(ts=ts))
        else:
            quantity, price = by_name[name]
            engine.handle(fill("A", name, quantity, price, ts=ts))
    (row,) = engine.summary()["orders"]
    expected_filled = sum(quantity for _, quantity, _ in FILLS)
    expected_average = math.fsum(q * p for _, q, p in FILLS) / expected_filled
    assert expected_filled == row["filled"]
    # The summary rounds to 6 decimals; sums in another order differ only in the last bits.
    assert round(expected_average, 6) == row["average_price"]


def test_amend_may_echo_the_start_but_not_change_it() -> None:
    """An amend repeating the order's start is applied; one with another start is refused."""
    recorder = started()
    same = order("A", "X_ZEPH", "buy", 40_000, at(0), at(390), ts=at(1), action="amend")
    other = order("A", "X_ZEPH", "buy", 30_000, at(5), at(390), ts=at(2), action="amend")
    recorder.feed(same)
    recorder.feed(other)
    results = [(a.action, a.result) for a in recorder.acks("A")[1:]]
    assert [("amend", "accepted"), ("amend", "rejected")] == results
    assert "start" in str(recorder.acks("A")[2].reason)
