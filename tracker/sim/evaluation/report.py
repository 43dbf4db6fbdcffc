"""The report of an evaluation: two tables for the terminal, a JSON file and a chart.

Everything here reads the object of :func:`tracker.sim.evaluation.runner.results_of` (plus the
per-day samples for the chart), so the three outputs always show the same numbers.
"""

from __future__ import annotations

import json
import math
from pathlib import Path
from typing import Any

import numpy as np

from tracker.core.formats import rounded
from tracker.errors import InputError
from tracker.sim.evaluation.policies import BASELINE
from tracker.sim.evaluation.runner import RESIDUAL_THRESHOLD, Evaluation

#: Chart file extensions matplotlib writes for us.
CHART_FORMATS = (".svg", ".png", ".pdf")


def _pm(mean: float | None, error: float | None, digits: int = 1) -> str:
    if mean is None:
        return "-"
    if error is None or not math.isfinite(error):
        return f"{mean:.{digits}f}"
    return f"{mean:.{digits}f} ± {error:.{digits}f}"


def _table(title: str, headers: tuple[str, ...]) -> Any:
    from rich.table import Table

    table = Table(title=title, title_justify="left")
    for header in headers:
        table.add_column(header, justify="left" if header in ("scenario", "policy") else "right")
    return table


def tables(results: dict[str, Any]) -> list[Any]:
    """Three rich tables: cost and completion; penalties and paired differences; the model."""
    penalty = results["penalty_bps"]
    low, _, high = (f"{p:g}" for p in results["penalties_bps"])
    key = f"{penalty:g}"
    costs = _table(
        f"Implementation shortfall against arrival, bps (unfinished shares at {penalty:g} bps; "
        "mean ± standard error)",
        ("scenario", "policy", "shortfall", "sd", "CVaR 95%", "left %", "days >1% left"),
    )
    deltas = _table(
        f"Mean shortfall by the value of an unfinished share, and paired differences against "
        f"the {BASELINE} (same days), bps",
        (
            "scenario",
            "policy",
            f"at {low}",
            f"at {key}",
            f"at {high}",
            f"Δ at {low}",
            f"Δ at {key}",
            f"Δ at {high}",
        ),
    )
    model = _table(
        "The plan's model against what happened: spread + impact (s+i) and timing risk, bps",
        (
            "scenario",
            "policy",
            "expected s+i",
            "realized s+i",
            "ratio",
            "per-day ratio sd",
            "timing sd implied",
            "timing sd realized",
        ),
    )
    for scenario in results["scenarios"]:
        first = True
        for name, numbers in scenario["policies"].items():
            label = scenario["name"] if first else ""
            first = False
            shortfall = numbers["shortfall_bps"]
            by_penalty = numbers["shortfall_by_penalty"]
            paired = numbers.get(f"paired_vs_{BASELINE}")

            def delta(at: str, paired: Any = paired) -> str:
                return "-" if paired is None else _pm(paired[at]["mean"], paired[at]["se"], 2)

            costs.add_row(
                label,
                name,
                _pm(shortfall["mean"], shortfall["se"]),
                f"{shortfall['sd']:.1f}",
                f"{shortfall['cvar95']:.1f}",
                f"{numbers['unfinished']['mean_pct']:.2f}",
                str(numbers["unfinished"]["days_over_1pct"]),
            )
            deltas.add_row(
                label,
                name,
                *(_pm(by_penalty[at]["mean"], by_penalty[at]["se"]) for at in (low, key, high)),
                *(delta(at) for at in (low, key, high)),
            )
            check = numbers["model"]
            realized = check["realized_spread_impact_bps"]
            ratio_sd = check["ratio_per_day"]["sd"]
            model.add_row(
                label,
                name,
                f"{check['expected_spread_impact_bps']:.1f}",
                _pm(realized["mean"], realized["se"]),
                "-" if check["ratio"] is None else f"{check['ratio']:.3f}",
                "-" if ratio_sd is None else f"{ratio_sd:.3f}",
                f"{check['implied_timing_sd_bps']:.1f}",
                f"{check['realized_timing_sd_bps']:.1f}",
            )
        for table in (costs, deltas, model):
            table.add_section()
    scale = _table(
        "The forecast of the day's volume scale: log(forecast / true scale), mean ± se "
        "(mean absolute)",
        ("scenario", *_checkpoints(results)),
    )
    for scenario in results["scenarios"]:
        errors = scenario.get("forecast_scale_error", {})
        if errors:
            scale.add_row(
                scenario["name"], *(_scale_cell(errors.get(at)) for at in _checkpoints(results))
            )
    return [costs, deltas, model, scale] if scale.row_count else [costs, deltas, model]


