"""The README's promises that a machine can check."""

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
