"""Targets a router can scale, and the fill ratio the engine learns from its targets.

Symbols, prices and volumes are invented test values (a made-up venue, Harbour Lane Exchange,
X_HLX), on the default session (09:30-16:00 America/New_York, 5-minute bins: common practice);
on 2026-03-02 the open is 14:30 UTC.
"""

from __future__ import annotations

import math
from datetime import UTC, datetime, timedelta

import pytest

from tracker.core.engine import Engine
from tracker.core.engine.learning import PRIOR_BINS, FillRatio, WorkedBin, fill_ratio, learn
from tracker.core.engine.planning import CATCH_UP_BINS, LAST_BIN_CAP, LOW_DAY_SDS, working_rate
from tracker.core.forecast import ObservedBin, forecast
from tracker.core.profiles import default_profile
from tracker.edge.wire import TargetMessage
from tracker.testing import Recorder, bin_message, fill, order, tick

OPEN = datetime(2026, 3, 2, 14, 30, tzinfo=UTC)
BIN = timedelta(minutes=5)


def _at(minutes: float) -> str:
    return (OPEN + timedelta(minutes=minutes)).isoformat().replace("+00:00", "Z")


def _started(quantity: int, max_participation: float = 0.2) -> Recorder:
    """A recorder whose engine has a buy order over the whole day, started at the open."""
    recorder = Recorder(Engine())
    recorder.feed(
        order(
            "A",
            "X_ZEPH",
            "buy",
            quantity,
            _at(0),
            _at(390),
            ts=_at(-30),
            max_participation=max_participation,
        )
    )
    recorder.feed(tick(_at(0)))
    return recorder


def _targets(recorder: Recorder) -> list[TargetMessage]:
    return [m for m in recorder.outputs if isinstance(m, TargetMessage)]


def test_a_target_states_its_shares_as_a_rate_of_the_forecast_volume() -> None:
    """participation is quantity / the bin's forecast volume and max_participation the cap, so
    a router that applies the rate to the forecast volume gets the target's shares back."""
    target = _targets(_started(50_000))[-1]
    volume = float(forecast(default_profile("X_ZEPH"), {}).volume[0])
    assert target.participation == pytest.approx(target.quantity / volume)
    assert 0.2 == target.max_participation
    assert target.quantity == round(target.participation * volume)


def test_a_plan_that_cannot_complete_targets_the_cap() -> None:
    """When the caps cannot carry the order (capped_shortfall), the target is the cap: rate and
    shares (the most the participation limit allows, common practice)."""
    target = _targets(_started(5_000_000))[-1]
    assert (target.max_participation, target.max_quantity) == (
        target.participation,
        target.quantity,
    )


def test_an_order_that_could_not_complete_on_a_low_day_targets_the_cap_after_the_first_bin() -> (
    None
):
    """An order the caps carry at the forecast volume, but not if the bins after the next traded
    LOW_DAY_SDS of the scale's sd below the forecast: at the open (nothing seen) its target is its
    plan's; once the first bin is seen (at its forecast volume) the target is the cap."""
    profile = default_profile("X_ZEPH")
    first = float(profile.expected_volume[0])
    seen = forecast(profile, {0: ObservedBin(first)})
    caps = 0.2 * seen.volume[1:]
    caps[-1] *= LAST_BIN_CAP
    low = math.exp(-LOW_DAY_SDS * seen.volume_scale_sd)
    short = float(caps[0]) + low * float(caps[1:].sum())  # what a low day carries after bin 0
    quantity = round(short + 0.2 * first) + 1_000  # short of it whatever bin 0 fills
    assert quantity < 0.2 * first + float(caps.sum())  # the plan at the forecast completes
    recorder = _started(quantity)
    opening = _targets(recorder)[-1]
    assert opening.max_quantity is not None and opening.quantity < opening.max_quantity
    done = round((opening.participation or 0.0) * round(first))  # filled in full
    when = (OPEN + BIN - timedelta(seconds=1)).isoformat().replace("+00:00", "Z")
    recorder.feed(fill("A", "F0", done, 20.0, ts=when))
    recorder.feed(bin_message("X_ZEPH", OPEN, OPEN + BIN, volume=round(first), price=20.0))
    target = _targets(recorder)[-1]
    assert target.max_quantity == target.quantity
    assert 0.2 == pytest.approx(target.participation, rel=1e-4)  # fill ratio 1 but for rounding


def test_the_order_s_last_bin_targets_the_cap() -> None:
    """In the order's last bin the rate is the cap: everything left, as far as real volume
    allows."""
    recorder = Recorder(Engine())
    recorder.feed(
        order("A", "X_ZEPH", "buy", 2_000, _at(385), _at(390), ts=_at(370), max_participation=0.2)
    )
    for index in range(77):
        start = OPEN + index * BIN
        recorder.feed(bin_message("X_ZEPH", start, start + BIN, volume=12_000, price=20.0))
    last = _targets(recorder)[-1]
    assert (0.2, 2_000) == (last.participation, last.quantity)


