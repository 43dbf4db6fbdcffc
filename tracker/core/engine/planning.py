"""Planning: the horizon still ahead of an order, its problem, the solve, and applying a re-plan.

An event asks for re-plans (:attr:`Step.to_plan <tracker.core.engine.step.Step.to_plan>`);
:func:`plan_jobs` turns them into :class:`~tracker.core.engine.step.ReplanJob` values with their
remaining-horizon problems, :func:`solve_problems` solves all the problems of one or several
events in one :func:`~tracker.core.solve.solve_batch` call (a problem gets the same answer, bit for
bit, alone or in any batch), and :func:`apply_replan` puts each schedule in place and says what
changed: the next bin's target, the status and the alerts.

Targets a router can scale: each target carries, besides its shares at the forecast volume, the
``participation`` rate they stand for (shares / the bin's forecast volume) and the cap as a rate
(``max_participation``), so that a router applies them to the volume that really trades. In the
order's last bin, when the plan cannot complete under the caps (``capped_shortfall``), and, once
the day has shown a bin, when it could not complete on a day :data:`LOW_DAY_SDS` standard
deviations of the volume scale below the forecast (:func:`short_on_low_day`), the target is the
cap: everything the cap of the real volume allows, its shares ``max_quantity`` and its rate the
cap worked for a fill ratio of ``r^2`` (:func:`working_rate`): a router filling ``r`` of its
targets on average fills less in its bad bins (70-100 %, 85 % on average, is as wide as it is
short of 1), and there every share short of the cap is lost for good.

A target is never less than the baseline plan's shares for its bin plus a :data:`CATCH_UP_BINS`
th of what the order is behind the baseline when the bin starts: a shortfall is caught up over a
few bins, not spread over the rest of the day (where it would add timing risk and leave too
little room at the close) nor dumped into the next bin (the baseline's way, which pays more
impact).

Plans that expect to fall short: before an order is re-planned at a bin close, the bin's target is
judged against what filled (:mod:`tracker.core.engine.learning`); with the order's fill ratio
``r`` the target asks for the planned fills over ``r``. Its shares (``quantity``) never exceed
the cap (``max_quantity``); its rate may: a router that fills ``r`` of what it works has to work
up to ``cap / r`` (:func:`working_rate`) to get the cap's fills, and it executes never more than
the cap of the real volume. So the plan counts on the full cap for its fills.

The plan keeps a reserve at the close: it counts on :data:`LAST_BIN_CAP` of the cap in the order's
last bin, where no later bin could absorb a close that trades less than forecast; the last bin's
target is the cap all the same. The completion alert judges the full caps.

When the last price is beyond an order's limit, the next bin's target is zero and the plan is
re-solved over the bins after it. A re-plan that cannot be made (the solver fails, or a problem
cannot be built) leaves the previous plan and target in place and raises ``replan_failed``.
"""

from __future__ import annotations

import math
from datetime import datetime

import numpy as np

from tracker.core import alerts as rules
from tracker.core.engine import learning, outputs
from tracker.core.engine.state import EngineState, OrderState, Plan, SymbolState
from tracker.core.engine.step import ReplanJob, Step
from tracker.core.forecast import Forecast
from tracker.core.formulation import build_problem, own_permanent_impact, timing_cost_sd
from tracker.core.lifecycle import State
from tracker.core.messages import TargetMessage
from tracker.core.problem import Problem
from tracker.core.solve import CAPPED_SHORTFALL, Schedule, solve, solve_batch
from tracker.errors import InputError, TrackerError

#: When no price is known yet (no bin, no arrival price, no limit), the plan assumes the price at
#: which the profile's median spread is this many basis points (a liquid stock's quoted spread is
#: a few basis points: common practice). Only the plan's shape depends on it, and only until the
#: first bin of the symbol arrives.
ASSUMED_SPREAD_BPS = 5.0

#: The target of the bin ahead is at least the baseline's shares for the bin plus what the order
#: is behind the baseline divided by this: a shortfall is caught up over about this many bins.
#: A re-plan from the realized inventory alone spreads a shortfall over the rest of the day:
#: cheaper on average, but the order trails the baseline, which costs on the days the price runs
#: away (95 % CVaR) and leaves too little room when the volume falls short late. Measured with
#: ``tracker evaluate`` (100 and 300 days, seed 1, five scenarios; README): half the baseline's
#: catch-up target as the floor (the earlier rule) kept a mean gain but a CVaR 1.8-2.7 bps worse on
#: half-volume and partial-fill days; the full catch-up bettered the CVaR and lost the mean gain
#: (+0.11 +- 0.39 bps on normal days, 100 days); four bins gives a mean at or below the
#: baseline's in every scenario and a CVaR lower by 1.4-2.5 bps, tied on half-volume days.
CATCH_UP_BINS = 4

