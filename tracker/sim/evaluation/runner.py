"""Run the policies over the days of each scenario and collect what happened, day by day.

Theory of operation
-------------------
For every scenario and every day: build the day (:mod:`.market_day`, simulated or recorded),
make the opening plan once, then run each policy through the bins of the order's window with its
own :class:`~tracker.sim.evaluation.execution.Execution` (router and market). The policies of a
day share the market path, the order and the router's draws, so their results are paired. The
day's random numbers depend only on ``(seed, day)``, never on what ran before, so a run is
reproducible for a seed and scenarios share their base days. :func:`results_of` turns the
per-day samples into the report's numbers (:mod:`.statistics`).
"""

from __future__ import annotations

import math
from collections.abc import Callable, Iterable, Sequence
from dataclasses import dataclass, field
from typing import Any

import numpy as np
import numpy.typing as npt

from tracker.errors import InputError
from tracker.sim.evaluation.config import EvaluationConfig, Scenario
from tracker.sim.evaluation.execution import (
    COST_PARTS,
    DayResult,
    Execution,
    implied_timing_variance,
)
from tracker.sim.evaluation.forecast_check import scale_errors
from tracker.sim.evaluation.market_day import MarketDay, RecordedDays, history_days, simulated_day
from tracker.sim.evaluation.policies import BASELINE, BUILDERS, POLICIES, OpeningPlan
from tracker.sim.evaluation.statistics import paired, sd, se, summarize

FloatArray = npt.NDArray[np.float64]

#: The completion penalties reported, as multiples of the stated one.
PENALTY_MULTIPLES = (0.0, 1.0, 3.0)

#: A day "leaves a residual" when more than this fraction of the order is unfinished.
RESIDUAL_THRESHOLD = 0.01


@dataclass
class Samples:
    """One policy's per-day results in one scenario (lists in day order)."""

    days: list[DayResult] = field(default_factory=list)

    def column(self, name: str) -> FloatArray:
        """One per-day value: ``executed``, ``unfinished``, ``expected``, ``implied_variance``,
        ``spread_impact`` (spread + temporary + permanent) or a cost part."""
        getters: dict[str, Callable[[DayResult], float]] = {
            "executed": lambda d: d.executed_cost,
            "unfinished": lambda d: d.unfinished,
            "expected": lambda d: d.expected_cost,
            "implied_variance": lambda d: d.implied_timing_variance,
            "spread_impact": lambda d: (
                d.costs["spread"] + d.costs["temporary"] + d.costs["permanent"]
            ),
        }
        getter = getters.get(name) or (lambda d: d.costs[name])
        return np.array([getter(d) for d in self.days], dtype=np.float64)

    def shortfall(self, penalty_bps: float) -> FloatArray:
        """Per-day implementation shortfall with unfinished shares valued at ``penalty_bps``."""
        return np.array([d.shortfall(penalty_bps) for d in self.days], dtype=np.float64)


@dataclass
class ScenarioRun:
    """Every policy's samples in one scenario."""

    scenario: Scenario
    samples: dict[str, Samples]
    forecast_errors: dict[str, list[float]] = field(default_factory=dict)


@dataclass
class Evaluation:
    """A whole run: the configuration, the seed and every scenario's samples."""

    config: EvaluationConfig
    seed: int
    policies: tuple[str, ...]
    runs: list[ScenarioRun]
    source: str
    notes: list[str] = field(default_factory=list)


def check_policies(names: Sequence[str] | None) -> tuple[str, ...]:
    """The policies to run, in report order (all when ``None``).

    Raises:
        InputError: an unknown name (the known ones are listed).
    """
    if not names:
        return POLICIES
    for name in names:
        if name not in POLICIES:
            raise InputError(
                f"unknown policy {name!r}; the policies are {', '.join(POLICIES)}", field="--policy"
            )
    return tuple(name for name in POLICIES if name in names)


