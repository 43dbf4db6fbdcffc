"""``tracker plan --problem``: output shapes and one-line errors with exit code 2."""

import json
from pathlib import Path

import pytest

from tracker.cli import main

PROBLEM = {
    "quantity": 100_000,
    "bins": 6,
    "fixed_cost": 0.01,
    "temporary_impact": 1e-4,
    "impact_exponent": 0.5,
    "permanent_impact": 0,
    "inventory_penalty": 1e-7,
    "penalty_exponent": 1.5,
    "terminal_penalty": "force",
    "caps": 30_000,
}


def write(tmp_path: Path, data: object) -> Path:
    path = tmp_path / "problem.json"
    path.write_text(json.dumps(data) if not isinstance(data, str) else data)
    return path


def test_json_output_has_the_contract_fields(
    tmp_path: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    """The JSON form carries status, objective, trajectory, trades, cost, shortfall, policy."""
    code = main(
        ["plan", "--problem", str(write(tmp_path, PROBLEM)), "--format", "json", "--explain"]
    )
    out = json.loads(capsys.readouterr().out)
    assert code == 0
    assert {"status", "objective", "trajectory", "trades", "cost", "shortfall", "policy"} <= set(
        out
    )
    assert len(out["trajectory"]) == 7
    assert {"slope", "r2", "relative_deviation", "grid"} == set(out["policy"])


def test_table_output_lists_every_bin(tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> None:
    """The table form prints one row per bin and the objective."""
    assert main(["plan", "--problem", str(write(tmp_path, PROBLEM))]) == 0
    out = capsys.readouterr().out
    assert "objective" in out
    assert "30,000" in out


BAD = [
    ("missing-field", {k: v for k, v in PROBLEM.items() if k != "caps"}, "caps"),
    ("negative-quantity", {**PROBLEM, "quantity": -5}, "quantity"),
    ("wrong-length", {**PROBLEM, "fixed_cost": [0.01] * 5}, "fixed_cost"),
    ("p-below-one", {**PROBLEM, "penalty_exponent": 0.9}, "penalty_exponent"),
    ("nan", json.dumps(PROBLEM).replace("0.01", "NaN"), "NaN"),
    ("not-json", "{quantity: 5", "not valid JSON"),
    ("nonconvex", {**PROBLEM, "impact_exponent": 1, "permanent_impact": 1}, "permanent_impact"),
]


@pytest.mark.parametrize(
    ("data", "needle"), [(d, n) for _, d, n in BAD], ids=[i for i, _, _ in BAD]
)
def test_bad_file_gives_one_line_and_exit_2(
    tmp_path: Path, capsys: pytest.CaptureFixture[str], data: object, needle: str
) -> None:
    """A bad problem file is one line on stderr naming the problem, and exit code 2."""
    code = main(["plan", "--problem", str(write(tmp_path, data))])
    err = capsys.readouterr().err
    assert code == 2
    assert len(err.strip().splitlines()) == 1
    assert needle in err


def test_missing_file_is_an_input_error(tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> None:
    """A path that does not exist is reported, not a traceback."""
    assert main(["plan", "--problem", str(tmp_path / "nope.json")]) == 2
    assert "cannot read problem file" in capsys.readouterr().err


def test_forced_shortfall_writes_null_objective(
    tmp_path: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    """A forced order the caps cannot complete: JSON says null for the infinite terms."""
    data = {**PROBLEM, "caps": 10_000}  # 6 bins x 10,000 < 100,000 shares
    assert 0 == main(["plan", "--problem", str(write(tmp_path, data)), "--format", "json"])
    out = json.loads(capsys.readouterr().out)
    assert ("capped_shortfall", None, None, 40_000.0) == (
        out["status"],
        out["objective"],
        out["cost"]["terminal_penalty"],
        out["shortfall"],
    )


def test_solver_failure_is_one_line_and_exit_2(
    tmp_path: Path, capsys: pytest.CaptureFixture[str], monkeypatch: pytest.MonkeyPatch
) -> None:
    """A problem the solver cannot solve ends in one line naming it and exit code 2, no trace."""
    import tracker.cli.plan as plan_module
    from tracker.errors import SolveError

    def failing(*args: object, **kwargs: object) -> object:
        raise SolveError("the interior-point method did not converge in 200 iterations")

    monkeypatch.setattr(plan_module, "solve", failing)
    path = tmp_path / "problem.json"
    path.write_text(
        json.dumps(
            {
                "quantity": 1000,
                "bins": 4,
                "fixed_cost": 0.01,
                "temporary_impact": 0.001,
                "impact_exponent": 0.5,
                "permanent_impact": 0.0,
                "inventory_penalty": 1e-6,
                "penalty_exponent": 1.5,
                "terminal_penalty": "force",
                "caps": None,
            }
        )
    )
    assert 2 == main(["plan", "--problem", str(path)])
    err = capsys.readouterr().err
    assert 1 == len(err.strip().splitlines())
    assert "could not solve" in err
