"""Command line: simulate history, calibrate, and plan an order on the profile."""

from __future__ import annotations

import json
from pathlib import Path

import pytest

from tracker.cli import CAUTION, main

REPO = Path(__file__).resolve().parent.parent
SHIPPED = REPO / "replay_data" / "history-X_ZEPH.csv"

ORDER = {
    "type": "order",
    "action": "new",
    "order_id": "X_ZEPH-7",
    "symbol": "X_ZEPH",
    "side": "sell",
    "quantity": 120_000,
    "start": "2026-03-02T15:02:00Z",
    "end": "2026-03-02T21:00:00Z",
    "max_participation": 0.2,
    "urgency": "medium",
    "ts": "2026-03-02T15:00:00Z",
}


@pytest.fixture
def history(tmp_path: Path) -> Path:
    """A 5-day invented history written by `tracker simulate history`."""
    path = tmp_path / "history.csv"
    assert 0 == main(
        ["simulate", "history", "--symbol", "X_ZEPH", "--days", "5", "--seed", "3", "-o", str(path)]
    )
    return path


@pytest.fixture
def profile(history: Path, tmp_path: Path) -> Path:
    """The profile calibrated from it."""
    path = tmp_path / "profile.json"
    assert 0 == main(["calibrate", str(history), "--symbol", "X_ZEPH", "-o", str(path)])
    return path


def test_simulated_history_says_it_is_invented(history: Path) -> None:
    """The first line of a simulated CSV is a comment saying the data is invented."""
    first = history.read_text(encoding="utf-8").splitlines()[0]
    assert (first.startswith("# Invented data"), "invented venue" in first) == (True, True)


def test_profile_has_the_documented_fields(profile: Path) -> None:
    """PROFILE.json has symbol, session, one object per bin, ADV, days and quality."""
    data = json.loads(profile.read_text(encoding="utf-8"))
    expected = (
        "X_ZEPH",
        {"start": "09:30", "end": "16:00", "timezone": "America/New_York", "bin_minutes": 5},
        78,
        {"start", "volume_share", "spread", "volatility"},
        5,
    )
    actual = (
        data["symbol"],
        data["session"],
        len(data["bins"]),
        set(data["bins"][0]),
        data["days"],
    )
    assert expected == actual