#: From the first bin of the day on, the target is also the cap when the order could not complete
#: if the bins after the one ahead traded at a volume scale this many of the forecast's standard
#: deviations (``volume_scale_sd``) below its own (:func:`short_on_low_day`). A target is a rate of
#: the real volume: on a day that runs below its profile the engine trades fewer shares than the
#: plan at the forecast volume, and once the cap binds that gap is never caught up; the point
#: forecast sees the day is short only when it is sure of it. Measured with ``tracker evaluate``
#: (300 days, seed 1, engine / opening plan, paired mean difference): without it, 144 / 143 days
#: with more than 1 % left and a 95 % CVaR of 259.40 / 259.39 on half-volume days; with 2.5 sd,
#: 143 / 143 and 258.65 / 259.39, the mean gain on those days -0.34 bps (from -0.40), +0.03 bps on
#: normal days (from -0.07), -0.16 with double impact (from -0.32). Judged from the open too (on
#: the prior's spread), 1.5 and 2 sd still left 144 days and 2.5 sd sent every large order to the
#: cap at the open and lost the mean with double impact (+0.19 +- 0.30). Seeds 2 and 3 (half-volume
#: days): 147 / 144 and 137 / 133 days without it, 146 / 144 and 135 / 133 with it -- it narrows
#: the gap but does not close it there (most of the gap is the first bin, traded blind).
LOW_DAY_SDS = 2.5

#: Share of the cap the plan counts on in the order's last bin (:func:`build_problem
#: <tracker.core.formulation.build_problem>`'s ``last_bin_cap``): the close is the plan's last
#: resort, so it keeps half of it in reserve. Measured (300 days, seed 1): on a day whose last two
#: bins traded half their forecast, a plan that counted on their full cap left 1.1 % of the order.
LAST_BIN_CAP = 0.5


def horizon(step: Step, order: OrderState, sym: SymbolState, now: datetime) -> tuple[int, float]:
    """The first bin still ahead for ``order`` at ``now`` and the fraction of it left."""
    session = sym.profile.session
    moment = max(order.start, now)
    n = session.n_bins
    key = (sym.name, moment)
    cached = step.offsets.get(key)
    if cached is None:  # one timezone conversion per symbol and time, not per order
        cached = (sym.local_day(moment), session.bin_offset(moment))
        step.offsets[key] = cached
    day, offset = cached
    if day != order.day:
        return n, 1.0
    if offset <= 0:
        first, fraction = 0, 1.0
    elif offset >= n:
        return n, 1.0
    else:
        first = math.floor(offset)
        fraction = 1.0 - (offset - first)
        if fraction < 1e-9:
            first, fraction = first + 1, 1.0
    if sym.day == order.day and sym.last_index is not None and sym.last_index + 1 > first:
        first, fraction = sym.last_index + 1, 1.0
    return first, fraction


def price(order: OrderState, sym: SymbolState) -> float:
    """The price to plan with: the last close, else the arrival price, else the limit, else a
    price made up from the profile's spread (:data:`ASSUMED_SPREAD_BPS`)."""
    if sym.last_close is not None:
        return sym.last_close
    for candidate in (order.arrival_price, order.limit_price):
        if candidate is not None:
            return candidate
    spread = float(np.median(sym.profile.spread))
    return spread / (ASSUMED_SPREAD_BPS * 1e-4)


def beyond_limit(order: OrderState, sym: SymbolState) -> bool:
    """Whether the last price is beyond the order's limit (a buy above, a sell below)."""
    if order.limit_price is None or sym.last_close is None:
        return False
    if order.side == "buy":
        return sym.last_close > order.limit_price
    return sym.last_close < order.limit_price


def zero_target(state: EngineState, step: Step, order: OrderState, ts: datetime) -> TargetMessage:
    """A target of nothing for the bin now ahead (a halt, a cancel, the order done)."""
    sym = state.symbols[order.symbol]
    first, _ = horizon(step, order, sym, state.now(ts))
    step.undo.order(order)
    order.worked = None  # nothing to work: the bin teaches nothing about fills
    return outputs.target(
        state,
        order,
        first,
        0,
        None,
        ts,
        participation=0.0,
        max_participation=order.max_participation,
    )


