"""``tracker plan``: solve one execution problem and print the schedule.

``--problem FILE`` takes the canonical problem as a JSON file (fields of
:mod:`tracker.core.problem`).
"""

from __future__ import annotations

import argparse
import json
import math
import sys
from pathlib import Path
from typing import Any

from tracker.core.policy import Policy, explain
from tracker.core.problem import FIELDS, Problem
from tracker.core.solve import Schedule, solve
from tracker.errors import InputError
from tracker.shell.files import read_document

PROBLEM_HELP = (
    "JSON file of the canonical problem with the fields "
    + ", ".join(FIELDS)
    + ". Each numeric field is a number or a list of one value per bin; terminal_penalty is a "
    'number or "force"; caps is null, a number or a list. Units: shares for quantity and caps; '
    "currency per share for fixed_cost (half spread plus fees); temporary_impact k in currency "
    "per share^(1+impact_exponent); permanent_impact b in currency per share^2; inventory_penalty "
    "and terminal_penalty in currency per share^penalty_exponent."
)


def register(subparsers: argparse._SubParsersAction[argparse.ArgumentParser]) -> None:
    """Add ``plan`` to the command line."""
    from tracker.cli import CAUTION

    parser = subparsers.add_parser(
        "plan",
        help="solve an execution problem and print the optimal schedule",
        description="Solve the execution problem and print the optimal schedule: trades per bin, "
        "inventory, the objective and its breakdown. Minimises sum_n [h_n v_n + k_n v_n^(1+beta)]"
        " + (b/2)[(Q - q_N)^2 - sum v_n^2] + sum_n c_n q_n^p + A q_N^p over trades "
        "0 <= v_n <= u_n.",
        epilog=CAUTION,
    )
    parser.add_argument("--problem", type=Path, metavar="FILE", help=PROBLEM_HELP)
    parser.add_argument(
        "--format",
        choices=("table", "json"),
        default="table",
        help="output format (default: table)",
    )
    parser.add_argument(
        "--explain",
        action="store_true",
        help="also fit the feedback policy to the linear rule v_n = a_n q per bin "
        "(slope, R^2, relative deviation)",
    )
    from tracker.cli.plan_order import add_order_arguments

    add_order_arguments(parser)
    parser.set_defaults(handler=run)


def run(args: argparse.Namespace) -> int:
    """Solve the problem file (or plan the ``--order``) and print the result."""
    if getattr(args, "order", None) is not None:
        if args.problem is not None:
            raise InputError("give either --problem FILE or --order ORDER.json, not both")
        from tracker.cli.plan_order import run_order

        return run_order(args)
    if args.problem is None:
        raise InputError("give --problem FILE (the JSON execution problem) or --order ORDER.json")
    problem = Problem.from_mapping(read_document(args.problem, "problem file"))
    schedule = solve(problem)
    policy = explain(problem) if args.explain else None
    if args.format == "json":
        output: dict[str, Any] = schedule.to_mapping()
        if policy is not None:
            output["policy"] = policy.to_mapping()
        json.dump(output, sys.stdout, indent=2, allow_nan=False)
        sys.stdout.write("\n")
    else:
        print_table(problem, schedule, policy)
    return 0


def print_table(problem: Problem, schedule: Schedule, policy: Policy | None) -> None:
    """Print the schedule as a terminal table."""
    from rich.console import Console
    from rich.table import Table

    table = Table(title=f"Schedule: {schedule.status} ({schedule.method})")
    table.add_column("bin", justify="right")
    table.add_column("trade (shares)", justify="right")
    table.add_column("inventory after", justify="right")
    if problem.caps is not None:
        table.add_column("cap", justify="right")
    if policy is not None:
        table.add_column("slope a_n", justify="right")
        table.add_column("R^2", justify="right")
        table.add_column("rel. dev.", justify="right")
    for n in range(problem.bins):
        row = [str(n), f"{schedule.trades[n]:,.1f}", f"{schedule.trajectory[n + 1]:,.1f}"]
        if problem.caps is not None:
            cap = float(problem.caps[n])
            row.append(f"{cap:,.0f}" if math.isfinite(cap) else "-")
        if policy is not None:
            row += [
                f"{policy.slope[n]:.4f}",
                f"{policy.r2[n]:.4f}",
                f"{policy.relative_deviation[n]:.4f}",
            ]
        table.add_row(*row)
    console = Console()
    console.print(table)
    for name, value in schedule.cost.items():
        console.print(f"{name:>18}: {value:,.2f}")
    console.print(f"{'objective':>18}: {schedule.objective:,.2f}")
    console.print(f"{'shortfall':>18}: {schedule.shortfall:,.1f} shares")
