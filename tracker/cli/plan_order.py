"""The order mode of ``tracker plan``: plan a parent order on a liquidity profile.

``tracker plan --order ORDER.json --profile PROFILE.json [--arrival-price P]`` reads an order
message of the wire contract, builds the canonical problem from the profile and the preferences
(:mod:`tracker.core.formulation`), solves it, and prints the plan per bin with its expected cost.
The ``plan`` module adds these flags with :func:`add_order_arguments` and hands over to
:func:`run_order` when ``--order`` is given.
"""

from __future__ import annotations

import argparse
import json
import math
import sys
from datetime import UTC, datetime
from pathlib import Path
from typing import Any

from tracker.core.formulation import (
    IMPACT_LAWS,
    URGENCY,
    OrderPlan,
    Preferences,
    plan_order,
    preferences,
)
from tracker.core.profiles import Profile, default_profile
from tracker.errors import InputError

ORDER_HELP = (
    "JSON order message of the wire contract (type order, action new: order_id, symbol, side, "
    "quantity, start, end; optional max_participation, urgency, preferences, arrival_price, "
    "limit_price). Plans the order instead of a --problem file."
)

PREFERENCES_HELP = (
    "The problem per bin n (forecast volume V_n shares, spread s_n, volatility sigma_n of the "
    "bin's log return, price P): h_n = s_n / 2 + fees; impact cost per share eta sigma_n "
    "sqrt(N) P (v / V_n)^beta; inventory risk c_n = lambda (sigma_n P)^2 on the shares left; "
    'caps u_n = max_participation x V_n. Preferences (the order\'s "preferences" object; '
    "explicit values override the urgency preset): risk_aversion (inventory aversion, "
    "dimensionless per unit of the symbol's daily traded value; lambda = risk_aversion / "
    '(P x ADV) in 1/currency); completion_penalty ("force", the default: finish by the end; '
    "or basis points of price per unfinished share); penalty_exponent (p in [1, 4], default 2); "
    "impact_law, one of "
    + "; ".join(
        f"{name} (beta {law.exponent:g}, eta {law.coefficient:.3g}: {law.source})"
        for name, law in IMPACT_LAWS.items()
    )
    + " (default sqrt); impact_coefficient (eta); fee_bps (fees in bps of price, default 0). "
    "Urgency presets set risk_aversion: "
    + ", ".join(f"{name} {values['risk_aversion']:g}" for name, values in URGENCY.items())
    + " (default medium): low follows the volume curve, high front-loads."
)


def add_order_arguments(parser: argparse.ArgumentParser) -> None:
    """Add the order-mode flags to the ``plan`` parser."""
    group = parser.add_argument_group("order mode", PREFERENCES_HELP)
    group.add_argument("--order", type=Path, metavar="ORDER.json", help=ORDER_HELP)
    group.add_argument(
        "--profile",
        type=Path,
        metavar="PROFILE.json",
        help="liquidity profile from `tracker calibrate`; without it the stated "
        "invented default profile (1,000,000 shares a day) is used, with a warning",
    )
    group.add_argument(
        "--arrival-price",
        type=float,
        metavar="P",
        help="arrival price, currency per share (default: the order's "
        "arrival_price); costs are reported in currency and in bps of it",
    )
    group.add_argument(
        "--chart",
        type=Path,
        metavar="FILE",
        help="also draw the plan to FILE (.svg or .png): the cumulative plan against the "
        "forecast volume curve and the participation per bin against the cap; with --compare, "
        "the trade-off of expected cost against its standard deviation",
    )
    group.add_argument(
        "--compare",
        nargs="?",
        const="low,medium,high",
        metavar="LIST",
        help="plan the same order under several urgencies or risk aversions, side by side: a "
        "comma-separated list of urgency names (low, medium, high) and numbers (risk_aversion); "
        "default low,medium,high",
    )
    group.add_argument(
        "--now",
        metavar="TIME",
        help="the time to judge the window against (ISO 8601 with an offset; default: the "
        "clock); a start before it is warned about",
    )