def learn_fills(step: Step, order: OrderState, sym: SymbolState) -> None:
    """Count the bin that just closed toward the order's fill ratio, if it had a target for it
    (:mod:`tracker.core.engine.learning`); the target is then used up."""
    worked = order.worked
    index = sym.last_index
    if worked is None or index is None or sym.day != order.day or worked.index != index:
        return
    observed = sym.observed.get(index)
    step.undo.order(order)
    order.worked = None
    if observed is None:
        return
    step.undo.symbol(sym)
    order.fill_ratio, sym.fill_ratio = learning.learn(
        order.fill_ratio, sym.fill_ratio, worked, observed.volume, order.filled
    )


def fill_ratio(order: OrderState, sym: SymbolState) -> float:
    """The order's fill ratio (shrunk toward its symbol's; :mod:`tracker.core.engine.learning`)."""
    return learning.fill_ratio(order.fill_ratio, sym.fill_ratio)


def plan_jobs(state: EngineState, step: Step) -> list[ReplanJob]:
    """The re-plans the event asks for (working orders with shares left), problems built."""
    jobs: list[ReplanJob] = []
    for order_id in sorted(step.to_plan):
        order = state.orders[order_id]
        if order.life.state is not State.WORKING or order.remaining <= 0:
            continue
        sym = state.symbols[order.symbol]
        if sym.day is None or sym.day < order.day:
            step.undo.symbol(sym)
            sym.start_day(order.day)
        learn_fills(step, order, sym)
        now = state.now(step.ts)
        if sym.stale_at is None:  # watch the feed from when an order works, in session
            step.undo.symbol(sym)
            opening = sym.day_bins[0][0] if sym.day_bins else now
            state.watch(sym, max(now, opening, sym.last_bin_end or now))
        first, fraction = horizon(step, order, sym, now)
        blocked = beyond_limit(order, sym)
        plan_from = first + 1 if blocked else first
        problem: Problem | None = None
        if plan_from < order.end_bin:
            try:
                problem = build_problem(
                    quantity=float(order.remaining),
                    first_bin=plan_from,
                    end_bin=order.end_bin,
                    forecast=sym.forecast,
                    preferences=order.prefs,
                    max_participation=order.max_participation,
                    price=price(order, sym),
                    first_fraction=fraction if plan_from == first else 1.0,
                    reference_quantity=float(order.quantity),
                    last_bin_cap=LAST_BIN_CAP,
                )
            except InputError as exc:  # never expected: the inputs were checked at the edge
                step.emit(outputs.replan_failed(order, step.ts, str(exc)))
                continue
        jobs.append(ReplanJob(order, step.to_plan[order_id], first, fraction, blocked, problem))
    return jobs


def solve_problems(problems: list[Problem | None]) -> list[Schedule | None]:
    """Solve the problems in one batch (``None`` in, ``None`` out); a problem the solver cannot
    solve gets ``None`` and the others their schedules."""
    real = [p for p in problems if p is not None]
    try:
        solved: list[Schedule | None] = list(solve_batch(real)) if real else []
    except (TrackerError, ArithmeticError, ValueError):
        solved = []
        for problem in real:  # find the one that fails; keep the others
            try:
                solved.append(solve(problem))
            except (TrackerError, ArithmeticError, ValueError):
                solved.append(None)
    iterator = iter(solved)
    return [next(iterator) if p is not None else None for p in problems]


