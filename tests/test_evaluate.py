"""``tracker evaluate``: the paired Monte-Carlo harness (statistics, days, policies, report).

Everything simulated is invented (an invented stock on an invented venue). The statistics are
checked against SciPy on the same samples, the CVaR against a direct sort, the re-planning engine
against the opening plan on a day with nothing to learn (Almgren and Chriss 2000, section 3.1),
and the market's charge against the planner's own cost model.
"""

from __future__ import annotations

import json
import math
from dataclasses import replace
from pathlib import Path
from typing import Any

import numpy as np
import pytest
from scipy import stats

from tracker.cli import main
from tracker.core.formulation import PERMANENT_IMPACT
from tracker.errors import InputError
from tracker.sim.evaluation.config import EvaluationConfig, Scenario, load_config, parse_config
from tracker.sim.evaluation.execution import Execution
from tracker.sim.evaluation.forecast_check import scale_errors
from tracker.sim.evaluation.market_day import history_days, read_recorded, simulated_day
from tracker.sim.evaluation.policies import EnginePolicy, OpeningPlan
from tracker.sim.evaluation.runner import evaluate, results_of, run_day
from tracker.sim.evaluation.statistics import cvar, paired, sd, se, summarize
from tracker.sim.market import simulate_history

# --------------------------------------------------------------------------------------------
# Statistics


@pytest.fixture
def costs() -> tuple[np.ndarray, np.ndarray]:
    """Two paired samples of 300 invented daily costs (heavy-tailed, correlated)."""
    rng = np.random.default_rng(11)
    common = rng.standard_t(4, 300) * 80.0
    return common + rng.normal(30.0, 5.0, 300), common + rng.normal(31.0, 5.0, 300)


def test_mean_sd_and_standard_error_match_scipy(costs: tuple[np.ndarray, np.ndarray]) -> None:
    """Mean, sample sd and standard error equal scipy.stats.tmean/tstd/sem on the same sample."""
    sample = costs[0]
    summary = summarize(sample)
    assert stats.tmean(sample) == pytest.approx(summary.mean, rel=1e-12)  # SciPy
    assert stats.tstd(sample) == pytest.approx(sd(sample), rel=1e-12)  # SciPy, ddof = 1
    assert stats.sem(sample) == pytest.approx(se(sample), rel=1e-12)  # SciPy
    assert stats.sem(sample) == pytest.approx(summary.se, rel=1e-12)


def test_paired_interval_matches_scipy_ttest_rel(costs: tuple[np.ndarray, np.ndarray]) -> None:
    """The paired mean, its standard error and 95 % t interval equal scipy.stats.ttest_rel's."""
    a, b = costs
    result = paired(a, b)
    test = stats.ttest_rel(a, b)  # SciPy's paired t-test on the same days
    interval = test.confidence_interval(0.95)
    assert float(np.mean(a - b)) == pytest.approx(result.mean, rel=1e-12)
    assert stats.sem(a - b) == pytest.approx(result.se, rel=1e-12)  # SciPy
    assert result.mean / result.se == pytest.approx(float(test.statistic), rel=1e-10)
    assert (float(interval.low), float(interval.high)) == pytest.approx(
        (result.low, result.high), rel=1e-10
    )
    quantile = stats.t.ppf(0.975, a.size - 1)  # SciPy's Student-t quantile
    assert result.mean + quantile * result.se == pytest.approx(result.high, rel=1e-12)


def test_paired_refuses_samples_of_different_days() -> None:
    """Paired samples of different lengths are refused (they cannot be the same days)."""
    with pytest.raises(ValueError, match="same days"):
        paired([1.0, 2.0, 3.0], [1.0, 2.0])


def test_cvar_is_the_mean_of_the_worst_five_percent(costs: tuple[np.ndarray, np.ndarray]) -> None:
    """With 300 days, CVaR 95 % is the mean of the 15 highest costs (a direct sort)."""
    sample = costs[0]
    worst = np.sort(sample)[::-1][:15]  # direct sort: 5 % of 300 days
    assert float(worst.mean()) == pytest.approx(cvar(sample, 0.95), rel=1e-12)


def test_cvar_weights_the_boundary_day_by_its_fraction() -> None:
    """With 50 days the worst 5 % is 2.5 days: two whole and half of the third (direct sort)."""
    sample = np.random.default_rng(5).normal(0.0, 1.0, 50)
    ordered = np.sort(sample)[::-1]
    expected = (ordered[0] + ordered[1] + 0.5 * ordered[2]) / 2.5
    assert expected == pytest.approx(cvar(sample, 0.95), rel=1e-12)