def run_day(
    day: MarketDay, scenario: Scenario, config: EvaluationConfig, policies: Iterable[str]
) -> dict[str, DayResult]:
    """Run each policy on one day (paired: same market, order and router draws)."""
    plan = OpeningPlan(day)
    order = day.order
    window = slice(order.first, order.end)
    volatility = np.asarray(day.profile.volatility[window], dtype=np.float64)
    out: dict[str, DayResult] = {}
    for name in policies:
        execution = Execution(day, scenario, config.costs)
        policy = BUILDERS[name](plan, execution, config.costs.pov_scale)
        for n in range(order.first, order.end):
            shares, price = execution.fill(n, policy.target(n))
            policy.after(n, shares, price)
        out[name] = execution.result(
            expected_cost=policy.expected_cost,
            implied_timing_variance=implied_timing_variance(
                policy.nominal, volatility, float(order.quantity)
            ),
            engine_messages=policy.messages,
        )
    return out


def evaluate(
    config: EvaluationConfig,
    *,
    days: int,
    seed: int,
    policies: Sequence[str] | None = None,
    recorded: RecordedDays | None = None,
    calibration_days: int = 20,
    progress: Callable[[int], None] | None = None,
) -> Evaluation:
    """Run every scenario of ``config`` for ``days`` days.

    Args:
        config: Market, orders, costs and scenarios.
        days: Days per scenario (>= 1).
        seed: The seed of every random draw (>= 0).
        policies: Policy names (default: all, :data:`POLICIES`).
        recorded: Recorded days to replay as the market instead of the simulator.
        calibration_days: With ``recorded``: full days before each replayed day that its profile
            is calibrated on.
        progress: Called with 1 after each day of each scenario.

    Returns:
        The per-day samples of every policy in every scenario.

    Raises:
        InputError: a bad number of days, seed or policy name.
    """
    if isinstance(days, bool) or not isinstance(days, int) or days < 1:
        raise InputError(f"must be a whole number of days >= 1; got {days!r}", field="--days")
    if isinstance(seed, bool) or not isinstance(seed, int) or seed < 0:
        raise InputError(f"must be a whole number >= 0; got {seed!r}", field="--seed")
    names = check_policies(policies)
    profile = config.market.profile(config.session)
    runs: list[ScenarioRun] = []
    notes: list[str] = []
    for scenario in config.scenarios:
        samples = {name: Samples() for name in names}
        errors: dict[str, list[float]] = {}
        if recorded is None:
            source: Iterable[MarketDay] = (
                simulated_day(config, scenario, i, seed, profile) for i in range(days)
            )
        else:
            source = history_days(
                config, scenario, recorded, days=days, seed=seed, calibration_days=calibration_days
            )
        for day in source:
            for name, result in run_day(day, scenario, config, names).items():
                samples[name].days.append(result)
            for label, error in scale_errors(day).items():
                errors.setdefault(label, []).append(error)
            if progress is not None:
                progress(1)
        runs.append(ScenarioRun(scenario, samples, errors))
    if recorded is not None:
        replayed = len(next(iter(runs[0].samples.values())).days) if runs else 0
        notes.append(
            f"{replayed} recorded days replayed, each planned with a profile calibrated on the "
            f"{calibration_days} full days before it; {len(recorded.skipped)} days skipped "
            "(not full days of the session)"
        )
    return Evaluation(
        config=config,
        seed=seed,
        policies=names,
        runs=runs,
        source="simulated" if recorded is None else "recorded history",
        notes=notes,
    )


# --------------------------------------------------------------------------------------------
# Results


def _finite(value: float) -> float | None:
    return value if math.isfinite(value) else None