def test_the_fill_ratio_is_shrunk_toward_the_prior_by_bins_of_evidence() -> None:
    """With m bins filled at 0.8 of their targets and the prior 1, the estimate is
    w 0.8 + (1 - w) with w = m / (m + m0) (the posterior mean of a normal prior worth m0 bins;
    from memory)."""
    evidence = FillRatio()
    for _ in range(4):
        evidence = evidence.add(800.0, 1_000.0)
    weight = 4 / (4 + PRIOR_BINS)
    assert weight * 0.8 + (1 - weight) == pytest.approx(evidence.estimate(1.0))


def test_an_order_without_evidence_takes_its_symbol_s_ratio() -> None:
    """An order with no bins yet is sized with its symbol's pooled ratio (itself shrunk)."""
    symbol = FillRatio(filled=7_000.0, targeted=10_000.0, bins=12)
    expected = 12 / (12 + PRIOR_BINS) * 0.7 + (1 - 12 / (12 + PRIOR_BINS))
    assert expected == pytest.approx(fill_ratio(FillRatio(), symbol))


def test_a_bin_is_judged_on_its_real_volume() -> None:
    """A target of 10 % with a 20 % cap in a bin that traded 30,000 shares asked for 3,000;
    3,000 filled in it is a full fill."""
    worked = WorkedBin(
        index=5,
        quantity=2_000,
        participation=0.1,
        max_participation=0.2,
        remaining=50_000,
        filled_at=1_000,
    )
    order_ratio, _ = learn(FillRatio(), FillRatio(), worked, 30_000.0, 4_000)
    assert (3_000.0, 3_000.0, 1) == (order_ratio.filled, order_ratio.targeted, order_ratio.bins)


def test_a_bin_filled_to_the_cap_is_not_counted() -> None:
    """Fills that reached the cap of the real volume say the cap stopped them, not the router:
    the bin is censored and left out of the ratio."""
    worked = WorkedBin(
        index=5,
        quantity=8_000,
        participation=0.3,
        max_participation=0.2,
        remaining=50_000,
        filled_at=0,
    )
    order_ratio, _ = learn(FillRatio(), FillRatio(), worked, 30_000.0, 6_000)
    assert FillRatio() == order_ratio


@pytest.mark.parametrize(
    ("volume", "filled", "judged_against"),
    [(10_000.0, 1_600, 2_000.0), (12_000.0, 2_300, 3_000.0)],
    ids=["router-reading-the-shares", "router-reading-the-rate"],
)
def test_a_bin_worked_above_the_cap_is_judged_by_how_the_router_read_it(
    volume: float, filled: int, judged_against: float
) -> None:
    """A target of 2,000 shares worked at 0.25 with a 0.2 cap: fills within the 2,000 shares are
    judged against the shares (a router reading them never fills more; against the rate it would
    seem to fill ever less as the rate grows), fills beyond them against the rate of the real
    volume."""
    worked = WorkedBin(
        index=5,
        quantity=2_000,
        participation=0.25,
        max_participation=0.2,
        remaining=50_000,
        filled_at=0,
    )
    order_ratio, _ = learn(FillRatio(), FillRatio(), worked, volume, filled)
    assert (float(filled), judged_against, 1) == (
        order_ratio.filled,
        order_ratio.targeted,
        order_ratio.bins,
    )


def test_targets_grow_when_fills_fall_short() -> None:
    """An order whose targets fill at 70 % asks for more than the same order filled in full at
    the same point of the plan (planned fills over the fill ratio)."""
    rates = []
    for share in (1.0, 0.7):
        recorder = _started(60_000)
        for index in range(12):
            target = _targets(recorder)[-1]
            start = OPEN + index * BIN
            done = math.floor(share * target.quantity)
            if done:
                when = (start + BIN - timedelta(seconds=1)).isoformat().replace("+00:00", "Z")
                recorder.feed(fill("A", f"F{index}", done, 20.0, ts=when))
            volume = round(target.quantity / target.participation) if target.participation else 0
            recorder.feed(bin_message("X_ZEPH", start, start + BIN, volume=volume, price=20.0))
        last = _targets(recorder)[-1]
        rates.append(last.quantity / last.remaining)
    assert rates[1] > rates[0] * 1.1