# --------------------------------------------------------------------------------------------
# The scenario file


def test_the_shipped_file_has_the_issue_s_scenarios() -> None:
    """The default file holds the five families, an order of 5-15 % of ADV, cap 20 %, medium."""
    config = load_config()
    names = [s.name for s in config.scenarios]
    assert ["normal", "half-volume", "midday-collapse", "partial-fills", "double-impact"] == names
    assert (0.05, 0.15) == config.draws.size
    assert 0.20 == config.draws.max_participation
    assert "medium" == config.draws.urgency
    assert 50.0 == config.costs.penalty_bps
    assert (0.7, 1.0) == config.scenario("partial-fills").fill
    assert 2.0 == config.scenario("double-impact").impact
    collapse = config.scenario("midday-collapse").windows
    assert 1 == len(collapse) and 0.2 == collapse[0].volume


def test_json_and_toml_files_read_the_same(tmp_path: Path) -> None:
    """A JSON scenario file gives the same configuration as the same TOML."""
    toml = tmp_path / "s.toml"
    toml.write_text('[costs]\npenalty_bps = 20\n[[scenario]]\nname = "a"\nfill = [0.5, 0.9]\n')
    data = {"costs": {"penalty_bps": 20}, "scenario": [{"name": "a", "fill": [0.5, 0.9]}]}
    js = tmp_path / "s.json"
    js.write_text(json.dumps(data))
    first, second = load_config(toml), load_config(js)
    assert first.costs == second.costs
    assert first.scenarios == second.scenarios


@pytest.mark.parametrize(
    ("data", "field"),
    [
        ({"scenario": []}, "scenario"),
        ({"scenario": [{"name": "a", "fill": [0.9, 0.5]}]}, "scenario[0].fill"),
        ({"scenario": [{"name": "a", "fill": [0.0, 0.5]}]}, "scenario[0].fill[0]"),
        ({"scenario": [{"name": "a", "impakt": 2}]}, "scenario[0].impakt"),
        ({"scenario": [{"name": "a", "window": [{"start": "12:02", "end": "13:00"}]}]}, None),
        ({"scenario": [{"name": "a"}, {"name": "a"}]}, "scenario"),
        ({"scenario": [{"name": "a"}], "orders": {"urgency": "asap"}}, "orders.urgency"),
        ({"scenario": [{"name": "a"}], "costs": {"penalty_bps": -1}}, "costs.penalty_bps"),
        ({"scenario": [{"name": "a"}], "order": [{"side": "buy"}]}, "order[0]"),
        ({"scenario": [{"name": "a"}], "market": {"symbol": "bad symbol"}}, "symbol"),
    ],
    ids=[
        "no-scenario",
        "fill-reversed",
        "fill-zero",
        "unknown-key",
        "window-off-grid",
        "duplicate-name",
        "urgency",
        "negative-penalty",
        "order-without-size",
        "symbol",
    ],
)
def test_a_bad_scenario_file_names_the_key(data: dict[str, Any], field: str | None) -> None:
    """Every bad value is refused with an InputError that names the key to fix."""
    with pytest.raises(InputError) as caught:
        parse_config(data)
    if field is not None:
        assert field == caught.value.field
    else:
        assert "bin boundaries" in str(caught.value)


def test_listed_orders_are_taken_in_turn() -> None:
    """Listed orders ([[order]]) replace the drawn ones: day i takes order i modulo the list."""
    config = parse_config(
        {
            "scenario": [{"name": "a"}],
            "order": [
                {"side": "sell", "quantity": 50_000, "urgency": "high", "start": "10:00"},
                {"side": "buy", "size": 0.1, "max_participation": 0.1},
            ],
        }
    )
    profile = config.market.profile(config.session)
    orders = [simulated_day(config, config.scenarios[0], i, 1, profile).order for i in range(3)]
    assert ("sell", 50_000, "high", 6, 0.2) == (
        orders[0].side,
        orders[0].quantity,
        orders[0].urgency,
        orders[0].first,
        orders[0].max_participation,
    )
    assert ("buy", 200_000, "medium", 0, 0.1) == (
        orders[1].side,
        orders[1].quantity,
        orders[1].urgency,
        orders[1].first,
        orders[1].max_participation,
    )
    assert orders[0] == orders[2]