def policy_results(
    samples: Samples, baseline: Samples | None, penalty_bps: float
) -> dict[str, Any]:
    """The report's numbers for one policy in one scenario (see :func:`results_of`)."""
    shortfall = samples.shortfall(penalty_bps)
    unfinished = samples.column("unfinished")
    expected = samples.column("expected")
    realized = samples.column("spread_impact")
    timing = samples.column("timing")
    ratio = realized / np.where(expected > 0, expected, np.nan)
    ratio = ratio[np.isfinite(ratio)]
    out: dict[str, Any] = {
        "days": len(samples.days),
        "shortfall_bps": summarize(shortfall).to_mapping(),
        "unfinished": {
            "mean_pct": float(unfinished.mean() * 100.0),
            "days_over_1pct": int(np.sum(unfinished > RESIDUAL_THRESHOLD)),
        },
        "shortfall_by_penalty": {
            f"{multiple * penalty_bps:g}": {
                "mean": float(samples.shortfall(multiple * penalty_bps).mean()),
                "se": se(samples.shortfall(multiple * penalty_bps)),
            }
            for multiple in PENALTY_MULTIPLES
        },
        "parts_bps": {part: float(samples.column(part).mean()) for part in COST_PARTS},
        "model": {
            "expected_spread_impact_bps": float(expected.mean()),
            "realized_spread_impact_bps": {"mean": float(realized.mean()), "se": se(realized)},
            "ratio": _finite(float(realized.mean() / expected.mean()))
            if expected.mean() > 0
            else None,
            "ratio_per_day": {
                "mean": float(ratio.mean()) if ratio.size else None,
                "sd": sd(ratio) if ratio.size else None,
            },
            "implied_timing_sd_bps": math.sqrt(float(samples.column("implied_variance").mean())),
            "realized_timing_sd_bps": sd(timing),
        },
    }
    messages = sum(d.engine_messages for d in samples.days)
    if messages:
        out["engine_messages"] = messages
    if baseline is not None:
        out["paired_vs_" + BASELINE] = {
            f"{multiple * penalty_bps:g}": paired(
                samples.shortfall(multiple * penalty_bps),
                baseline.shortfall(multiple * penalty_bps),
            ).to_mapping()
            for multiple in PENALTY_MULTIPLES
        }
    return out


def results_of(evaluation: Evaluation) -> dict[str, Any]:
    """Every number of the report, as a JSON-ready object.

    Per scenario and policy: the implementation shortfall at the stated penalty (mean, sd, se,
    95 % CVaR), the unfinished share (mean, days with more than 1 % left), the mean shortfall at
    penalties 0, 1x and 3x the stated one with standard errors, the executed cost by part, the
    paired difference against the opening plan at each penalty (mean, se, 95 % t interval), and
    the model check: the plan's expected spread + impact against the realized (ratio of means and
    the per-day ratio's mean and sd), the timing sd the plan implies against the realized one.
    Per scenario also the forecast's error on the day's volume scale at each checkpoint
    (:mod:`.forecast_check`): mean, its standard error and the mean absolute value of
    ``log(forecast / true scale)``.
    """
    config = evaluation.config
    penalty = config.costs.penalty_bps
    scenarios = []
    for run in evaluation.runs:
        baseline = run.samples.get(BASELINE)
        scenarios.append(
            {
                "name": run.scenario.name,
                "description": run.scenario.description,
                "policies": {
                    name: policy_results(samples, baseline if name != BASELINE else None, penalty)
                    for name, samples in run.samples.items()
                },
                "forecast_scale_error": {
                    label: {
                        "days": len(values),
                        "mean": float(np.mean(values)),
                        "se": se(np.asarray(values)),
                        "mean_abs": float(np.mean(np.abs(values))),
                    }
                    for label, values in run.forecast_errors.items()
                },
            }
        )
    return {
        "source": evaluation.source,
        "seed": evaluation.seed,
        "policies": list(evaluation.policies),
        "baseline": BASELINE,
        "penalty_bps": penalty,
        "penalties_bps": [multiple * penalty for multiple in PENALTY_MULTIPLES],
        "units": {
            "shortfall": "bps of the order's value at the arrival price; unfinished shares valued "
            "at the penalty",
            "unfinished": "percent of the order's shares",
        },
        "configuration": {
            "file": config.source,
            "market": {k: getattr(config.market, k) for k in config.market.__dataclass_fields__},
            "costs": {k: getattr(config.costs, k) for k in config.costs.__dataclass_fields__},
        },
        "notes": list(evaluation.notes),
        "scenarios": scenarios,
    }
