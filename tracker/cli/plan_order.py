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
import sys
from pathlib import Path
from typing import Any

from tracker.core.formulation import IMPACT_LAWS, URGENCY, OrderPlan, plan_order, preferences
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
    """Plan the order of ``--order`` and print it (table or JSON)."""
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
    chosen = preferences(order.urgency, order.preferences)
    plan = plan_order(
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
    policy = None
    if args.explain:
        from tracker.core.policy import explain

        policy = explain(plan.problem)
    if args.format == "json":
        output = plan.to_mapping()
        output["order_id"] = order.order_id
        if policy is not None:
            output["policy"] = policy.to_mapping()
        json.dump(output, sys.stdout, indent=2, allow_nan=False)
        sys.stdout.write("\n")
    else:
        print_plan(plan, order.order_id, policy)
    return 0


def print_plan(plan: OrderPlan, order_id: str, policy: Any = None) -> None:
    """Print the plan as a terminal table with the cost totals."""
    from rich.console import Console
    from rich.table import Table

    verb = "buy" if plan.side == "buy" else "sell"
    table = Table(
        title=f"{order_id}: {verb} {plan.quantity:,.0f} {plan.symbol} ({plan.schedule.status})"
    )
    table.add_column("time", justify="left")
    table.add_column(f"shares to {verb}", justify="right")
    table.add_column("% of forecast volume", justify="right")
    table.add_column("inventory after", justify="right")
    if policy is not None:
        table.add_column("slope a_n", justify="right")
        table.add_column("R^2", justify="right")
    for n, item in enumerate(plan.bins):
        row = [
            f"{item.start:%H:%M}-{item.end:%H:%M}",
            f"{item.quantity:,}",
            f"{100 * item.participation:.1f}%",
            f"{item.inventory_after:,}",
        ]
        if policy is not None:
            row += [f"{policy.slope[n]:.4f}", f"{policy.r2[n]:.4f}"]
        table.add_row(*row)
    console = Console()
    console.print(table)
    bps = plan.cost_bps
    console.print(
        f"expected cost vs arrival price {plan.arrival_price:,.4f}: "
        f"{plan.cost['total']:,.2f} (currency), {bps['total']:.2f} bps"
    )
    for name in ("spread", "impact", "risk", "completion"):
        console.print(f"{name:>12}: {plan.cost[name]:>14,.2f}  {bps[name]:8.2f} bps")
    if plan.schedule.shortfall > 0.5:
        console.print(
            f"unfinished at the end: {plan.schedule.shortfall:,.0f} shares "
            "(the participation cap cannot complete the order)"
        )