def test_an_unknown_scenario_name_lists_the_known_ones() -> None:
    """Asking for a scenario the file does not have says which ones it has."""
    with pytest.raises(InputError, match="known: normal, half-volume"):
        load_config().only(["typo"])


# --------------------------------------------------------------------------------------------
# Days and policies


def exact_config() -> EvaluationConfig:
    """The default file with a day exactly as forecast, full fills, and no permanent impact
    (the planner assumes none)."""
    base = load_config()
    return replace(
        base,
        costs=replace(base.costs, permanent_impact=0.0),
        scenarios=(Scenario("exact", exact=True),),
    )


def mid_day_config() -> EvaluationConfig:
    """An exact day with a listed high-urgency sell from 10:00 to 14:00 (bins before it)."""
    return parse_config(
        {
            "scenario": [{"name": "exact", "exact": True}],
            "costs": {"permanent_impact": 0.0},
            "order": [
                {
                    "side": "sell",
                    "quantity": 150_000,
                    "urgency": "high",
                    "start": "10:00",
                    "end": "14:00",
                }
            ],
        }
    )


@pytest.mark.parametrize(
    ("make", "index"),
    [
        (exact_config, 0),
        (exact_config, 1),
        (exact_config, 2),
        (exact_config, 3),
        (mid_day_config, 0),
    ],
    ids=["day0", "day1", "day2", "day3", "mid-day-high-urgency"],
)
def test_replanning_reproduces_the_opening_plan_when_nothing_deviates(
    make: Any, index: int
) -> None:
    """Almgren and Chriss (2000), section 3.1: with nothing new learned (volume, spread and
    volatility exactly as forecast, the price still, fills equal to the targets), re-solving the
    remaining horizon every bin gives the rest of the opening plan, so the engine's executed
    schedule equals the static one up to whole-share rounding: the engine rounds each bin's
    target, the static plan its cumulative, so the two cumulatives may drift apart by at most half
    a share per bin."""
    config = make()
    scenario = config.scenarios[0]
    day = simulated_day(config, scenario, index, 4, config.market.profile(config.session))
    results = run_day(day, scenario, config, ["replan", "opening-plan"])
    window = slice(day.order.first, day.order.end)
    engine, static = results["replan"].executed[window], results["opening-plan"].executed[window]
    quantity = day.order.quantity
    assert quantity == engine.sum() == static.sum()
    assert 0 == results["replan"].executed.sum() - engine.sum()  # nothing outside the window
    continuous = quantity - OpeningPlan(day).schedule.trajectory[1:]
    drift = np.abs(np.cumsum(engine) - continuous)
    bound = 0.5 * np.arange(1, drift.size + 1) + 0.5
    assert (drift <= bound).all()
    assert np.abs(np.cumsum(engine) - np.cumsum(static)).max() <= 0.5 * drift.size + 1
    # Not vacuous: the schedule follows the volume curve and the urgency, far from an even split.
    assert np.abs(static - quantity / static.size).max() > 100


def test_on_an_exact_day_the_market_charges_what_the_planner_expects() -> None:
    """With the market's impact equal to the planner's (the square-root law of
    tracker.core.formulation, and its permanent impact PERMANENT_IMPACT, linear as in Almgren and
    Chriss 2000) and nothing deviating, the realized spread + impact of the opening plan equals
    its expected cost (cost_breakdown plus own_permanent_impact) and the timing cost is 0."""
    base = exact_config()
    config = replace(base, costs=replace(base.costs, permanent_impact=PERMANENT_IMPACT))
    scenario = config.scenarios[0]
    day = simulated_day(config, scenario, 0, 4, config.market.profile(config.session))
    result = run_day(day, scenario, config, ["opening-plan"])["opening-plan"]
    realized = result.costs["spread"] + result.costs["temporary"] + result.costs["permanent"]
    assert result.expected_cost == pytest.approx(realized, rel=1e-4)
    assert 0.0 == result.costs["timing"]
    assert result.costs["permanent"] > 0.02 * realized  # the permanent part is not vacuous