def _plan(job: ReplanJob, schedule: Schedule | None, plan_price: float, sym: SymbolState) -> Plan:
    """The plan a schedule makes (no schedule: nothing can trade, everything is shortfall).

    Its expected cost is spread, fees, temporary impact and the order's own permanent impact
    (:func:`~tracker.core.formulation.own_permanent_impact`); the risk penalty is kept apart, and
    the cost's standard deviation is the timing risk of the schedule
    (:func:`~tracker.core.formulation.timing_cost_sd`).
    """
    order = job.order
    if schedule is not None:
        trajectory = schedule.trajectory
        cumulative = trajectory[0] - trajectory[1:]  # cumulative trades, one array operation
        cost = schedule.cost
        trades = schedule.trades
        first_bin = job.first + 1 if job.blocked else job.first
        volatility = sym.forecast.volatility
        permanent = own_permanent_impact(
            trades,
            daily_volatility=math.sqrt(float(np.dot(volatility, volatility))),
            price=plan_price,
            average_daily_volume=sym.forecast.average_daily_volume,
        )
        return Plan(
            version=order.plan_version + 1,
            first_bin=job.first + 1 if job.blocked else job.first,
            cumulative=cumulative,
            filled_at=order.filled,
            quantity=float(order.remaining),
            status=schedule.status,
            shortfall=_full_cap_shortfall(job, schedule),
            expected_cost=float(
                cost.get("fixed_cost", 0.0)
                + cost.get("temporary_impact", 0.0)
                + cost.get("permanent_impact", 0.0)
                + permanent
            ),
            price=plan_price,
            cost_sd=timing_cost_sd(
                trades, volatility[first_bin : first_bin + trades.size], plan_price
            ),
            risk_penalty=float(
                cost.get("inventory_penalty", 0.0) + cost.get("terminal_penalty", 0.0)
            ),
        )
    return Plan(  # blocked on its last bin, or no bin left: nothing can trade
        version=order.plan_version + 1,
        first_bin=job.first,
        cumulative=np.zeros(0),
        filled_at=order.filled,
        quantity=float(order.remaining),
        status=CAPPED_SHORTFALL,
        shortfall=float(order.remaining),
        expected_cost=0.0,
        price=plan_price,
    )


def _full_cap_shortfall(job: ReplanJob, schedule: Schedule) -> float:
    """The plan's shortfall under the full caps: the solver's, less the reserve the plan kept in
    the last bin (:data:`LAST_BIN_CAP`)."""
    shortfall = float(schedule.shortfall)
    problem = job.problem
    if shortfall <= 0 or problem is None or problem.caps is None:
        return shortfall
    reserve = float(problem.caps[-1]) * (1.0 / LAST_BIN_CAP - 1.0)
    return max(shortfall - reserve, 0.0)


def working_rate(cap: float, ratio: float) -> float:
    """The rate a router works to fill the cap ``cap`` at the fill ratio ``ratio``: ``cap /
    ratio``, never above the whole volume (1) nor below the cap."""
    return max(cap, min(cap / ratio, 1.0))


def short_on_low_day(problem: Problem | None, forecast: Forecast) -> bool:
    """Whether the order of ``problem`` could not complete under its caps if the bins after the
    first traded at a volume scale :data:`LOW_DAY_SDS` standard deviations below the forecast's
    (``exp(-LOW_DAY_SDS x volume_scale_sd)`` of their caps); never before the first bin of the
    day is seen (nothing yet says the day is off its profile)."""
    if problem is None or problem.caps is None or problem.bins < 2 or not forecast.observed:
        return False
    caps = problem.caps
    low = math.exp(-LOW_DAY_SDS * forecast.volume_scale_sd)
    return float(caps[0]) + low * float(caps[1:].sum()) < problem.quantity


def catch_up(order: OrderState, first: int) -> float:
    """The fills bin ``first`` should bring at least: the baseline's shares for the bin plus a
    :data:`CATCH_UP_BINS` th of what the order is behind the baseline when the bin starts
    (negative when ahead; nothing without a baseline)."""
    baseline = order.baseline
    if baseline is None:
        return 0.0
    start = baseline.expected_filled(first - 1 if first > 0 else None)
    planned = baseline.expected_filled(first) - start
    return planned + (start - order.filled) / CATCH_UP_BINS