def _read_json(path: Path, what: str) -> Any:
    from tracker.shell.files import read_document

    return read_document(path, what)


def read_order(path: Path) -> Any:
    """Read and validate ORDER.json as a wire order message (a new order)."""
    from tracker.edge.wire import OrderMessage, decode

    data = _read_json(path, "order file")
    if not isinstance(data, dict):
        raise InputError(f"order file {str(path)!r} must hold a JSON object (an order message)")
    order_id = data.get("order_id")
    topic = f"tracker/orders/{order_id if isinstance(order_id, str) else 'unknown'}"
    message = decode(topic, data)
    if not isinstance(message, OrderMessage) or message.action != "new":
        raise InputError('must be "new" to plan an order', field="action")
    return message


def run_order(args: argparse.Namespace) -> int:
    """Plan the order of ``--order`` and print it (table or JSON), with a chart on request."""
    order = read_order(args.order)
    if args.profile is not None:
        profile = Profile.from_mapping(_read_json(args.profile, "profile file"))
        if profile.symbol != order.symbol:
            raise InputError(
                f"the profile is for {profile.symbol!r} but the order is for "
                f"{order.symbol!r}; give the profile of the order's symbol",
                field="symbol",
            )
    else:
        profile = default_profile(order.symbol)
        print(
            f"warning: no --profile; planning {order.symbol} on the invented default profile "
            "(1,000,000 shares a day), not on its own liquidity",
            file=sys.stderr,
        )
    price = args.arrival_price if args.arrival_price is not None else order.arrival_price
    if price is None:
        raise InputError(
            "give --arrival-price P or arrival_price in the order; costs are measured against it",
            field="arrival_price",
        )
    if not price > 0:
        raise InputError(f"must be a price > 0; got {price!r}", field="arrival_price")
    now = _now(args.now)
    if args.chart is not None:
        from tracker.report.plan_chart import chart_format

        chart_format(args.chart)  # a bad extension fails before any work

    def plan_with(chosen: Preferences) -> OrderPlan:
        return plan_order(
            symbol=order.symbol,
            side=order.side,
            quantity=float(order.quantity),
            start=order.start,
            end=order.end,
            liquidity=profile,
            preferences=chosen,
            max_participation=order.max_participation,
            arrival_price=float(price),
        )

    plan = plan_with(preferences(order.urgency, order.preferences))
    warnings = plan_warnings(plan, profile, limit_price=order.limit_price, now=now)
    if args.compare is not None:
        return _run_compare(args, order, plan_with, warnings)
    policy = None
    if args.explain:
        from tracker.core.policy import explain

        policy = explain(plan.problem)
    if args.format == "json":
        output = plan.to_mapping()
        output["order_id"] = order.order_id
        output["warnings"] = warnings
        if policy is not None:
            output["policy"] = policy.to_mapping()
        json.dump(output, sys.stdout, indent=2, allow_nan=False)
        sys.stdout.write("\n")
    else:
        print_plan(plan, order.order_id, policy, warnings)
    if args.chart is not None:
        from tracker.report.plan_chart import draw_plan

        verb = "buy" if plan.side == "buy" else "sell"
        title = (
            f"{order.order_id}: {verb} {plan.quantity:,.0f} {plan.symbol}, "
            f"{plan.window_start:%Y-%m-%d}"
        )
        draw_plan(plan, args.chart, title)
        print(f"chart written to {args.chart}", file=sys.stderr)
    return 0


def _now(text: str | None) -> datetime:
    if text is None:
        return datetime.now(UTC)
    try:
        value = datetime.fromisoformat(text)
    except ValueError as exc:
        raise InputError(
            f"must be an ISO 8601 time such as 2026-03-10T09:00:00-05:00; got {text!r}",
            field="--now",
        ) from exc
    if value.tzinfo is None:
        raise InputError(f"must carry an offset (e.g. -05:00 or Z); got {text!r}", field="--now")
    return value


