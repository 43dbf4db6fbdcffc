"""The README's promises that a machine can check."""

from datetime import date
from pathlib import Path

ROOT = Path(__file__).resolve().parent.parent


def readme_commands() -> list[str]:
    """The shell commands in the README's set-up section, in order."""
    text = (ROOT / "README.md").read_text()
    section = text.split("## Set-up", 1)[1].split("\n## ", 1)[0]
    blocks = section.split("```")[1::2]
    return [
        line
        for block in blocks
        for line in block.splitlines()
        if line and not line.startswith(("sh", "#"))
    ]


def test_readme_gives_run_and_test_commands() -> None:
    """The set-up section has exactly two commands: run the demo, run the tests."""
    commands = readme_commands()
    assert len(commands) == 2
    assert commands[0].endswith("tracker demo")
    assert commands[1].endswith("python -m pytest")


def test_ci_runs_the_readme_test_command() -> None:
    """.ci/run runs the README's test command verbatim."""
    ci = (ROOT / ".ci" / "run").read_text().splitlines()
    assert readme_commands()[1] in ci


def test_readme_carries_the_cautions() -> None:
    """The README says the tool advises only, is supervised, is no advice, and defers to risk."""
    text = (ROOT / "README.md").read_text().lower()
    for phrase in (
        "does not place orders",
        "supervised",
        "not investment advice",
        "risk controls",
        "regulation",
    ):
        assert phrase in text


def test_readme_example_order_is_a_whole_session_near_the_demo_price() -> None:
    """The README's example order decodes, spans exactly the session's 78 bins in New York time
    (09:30-16:00, daylight saving time included: common practice for US equities) and names an
    arrival price within 5 % of X_ZEPH's first bin on that day of the invented recording shipped
    beside it."""
    import json

    from tracker.core.session import Session
    from tracker.edge.wire import decode

    text = (ROOT / "README.md").read_text()
    block = text.split("with an `order.json` such as", 1)[1].split("```json", 1)[1].split("```")[0]
    order = decode("tracker/orders/X_ZEPH-B1", json.loads(block))
    first, end, fraction = Session().bin_span(order.start, order.end)  # type: ignore[attr-defined]
    assert (0, 78, 1.0) == (first, end, fraction)
    day = ROOT / "replay_data" / "day-2026-03-10-seed7.jsonl"
    lines = [json.loads(line) for line in day.read_text().splitlines() if line.strip()]
    first_bin = next(line["payload"] for line in lines if line["topic"].endswith("/bins/X_ZEPH"))
    assert order.start.date() == date.fromisoformat(first_bin["start"][:10])  # type: ignore[attr-defined]
    assert abs(order.arrival_price / first_bin["open"] - 1) < 0.05  # type: ignore[attr-defined]