def test_bad_row_reported_with_its_file_line(
    history: Path, tmp_path: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    """A bad row is reported with its line in the file (the comment line counted)."""
    lines = history.read_text(encoding="utf-8").splitlines()
    fields = lines[10].split(",")
    fields[2] = "-5"  # volume of the 9th data row, line 11 of the file
    lines[10] = ",".join(fields)
    bad = tmp_path / "bad.csv"
    bad.write_text("\n".join(lines) + "\n", encoding="utf-8")
    code = main(["calibrate", str(bad), "--symbol", "X_ZEPH", "-o", str(tmp_path / "p.json")])
    expected = (0, "line 11: volume must be >= 0 shares (row skipped)")
    assert expected == (code, capsys.readouterr().err.splitlines()[0])


def test_parquet_history(tmp_path: Path) -> None:
    """A Parquet history calibrates like a CSV one."""
    path = tmp_path / "history.parquet"
    assert 0 == main(["simulate", "history", "--days", "3", "-o", str(path)])
    assert 0 == main(["calibrate", str(path), "--symbol", "X_ZEPH", "-o", str(tmp_path / "p.json")])


def test_missing_history_is_exit_2(tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> None:
    """A history file that does not exist is a one-line error and exit code 2."""
    code = main(["calibrate", str(tmp_path / "nope.csv"), "--symbol", "X_ZEPH", "-o", "p.json"])
    assert (2, True) == (code, "does not exist" in capsys.readouterr().err)


def test_wrong_session_is_exit_2(
    history: Path, tmp_path: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    """A bin length that does not divide the session names the flag's field."""
    code = main(
        [
            "calibrate",
            str(history),
            "--symbol",
            "X_ZEPH",
            "-o",
            str(tmp_path / "p.json"),
            "--bin-minutes",
            "7",
        ]
    )
    assert (2, True) == (code, "session.bin_minutes" in capsys.readouterr().err)


def test_shipped_history_calibrates(tmp_path: Path) -> None:
    """The invented history in replay_data/ calibrates despite its comment line."""
    out = tmp_path / "p.json"
    assert 0 == main(["calibrate", str(SHIPPED), "--symbol", "X_ZEPH", "-o", str(out)])
    assert 20 == json.loads(out.read_text(encoding="utf-8"))["days"]


def _plan_json(
    profile: Path, tmp_path: Path, capsys: pytest.CaptureFixture[str], order: dict[str, object]
) -> dict[str, object]:
    path = tmp_path / "order.json"
    path.write_text(json.dumps(order), encoding="utf-8")
    code = main(
        [
            "plan",
            "--order",
            str(path),
            "--profile",
            str(profile),
            "--arrival-price",
            "42",
            "--format",
            "json",
        ]
    )
    assert 0 == code
    result: dict[str, object] = json.loads(capsys.readouterr().out)
    return result


def test_plan_order_json_shape(
    profile: Path, tmp_path: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    """The JSON plan has bins with start/end/quantity/participation/inventory_after and costs."""
    plan = _plan_json(profile, tmp_path, capsys, ORDER)
    bins = plan["bins"]
    cost = plan["expected_cost"]
    assert isinstance(bins, list) and isinstance(cost, dict)
    expected = (
        {"start", "end", "quantity", "participation", "inventory_after"},
        "2026-03-02T10:02:00-05:00",
        120_000,
        {"currency", "bps", "breakdown"},
        {"spread", "impact", "risk", "completion"},
    )
    actual = (
        {"start", "end", "quantity", "participation", "inventory_after"} & set(bins[0]),
        bins[0]["start"],
        sum(b["quantity"] for b in bins),
        set(cost),
        set(cost["breakdown"]),
    )
    assert expected == actual


def test_plan_order_table_has_totals(
    profile: Path, tmp_path: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    """The table form ends with the expected cost in currency and bps and its breakdown."""
    path = tmp_path / "order.json"
    path.write_text(json.dumps({**ORDER, "arrival_price": 42.0}), encoding="utf-8")
    assert 0 == main(["plan", "--order", str(path), "--profile", str(profile)])
    out = capsys.readouterr().out
    assert ("bps" in out, "impact" in out, "shares to sell" in out) == (True, True, True)


def test_plan_order_needs_an_arrival_price(
    profile: Path, tmp_path: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    """Without --arrival-price or arrival_price in the order: exit 2 naming arrival_price."""
    path = tmp_path / "order.json"
    path.write_text(json.dumps(ORDER), encoding="utf-8")
    code = main(["plan", "--order", str(path), "--profile", str(profile)])
    assert (2, True) == (code, "arrival_price" in capsys.readouterr().err)


def test_plan_order_rejects_profile_of_other_symbol(
    profile: Path, tmp_path: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    """An order for X_KALO with X_ZEPH's profile is refused with a reason."""
    path = tmp_path / "order.json"
    path.write_text(
        json.dumps({**ORDER, "symbol": "X_KALO", "order_id": "X_KALO-1"}), encoding="utf-8"
    )
    code = main(["plan", "--order", str(path), "--profile", str(profile), "--arrival-price", "9"])
    assert (2, True) == (code, "symbol" in capsys.readouterr().err)


def test_plan_order_bad_message_is_exit_2(
    profile: Path, tmp_path: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    """An order message with a bad side is refused (wire validation) with exit code 2."""
    path = tmp_path / "order.json"
    path.write_text(json.dumps({**ORDER, "side": "short"}), encoding="utf-8")
    code = main(["plan", "--order", str(path), "--profile", str(profile), "--arrival-price", "9"])
    assert (2, True) == (code, "side" in capsys.readouterr().err)


@pytest.mark.parametrize(
    "argv",
    [["calibrate"], ["simulate", "history"], ["plan"]],
    ids=["calibrate", "simulate-history", "plan"],
)
def test_help_carries_the_caution(argv: list[str], capsys: pytest.CaptureFixture[str]) -> None:
    """Every command's --help ends with the caution."""
    with pytest.raises(SystemExit):
        main([*argv, "--help"])
    text = " ".join(capsys.readouterr().out.split())
    assert " ".join(CAUTION.split()) in text


def test_plan_help_states_preference_units(capsys: pytest.CaptureFixture[str]) -> None:
    """`tracker plan --help` states the preferences, their units and the presets."""
    with pytest.raises(SystemExit):
        main(["plan", "--help"])
    text = " ".join(capsys.readouterr().out.split())
    assert ("risk_aversion" in text, "1/currency" in text, "low 10" in text) == (True, True, True)