def test_the_engine_s_first_plan_is_the_opening_plan() -> None:
    """The expected cost the engine publishes for its first plan (read off the wire) is the
    opening plan's: the same problem through the same solver."""
    config = load_config()
    scenario = config.scenario("normal")
    day = simulated_day(config, scenario, 2, 9, config.market.profile(config.session))
    results = run_day(day, scenario, config, ["replan", "opening-plan"])
    assert results["opening-plan"].expected_cost == pytest.approx(
        results["replan"].expected_cost, rel=1e-5
    )
    assert results["replan"].engine_messages > 2 * (day.order.end - day.order.first) // 2


def test_the_router_never_trades_more_than_the_cap_of_real_volume() -> None:
    """On a day of partial fills and a midday collapse no policy trades more than 20 % of what
    really traded in any bin (the participation cap, common practice)."""
    base = load_config()
    scenario = Scenario(
        "stress",
        fill=(0.7, 1.0),
        windows=base.scenario("midday-collapse").windows,
        day_volume=0.5,
    )
    day = simulated_day(base, scenario, 1, 5, base.market.profile(base.session))
    for name, result in run_day(day, scenario, base, ["replan", "opening-plan", "twap"]).items():
        cap = np.floor(day.order.max_participation * day.volume + 1e-9)
        assert (result.executed <= cap).all(), name
        assert result.unfinished > 0.0, name  # half the volume: the cap binds, so it is tested


def test_scenarios_share_their_base_days() -> None:
    """Common random numbers: a scenario that only halves the volume halves each bin's volume
    of the same day (to the share), and leaves prices and the order alone."""
    config = load_config()
    profile = config.market.profile(config.session)
    normal = simulated_day(config, config.scenario("normal"), 3, 8, profile)
    half = simulated_day(config, config.scenario("half-volume"), 3, 8, profile)
    assert np.abs(half.volume - normal.volume / 2).max() <= 1.0
    assert np.array_equal(normal.vwap, half.vwap)
    assert normal.order == half.order


def test_a_seed_gives_the_same_evaluation() -> None:
    """Determinism: the same seed gives the same numbers; another seed gives other numbers."""
    config = load_config().only(["normal", "partial-fills"])
    first = results_of(evaluate(config, days=3, seed=21))
    second = results_of(evaluate(config, days=3, seed=21))
    other = results_of(evaluate(config, days=3, seed=22))
    assert json.dumps(first, sort_keys=True) == json.dumps(second, sort_keys=True)
    assert json.dumps(first, sort_keys=True) != json.dumps(other, sort_keys=True)


def test_the_report_values_completion_at_zero_one_and_three_times_the_penalty() -> None:
    """The mean shortfall at penalty P is the executed cost plus P times the unfinished share."""
    config = load_config().only(["half-volume"])
    evaluation = evaluate(config, days=4, seed=3, policies=["opening-plan", "constant-rate"])
    results = results_of(evaluation)
    numbers = results["scenarios"][0]["policies"]["constant-rate"]
    samples = evaluation.runs[0].samples["constant-rate"]
    executed = samples.column("executed").mean()
    left = samples.column("unfinished").mean()
    assert [0.0, 50.0, 150.0] == results["penalties_bps"]
    for penalty in (0.0, 50.0, 150.0):
        mean = numbers["shortfall_by_penalty"][f"{penalty:g}"]["mean"]
        assert executed + penalty * left == pytest.approx(mean, rel=1e-12)
    assert left > 0.1  # half the volume at a fixed rate leaves a lot: the penalty matters


# --------------------------------------------------------------------------------------------
# Recorded days


def test_recorded_days_are_replayed_with_a_profile_from_the_days_before() -> None:
    """A history replays as the market: each day's bins are the recording's, and its profile is
    calibrated on the 20 full days before it."""
    frame = simulate_history("X_ZEPH", 26, seed=4)
    config = load_config()
    recorded = read_recorded(frame, "X_ZEPH", config.session)
    days = list(
        history_days(
            config, config.scenario("normal"), recorded, days=3, seed=1, calibration_days=20
        )
    )
    assert 1 <= len(days) <= 3
    for day in days:
        j = recorded.days.index(day.day)
        assert j >= 20
        assert np.array_equal(recorded.values["volume"][j].astype(np.int64), day.volume)
        assert 20 == day.profile.days
    evaluation = evaluate(
        config.only(["normal"]), days=2, seed=1, recorded=recorded, calibration_days=20
    )
    assert "recorded history" == evaluation.source