def _checkpoints(results: dict[str, Any]) -> list[str]:
    """The forecast checkpoints the results have, in time order."""
    labels = {at for s in results["scenarios"] for at in s.get("forecast_scale_error", {})}
    return sorted(labels)


def _scale_cell(error: dict[str, Any] | None) -> str:
    if error is None:
        return "-"
    return f"{_pm(error['mean'], error['se'], 3)} ({error['mean_abs']:.3f})"


def markdown(results: dict[str, Any]) -> str:
    """The costs table as Markdown (for a README or a review)."""
    penalty = results["penalty_bps"]
    low, _, high = (f"{p:g}" for p in results["penalties_bps"])
    key = f"{penalty:g}"
    lines = [
        f"| scenario | policy | shortfall | sd | CVaR 95% | left % | days >1% left | at {low} | "
        f"at {high} | Δ vs {BASELINE} | Δ at {low} | Δ at {high} | expected s+i | realized s+i | "
        "timing sd implied / realized |",
        "|---|---|---:|---:|---:|---:|---:|---:|---:|---:|---:|---:|---:|---:|---:|",
    ]
    for scenario in results["scenarios"]:
        for name, numbers in scenario["policies"].items():
            shortfall = numbers["shortfall_bps"]
            by_penalty = numbers["shortfall_by_penalty"]
            paired = numbers.get(f"paired_vs_{BASELINE}")
            check = numbers["model"]
            realized = check["realized_spread_impact_bps"]

            def delta(at: str, paired: Any = paired) -> str:
                return "-" if paired is None else _pm(paired[at]["mean"], paired[at]["se"], 2)

            lines.append(
                f"| {scenario['name']} | {name} | {_pm(shortfall['mean'], shortfall['se'])} | "
                f"{shortfall['sd']:.1f} | {shortfall['cvar95']:.1f} | "
                f"{numbers['unfinished']['mean_pct']:.2f} | "
                f"{numbers['unfinished']['days_over_1pct']} | "
                f"{_pm(by_penalty[low]['mean'], by_penalty[low]['se'])} | "
                f"{_pm(by_penalty[high]['mean'], by_penalty[high]['se'])} | {delta(key)} | "
                f"{delta(low)} | {delta(high)} | {check['expected_spread_impact_bps']:.1f} | "
                f"{_pm(realized['mean'], realized['se'])} | "
                f"{check['implied_timing_sd_bps']:.1f} / {check['realized_timing_sd_bps']:.1f} |"
            )
    checkpoints = _checkpoints(results)
    if checkpoints:
        lines += [
            "",
            "| scenario | " + " | ".join(f"scale error at {at}" for at in checkpoints) + " |",
            "|---|" + "---:|" * len(checkpoints),
        ]
        for scenario in results["scenarios"]:
            errors = scenario.get("forecast_scale_error", {})
            cells = " | ".join(_scale_cell(errors.get(at)) for at in checkpoints)
            lines.append(f"| {scenario['name']} | {cells} |")
    return "\n".join(lines) + "\n"