#: A limit further than this many daily standard deviations from the arrival price is "far".
FAR_LIMIT_DAILY_STD = 3.0


def plan_warnings(
    plan: OrderPlan, profile: Profile, *, limit_price: float | None, now: datetime
) -> list[str]:
    """What a trader should know before using the plan, in words.

    Args:
        plan: The plan.
        profile: The liquidity profile it was made on (for the daily volatility).
        limit_price: The order's limit, if any.
        now: The time to judge the start against.

    Returns:
        One sentence per warning: the window clipped by the session, a start already past, no
        participation cap, a limit on the wrong side of the market or far from it, an unfinished
        plan.
    """
    session = profile.session
    found: list[str] = []
    if plan.start_clipped and plan.requested_start is not None:
        found.append(
            f"the order starts at {plan.requested_start:%H:%M}, before the session opens: "
            f"planned from {plan.window_start:%H:%M}"
        )
    if plan.end_clipped and plan.requested_end is not None:
        found.append(
            f"the order ends at {plan.requested_end:%H:%M}, after the session closes: "
            f"planned to {plan.window_end:%H:%M}"
        )
    start = plan.requested_start or plan.window_start
    if start < now:
        local_now = now.astimezone(session.zone)
        found.append(
            f"the start ({start:%Y-%m-%d %H:%M}) has passed (now {local_now:%Y-%m-%d %H:%M} "
            f"{session.timezone}): a live engine plans only the bins still ahead"
        )
    if plan.max_participation is None:
        found.append(
            "no participation cap (max_participation): nothing stops the plan from taking a "
            "large share of a bin's volume"
        )
    if limit_price is not None:
        gap = (limit_price - plan.arrival_price) / plan.arrival_price
        against = gap if plan.side == "buy" else -gap  # > 0: the limit leaves room to trade
        daily = math.sqrt(float((profile.volatility**2).sum()))
        if against < 0:
            where = "below" if plan.side == "buy" else "above"
            found.append(
                f"the limit {limit_price:,.4f} is {abs(gap) * 1e4:,.1f} bps {where} the arrival "
                f"price {plan.arrival_price:,.4f}: the order cannot trade until the price "
                "crosses it"
            )
        elif daily > 0 and against > FAR_LIMIT_DAILY_STD * daily:
            found.append(
                f"the limit {limit_price:,.4f} is {against * 1e4:,.0f} bps from the arrival "
                f"price ({against / daily:.1f} daily standard deviations): far from the market, "
                "it is unlikely to bind"
            )
    if plan.schedule.shortfall > 0.5:
        found.append(
            f"{plan.schedule.shortfall:,.0f} shares cannot be done in the window under the "
            "participation cap"
        )
    return found