def test_a_recorded_day_cannot_be_made_exact() -> None:
    """An exact scenario changes the price path, which a recording cannot: a clear error."""
    frame = simulate_history("X_ZEPH", 3, seed=4)
    config = exact_config()
    recorded = read_recorded(frame, "X_ZEPH", config.session)
    with pytest.raises(InputError, match="recorded day cannot"):
        list(
            history_days(config, config.scenarios[0], recorded, days=1, seed=1, calibration_days=1)
        )


# --------------------------------------------------------------------------------------------
# Command line


def test_the_command_writes_json_a_chart_and_markdown(tmp_path: Path) -> None:
    """`tracker evaluate` writes the numbers as JSON, an SVG chart and a Markdown table."""
    out, chart, table = tmp_path / "r.json", tmp_path / "c.svg", tmp_path / "t.md"
    code = main(
        [
            "evaluate",
            "--days",
            "2",
            "--scenario",
            "normal",
            "--seed",
            "5",
            "--json",
            str(out),
            "--chart",
            str(chart),
            "--markdown",
            str(table),
            "--quiet",
        ]
    )
    assert 0 == code
    results = json.loads(out.read_text())
    assert ["replan", "opening-plan", "twap", "constant-rate"] == results["policies"]
    policies = results["scenarios"][0]["policies"]
    assert "paired_vs_opening-plan" in policies["replan"]
    assert math.isfinite(policies["replan"]["shortfall_bps"]["cvar95"])
    assert chart.read_text().lstrip().startswith("<?xml")
    assert "| normal | replan |" in table.read_text()


@pytest.mark.parametrize(
    ("argv", "message"),
    [
        (["--scenario", "nope"], "no scenario 'nope'"),
        (["--policy", "vwap"], "unknown policy 'vwap'"),
        (["--chart", "c.gif"], "--chart"),
        (["--days", "0"], "--days"),
        (["--penalty-bps", "-5"], "--penalty-bps"),
    ],
    ids=["scenario", "policy", "chart", "days", "penalty"],
)
def test_bad_flags_exit_2_with_a_reason(
    argv: list[str], message: str, capsys: pytest.CaptureFixture[str]
) -> None:
    """A bad flag is one line on stderr naming what to fix, and exit code 2."""
    assert 2 == main(["evaluate", "--quiet", *argv])
    assert message in capsys.readouterr().err


def test_write_scenarios_copies_the_shipped_file(tmp_path: Path) -> None:
    """--write-scenarios writes the default file, which reads back as the default."""
    path = tmp_path / "mine.toml"
    assert 0 == main(["evaluate", "--write-scenarios", str(path)])
    assert load_config(path).scenarios == load_config().scenarios


def test_the_forecast_check_finds_no_error_on_an_exact_day() -> None:
    """On a day exactly as forecast the forecast's day scale is the true one (1) at every
    checkpoint: log(forecast / true) is 0 to rounding of the volumes to whole shares."""
    config = exact_config()
    day = simulated_day(config, config.scenarios[0], 0, 4, config.market.profile(config.session))
    errors = scale_errors(day)
    assert ["10:30", "13:00"] == sorted(errors)
    assert max(abs(value) for value in errors.values()) < 1e-4


def test_the_forecast_check_measures_against_the_day_s_true_scale() -> None:
    """On a half-volume day the true scale is half the day's draw, so a forecast that had
    learnt nothing (the profile, scale 1) would show log(1 / scale); the check shows the
    forecast's own error, far smaller by noon."""
    config = load_config()
    scenario = config.scenario("half-volume")
    day = simulated_day(config, scenario, 3, 1, config.market.profile(config.session))
    errors = scale_errors(day)
    assert abs(errors["13:00"]) < 0.5 * abs(math.log(1.0 / day.day_scale))


def test_the_router_works_the_target_s_rate_of_the_real_volume() -> None:
    """When the engine's target carries a participation rate the replan policy's router works
    that rate of the bin's real volume (a router seeing the market; the cap bounds the fills)."""
    config = load_config()
    scenario = config.scenario("half-volume")
    day = simulated_day(config, scenario, 0, 1, config.market.profile(config.session))
    plan = OpeningPlan(day)
    policy = EnginePolicy(plan, Execution(day, scenario, config.costs))
    n = day.order.first
    quantity, rate, cap = policy._targets[n]
    assert rate is not None and cap == day.order.max_participation
    volume = float(day.volume[n])
    assert round(rate * volume) == policy.target(n)
    assert policy.target(n) < quantity  # half the volume: fewer shares than forecast