def write_json(results: dict[str, Any], path: Path) -> None:
    """Write the results as indented JSON (floats rounded to 6 decimals, keys sorted).

    Raises:
        InputError: the file cannot be written.
    """
    text = json.dumps(rounded(results), indent=2, sort_keys=True, allow_nan=False) + "\n"
    try:
        path.write_text(text, encoding="utf-8")
    except OSError as exc:
        raise InputError(
            f"cannot write {str(path)!r}: {exc.strerror or exc}", field="--json"
        ) from exc


def write_chart(evaluation: Evaluation, path: Path) -> None:
    """A chart per scenario: the cost/risk plane per policy, and the residual distributions.

    Left: each policy's mean shortfall (at the stated penalty) against its standard deviation,
    with the standard error as a bar. Right: the share of days on which more than x % of the
    order was left unfinished, against x (a survival curve per policy). SVG, PNG or PDF by the
    extension of ``path``; matplotlib is imported here, only when a chart is asked for.

    Raises:
        InputError: an extension matplotlib cannot write, matplotlib is missing, or the file
            cannot be written.
    """
    if path.suffix.lower() not in CHART_FORMATS:
        raise InputError(
            f"must end in {', '.join(CHART_FORMATS)} (the format); got {path.name!r}",
            field="--chart",
        )
    try:
        import matplotlib

        matplotlib.use("Agg")
        import matplotlib.pyplot as plt
    except ImportError as exc:
        raise InputError(
            "needs matplotlib, which is not installed; install it (pip install matplotlib) or "
            "leave out --chart",
            field="--chart",
        ) from exc

    penalty = evaluation.config.costs.penalty_bps
    runs = evaluation.runs
    figure, axes = plt.subplots(
        len(runs), 2, figsize=(11, 3.6 * len(runs)), squeeze=False, constrained_layout=True
    )
    colours = plt.get_cmap("tab10")
    for row, run in enumerate(runs):
        plane, residual = axes[row]
        for k, (name, samples) in enumerate(run.samples.items()):
            shortfall = samples.shortfall(penalty)
            colour = colours(k)
            mean, spread = float(shortfall.mean()), float(np.std(shortfall, ddof=1))
            error = spread / math.sqrt(shortfall.size) if shortfall.size > 1 else 0.0
            plane.errorbar(spread, mean, yerr=error, fmt="o", color=colour, capsize=3, label=name)
            left = np.sort(samples.column("unfinished") * 100.0)
            grid = np.linspace(0.0, max(float(left.max()), 2.0), 200)
            share = 1.0 - np.searchsorted(left, grid, side="right") / left.size
            residual.step(grid, share * 100.0, where="post", color=colour, label=name)
        plane.set_title(f"{run.scenario.name}: cost against risk (bars: standard error)")
        plane.set_xlabel("sd of shortfall, bps")
        plane.set_ylabel(f"mean shortfall, bps (unfinished at {penalty:g} bps)")
        plane.grid(alpha=0.3)
        plane.legend(fontsize="small")
        residual.set_title(f"{run.scenario.name}: what is left at the end")
        residual.set_xlabel("x, % of the order left unfinished")
        residual.set_ylabel("% of days with more than x left")
        residual.axvline(RESIDUAL_THRESHOLD * 100.0, color="grey", linestyle=":", linewidth=1)
        residual.grid(alpha=0.3)
        residual.legend(fontsize="small")
    figure.suptitle(
        f"tracker evaluate: {evaluation.source} days (invented market), seed {evaluation.seed}"
    )
    try:
        figure.savefig(path, metadata=_chart_metadata(path))
    except OSError as exc:
        raise InputError(
            f"cannot write {str(path)!r}: {exc.strerror or exc}", field="--chart"
        ) from exc
    finally:
        plt.close(figure)


def _chart_metadata(path: Path) -> dict[str, Any]:
    """No creation date in the file, so the same run writes the same chart."""
    suffix = path.suffix.lower()
    if suffix == ".svg":
        return {"Date": None}
    if suffix == ".pdf":
        return {"CreationDate": None}
    return {}