def header_lines(plan: OrderPlan, order_id: str) -> list[str]:
    """The plan's header, one line per fact, in words and plain numbers."""
    verb = "buy" if plan.side == "buy" else "sell"
    bps = plan.cost_bps
    minutes = plan.bins[0].end - plan.bins[0].start
    cap = (
        "no cap" if plan.max_participation is None else f"cap {100 * plan.max_participation:.1f} %"
    )
    reached = plan.milestones()
    done = ", ".join(
        f"{round(100 * fraction)} % {'never' if when is None else f'by {when:%H:%M}'}"
        for fraction, when in reached.items()
    )
    if None in reached.values():
        planned = sum(b.quantity for b in plan.bins)
        done += f" (the plan ends at {100 * planned / plan.quantity:.1f} % of the order)"
    width = max(1, int((plan.bins[-1].end - plan.bins[-1].start).total_seconds() // 60))
    lines = [
        f"{order_id}: {verb} {plan.quantity:,.0f} {plan.symbol} at arrival price "
        f"{plan.arrival_price:,.4f} ({plan.schedule.status})",
        f"date: {plan.window_start:%Y-%m-%d (%A)}; times are venue local time, {plan.timezone}",
        f"window: {plan.window_start:%H:%M} to {plan.window_end:%H:%M}, {len(plan.bins)} bins "
        f"of {width} minutes"
        + (
            f" (first bin {int(minutes.total_seconds() // 60)} minutes)"
            if width * 60 != minutes.total_seconds()
            else ""
        ),
        f"size: {100 * plan.volume_share:.1f} % of the forecast volume in the window "
        f"({plan.window_volume:,.0f} shares)",
        f"participation: average {100 * plan.average_participation:.1f} %, peak "
        f"{100 * plan.peak_participation:.1f} % of a bin's forecast volume; {cap}",
        f"done: {done}",
        f"expected cost (half spread, fees and impact; positive = a cost): "
        f"{plan.cost['expected']:,.2f} in currency, {bps['expected']:.2f} bps of the arrival value",
        f"standard deviation of that cost (price risk while the order works): "
        f"{plan.cost_std:,.2f} in currency, {plan.cost_std_bps:.2f} bps",
        f"risk term of the optimiser (a penalty it weighs, not money paid): "
        f"{plan.cost['risk']:,.2f} in currency, {bps['risk']:.2f} bps",
    ]
    return lines


def print_plan(
    plan: OrderPlan, order_id: str, policy: Any = None, warnings: list[str] | None = None
) -> None:
    """Print the header, the warnings, the plan per bin and the cost breakdown."""
    from rich.console import Console
    from rich.table import Table

    console = Console()
    for line in header_lines(plan, order_id):
        console.print(line, highlight=False, soft_wrap=True)
    for warning in warnings or []:
        console.print(f"warning: {warning}", style="bold yellow", highlight=False, soft_wrap=True)
    verb = "buy" if plan.side == "buy" else "sell"
    table = Table(
        title=f"{order_id}: {verb} {plan.quantity:,.0f} {plan.symbol} ({plan.schedule.status})"
    )
    table.add_column("time", justify="left")
    table.add_column(f"shares to {verb}", justify="right")
    table.add_column("% of volume", justify="right")
    table.add_column("% done", justify="right")
    table.add_column("left after", justify="right")
    if policy is not None:
        table.add_column("slope a_n", justify="right")
        table.add_column("R^2", justify="right")
    done = 0
    for n, item in enumerate(plan.bins):
        done += item.quantity
        row = [
            f"{item.start:%H:%M}-{item.end:%H:%M}",
            f"{item.quantity:,}",
            f"{100 * item.participation:.1f}%",
            f"{100 * done / plan.quantity:.1f}%",
            f"{item.inventory_after:,}",
        ]
        if policy is not None:
            row += [f"{policy.slope[n]:.4f}", f"{policy.r2[n]:.4f}"]
        table.add_row(*row)
    console.print(table)
    bps = plan.cost_bps
    console.print(
        f"expected cost vs arrival price {plan.arrival_price:,.4f} (positive = a cost): "
        f"{plan.cost['expected']:,.2f} (currency), {bps['expected']:.2f} bps",
        highlight=False,
    )
    for name in ("spread", "impact"):
        console.print(f"{name:>12}: {plan.cost[name]:>14,.2f}  {bps[name]:8.2f} bps")
    console.print("not in the expected cost (terms the optimiser weighs):", highlight=False)
    for name in ("risk", "completion"):
        value = plan.cost[name]
        text = (
            f"{value:>14,.2f}  {bps[name]:8.2f} bps"
            if math.isfinite(value)
            else ("   unbounded (completion is forced but the cap prevents it)")
        )
        console.print(f"{name:>12}: {text}", highlight=False)
    if plan.schedule.shortfall > 0.5:
        console.print(
            f"unfinished at the end: {plan.schedule.shortfall:,.0f} shares "
            "(the participation cap cannot complete the order)"
        )


def compare_choices(text: str) -> list[tuple[str, str | None, float | None]]:
    """The ``--compare`` list: (label, urgency, risk aversion) per item.

    Raises:
        InputError: An item is neither an urgency name nor a number >= 0, or the list is empty.
    """
    choices: list[tuple[str, str | None, float | None]] = []
    for item in (part.strip() for part in text.split(",")):
        if not item:
            continue
        if item in URGENCY:
            choices.append((item, item, None))
            continue
        try:
            value = float(item)
        except ValueError:
            value = math.nan
        if not (math.isfinite(value) and value >= 0):
            raise InputError(
                f"must be urgency names ({', '.join(URGENCY)}) or risk aversions (numbers >= 0), "
                f"separated by commas; got {item!r}",
                field="--compare",
            )
        choices.append((f"risk aversion {value:g}", None, value))
    if len(choices) < 2:
        raise InputError(
            "give at least two urgencies or risk aversions to compare", field="--compare"
        )
    return choices


def _run_compare(
    args: argparse.Namespace,
    order: Any,
    plan_with: Any,
    warnings: list[str],
) -> int:
    """Plan the order under each choice of ``--compare`` and print them side by side."""
    rows: list[tuple[str, float, OrderPlan]] = []
    for label, urgency, aversion in compare_choices(args.compare):
        overrides = dict(order.preferences or {})
        if aversion is not None:
            overrides["risk_aversion"] = aversion
            chosen = preferences(order.urgency, overrides)
        else:
            overrides.pop("risk_aversion", None)
            chosen = preferences(urgency, overrides)
        rows.append((label, chosen.risk_aversion, plan_with(chosen)))
    rows.sort(key=lambda row: row[1])
    if args.format == "json":
        output = {
            "order_id": order.order_id,
            "warnings": warnings,
            "plans": [
                {"label": label, "risk_aversion": aversion, **plan.to_mapping()}
                for label, aversion, plan in rows
            ],
        }
        json.dump(output, sys.stdout, indent=2, allow_nan=False)
        sys.stdout.write("\n")
    else:
        print_compare(rows, order.order_id, warnings)
    if args.chart is not None:
        from tracker.report.plan_chart import draw_frontier

        first = rows[0][2]
        verb = "buy" if first.side == "buy" else "sell"
        draw_frontier(
            [plan for _, _, plan in rows],
            [label for label, _, _ in rows],
            args.chart,
            f"{order.order_id}: {verb} {first.quantity:,.0f} {first.symbol}",
        )
        print(f"chart written to {args.chart}", file=sys.stderr)
    return 0


def print_compare(
    rows: list[tuple[str, float, OrderPlan]], order_id: str, warnings: list[str]
) -> None:
    """Print the compared plans as one table, from the least to the most risk-averse."""
    from rich.console import Console
    from rich.table import Table

    console = Console()
    first = rows[0][2]
    for line in header_lines(first, order_id)[:4]:
        console.print(line, highlight=False, soft_wrap=True)
    for warning in warnings:
        console.print(f"warning: {warning}", style="bold yellow", highlight=False, soft_wrap=True)
    table = Table(
        title="The same order under several preferences (costs positive = a cost, "
        "bps of the arrival value)"
    )
    for name in (
        "preference",
        "risk aversion",
        "expected cost",
        "bps",
        "std",
        "std bps",
        "risk term bps",
        "half done",
        "peak part.",
    ):
        table.add_column(name, justify="right" if name != "preference" else "left")
    for label, aversion, plan in rows:
        half = plan.milestones((0.5,))[0.5]
        bps = plan.cost_bps
        table.add_row(
            label,
            f"{aversion:g}",
            f"{plan.cost['expected']:,.2f}",
            f"{bps['expected']:.2f}",
            f"{plan.cost_std:,.2f}",
            f"{plan.cost_std_bps:.2f}",
            f"{bps['risk']:.2f}",
            "never" if half is None else f"{half:%H:%M}",
            f"{100 * plan.peak_participation:.1f} %",
        )
    console.print(table)
    console.print(
        "More urgency trades sooner: a higher expected cost buys a smaller standard deviation "
        "(the efficient frontier of Almgren and Chriss 2000).",
        highlight=False,
    )