def _next_target(
    state: EngineState,
    step: Step,
    job: ReplanJob,
    schedule: Schedule | None,
    sym: SymbolState,
    ts: datetime,
) -> TargetMessage | None:
    """The target of the bin ahead under the new plan (None: no bin of the order is left).

    Shares at the forecast volume and the same as a rate of it (``participation``); the target
    is the cap in the order's last bin, when the plan cannot complete and when it could not on a
    low day (:func:`short_on_low_day`; module docstring).
    Otherwise the planned fills, at least :func:`catch_up`, over the fill ratio ``r``: the shares
    never more than the cap (``max_quantity``: the contract's promise to the router), the rate
    never more than :func:`working_rate`.
    """
    order, first = job.order, job.first
    if first >= sym.profile.session.n_bins or first >= order.end_bin:
        return None
    ratio = fill_ratio(order, sym)
    volume = max(float(sym.forecast.volume[first]), 1.0)  # as build_problem has it
    if job.fraction != 1.0:
        volume = max(volume * job.fraction, 1.0)
    rate = order.max_participation
    at_cap = False
    if job.blocked or schedule is None or job.problem is None:
        wanted = 0.0
    elif rate is not None and (
        schedule.status == CAPPED_SHORTFALL
        or first == order.end_bin - 1
        or short_on_low_day(job.problem, sym.forecast)
    ):
        wanted, at_cap = float(order.remaining), True
    else:
        wanted = max(float(schedule.trades[0]), catch_up(order, first)) / ratio
    wanted = max(min(wanted, float(order.remaining)), 0.0)
    max_quantity = None if rate is None else math.floor(rate * volume + 1e-9)
    quantity = round(wanted if max_quantity is None else min(wanted, float(max_quantity)))
    participation = quantity / volume
    if rate is not None:
        working = working_rate(rate, ratio)
        if at_cap:  # every share the cap allows: worked for the router's bad bins
            participation = working_rate(rate, ratio * ratio)
        elif max_quantity is not None and wanted > max_quantity and working > rate:
            # the cap's shares are the target; a router filling r < 1 of it works more
            participation = min(wanted / volume, working)
    step.undo.order(order)
    previous = order.worked
    order.worked = learning.WorkedBin(
        index=first,
        quantity=quantity,
        participation=participation,
        max_participation=rate,
        remaining=order.remaining,
        filled_at=(
            previous.filled_at if previous is not None and previous.index == first else order.filled
        ),
    )
    return outputs.target(
        state,
        order,
        first,
        quantity,
        max_quantity,
        ts,
        participation=participation,
        max_participation=rate,
    )


def apply_replan(state: EngineState, step: Step, job: ReplanJob, schedule: Schedule | None) -> None:
    """Put a solved re-plan in place; emit the next target, the status and the alerts."""
    order, ts = job.order, step.ts
    if job.problem is not None and schedule is None:
        step.emit(outputs.replan_failed(order, ts, "the solver did not converge"))
        return
    sym = state.symbols[order.symbol]
    previous = order.plan
    plan = _plan(job, schedule, price(order, sym), sym)
    step.undo.order(order)
    order.plan_version = plan.version
    order.plan = plan
    order.blocked = job.blocked
    order.volume_scale = float(sym.forecast.volume_scale)
    if job.reason in ("start", "amend") or order.baseline is None:
        order.baseline = plan
    step.emit(_next_target(state, step, job, schedule, sym, ts))
    deviation = order.deviation(sym.closed_for(order))
    step.emit(outputs.status(state, order, ts, deviation))
    _plan_alerts(state, step, job, previous, plan, deviation[1:])


def _plan_alerts(
    state: EngineState,
    step: Step,
    job: ReplanJob,
    previous: Plan | None,
    plan: Plan,
    gap: tuple[float, float | None],
) -> None:
    """The conditions a re-plan judges: deviation and moves (at a bin), completion, the limit."""
    order, config, ts = job.order, state.config, step.ts
    symbol = order.symbol
    if job.reason == "bin":
        behind, ahead = rules.deviation(
            quantity=order.quantity, deviation_shares=gap[0], deviation_bins=gap[1], config=config
        )
        outputs.apply_check(state, step, behind, order, symbol, ts)
        outputs.apply_check(state, step, ahead, order, symbol, ts)
        if previous is not None:
            moved = rules.replan_moved(
                move_shares=plan.move_from(previous), quantity=order.quantity, config=config
            )
            outputs.apply_check(state, step, moved, order, symbol, ts)
    # These two can only breach in one known case; otherwise they matter only if raised.
    capped = plan.status == CAPPED_SHORTFALL
    if capped or state.book.is_raised(order.order_id, rules.COMPLETION_INFEASIBLE):
        check = rules.completion(
            quantity=order.quantity, shortfall=plan.shortfall if capped else 0.0, config=config
        )
        outputs.apply_check(state, step, check, order, symbol, ts)
    if job.blocked or state.book.is_raised(order.order_id, rules.LIMIT_BLOCKING):
        check = rules.limit_blocking(
            blocked=job.blocked,
            side=order.side,
            limit=order.limit_price,
            price=state.symbols[symbol].last_close,
        )
        outputs.apply_check(state, step, check, order, symbol, ts)


__all__ = [
    "ASSUMED_SPREAD_BPS",
    "CATCH_UP_BINS",
    "LAST_BIN_CAP",
    "LOW_DAY_SDS",
    "apply_replan",
    "beyond_limit",
    "catch_up",
    "fill_ratio",
    "horizon",
    "learn_fills",
    "plan_jobs",
    "price",
    "short_on_low_day",
    "solve_problems",
    "working_rate",
    "zero_target",
]