def test_an_order_behind_its_baseline_catches_up_over_a_few_bins() -> None:
    """Six bins at half the forecast volume, each target's rate filled in full on the real
    volume (fill ratio 1): the order is behind its baseline, and the next target is at least the
    baseline's shares for the bin plus a CATCH_UP_BINS th of what the order is behind (more than
    the re-plan alone asks), not all of it."""
    engine = Engine()
    recorder = Recorder(engine)
    recorder.feed(
        order("A", "X_ZEPH", "buy", 20_000, _at(0), _at(390), ts=_at(-30), max_participation=0.2)
    )
    recorder.feed(tick(_at(0)))
    baseline = engine.plans("A")[-1]
    volume = forecast(default_profile("X_ZEPH"), {}).volume
    filled = 0
    for index in range(6):
        target = _targets(recorder)[-1]
        start = OPEN + index * BIN
        real = round(0.5 * volume[index])
        done = round((target.participation or 0.0) * real)
        when = (start + BIN - timedelta(seconds=1)).isoformat().replace("+00:00", "Z")
        recorder.feed(fill("A", f"F{index}", done, 20.0, ts=when))
        filled += done
        recorder.feed(bin_message("X_ZEPH", start, start + BIN, volume=real, price=20.0))
    target = _targets(recorder)[-1]
    before = baseline.filled_at + float(baseline.cumulative[5 - baseline.first_bin])
    planned = baseline.filled_at + float(baseline.cumulative[6 - baseline.first_bin]) - before
    behind = before - filled
    floor = planned + behind / CATCH_UP_BINS
    replan = engine.plans("A")[0]  # the latest plan first, then the baseline
    assert 6 == replan.first_bin
    assert float(replan.cumulative[0]) < floor  # the re-plan alone would spread the gap
    assert target.max_quantity is not None and floor < target.max_quantity
    assert math.floor(floor) <= target.quantity < planned + behind


def test_a_router_that_fills_part_of_its_targets_works_above_the_cap_at_the_cap() -> None:
    """With the order's fill ratio r below 1, a target at the cap asks for the cap's shares
    (quantity = max_quantity, the contract's bound) and works the cap for a ratio of r^2, so
    that a router filling r of what it works, less in its bad bins, still fills the cap; it
    executes at most the cap all the same."""
    engine = Engine()
    recorder = Recorder(engine)
    recorder.feed(
        order("A", "X_ZEPH", "buy", 5_000_000, _at(0), _at(390), ts=_at(-30), max_participation=0.2)
    )
    recorder.feed(tick(_at(0)))  # the caps cannot carry the order: every target is the cap
    for index in range(8):
        target = _targets(recorder)[-1]
        start = OPEN + index * BIN
        volume = round(target.max_quantity / 0.2) if target.max_quantity else 10_000
        done = math.floor(0.6 * (target.participation or 0.0) * volume)
        when = (start + BIN - timedelta(seconds=1)).isoformat().replace("+00:00", "Z")
        recorder.feed(fill("A", f"F{index}", done, 20.0, ts=when))
        recorder.feed(bin_message("X_ZEPH", start, start + BIN, volume=volume, price=20.0))
    target = _targets(recorder)[-1]
    state = engine._state
    ratio = fill_ratio(state.orders["A"].fill_ratio, state.symbols["X_ZEPH"].fill_ratio)
    assert 0.6 < ratio < 1.0  # learnt from bins filled at 0.6, shrunk toward 1
    assert target.quantity == target.max_quantity
    assert target.participation == pytest.approx(working_rate(0.2, ratio * ratio))
    assert target.participation > 0.2 / ratio


@pytest.mark.parametrize(
    ("cap", "ratio", "expected"),
    [(0.2, 1.0, 0.2), (0.2, 0.8, 0.25), (0.5, 0.25, 1.0), (0.2, 1.0 / 3.0, 0.6)],
    ids=["full-fills", "eighty-percent", "never-above-the-volume", "a-third"],
)
def test_the_working_rate_is_the_cap_over_the_fill_ratio(
    cap: float, ratio: float, expected: float
) -> None:
    """cap / r, at most 1 (the whole volume) and never below the cap."""
    assert expected == pytest.approx(working_rate(cap, ratio))


def test_the_plan_keeps_half_the_cap_of_the_last_bin_in_reserve() -> None:
    """An order that needs more than the caps of its last two bins minus half the last one
    plans LAST_BIN_CAP of the last bin's cap there, and its target in the bin before is the cap
    (capped shortfall against the reserve); the completion alert, judged on the full caps, stays
    quiet."""
    recorder = Recorder(Engine())
    seen = {index: ObservedBin(12_000.0) for index in range(76)}
    ahead = forecast(default_profile("X_ZEPH"), seen).volume[76:]  # what the engine forecasts
    quantity = round(0.2 * (ahead[0] + 0.75 * ahead[1]))  # feasible, not with the reserve
    recorder.feed(
        order(
            "A", "X_ZEPH", "buy", quantity, _at(380), _at(390), ts=_at(370), max_participation=0.2
        )
    )
    for index in range(76):
        start = OPEN + index * BIN
        recorder.feed(bin_message("X_ZEPH", start, start + BIN, volume=12_000, price=20.0))
    target = _targets(recorder)[-1]
    codes = {getattr(m, "code", None) for m in recorder.outputs}
    assert LAST_BIN_CAP == 0.5
    assert (target.max_participation, target.max_quantity) == (
        target.participation,
        target.quantity,
    )
    assert "completion_infeasible" not in codes
