"""``tracker replay``: run the engine on a recorded day and write what it said."""

from __future__ import annotations

import argparse
import sys
from collections.abc import Callable, Iterator
from contextlib import contextmanager
from pathlib import Path
from typing import Any

from tracker.core.topics import DEFAULT_ROOT

DESCRIPTION = """\
Replay a recorded day through the engine, deterministically, and write its outputs.

INPUT is a JSON Lines file, one {"topic": ..., "payload": ..., "ts": ...} per line (payload: the
message object, or its raw text), or a SQLite journal written by the daemon (told by its header).
DIR receives targets.jsonl, alerts.jsonl, status.jsonl, errors.jsonl (one wire-contract message per
line) and summary.json (per order: quantity, filled, average price, arrival price, implementation
shortfall and slippage to the interval VWAP in basis points, alert counts by code, final state).
Two runs on the same input write byte-identical files.

DIR also receives acks.jsonl (the one reply to each order message).

Every malformed or invalid line becomes one record in errors.jsonl with its 1-based line number
and a reason; the replay goes on. An exact copy of an accepted message (a redelivery) is skipped.
A line whose time goes backwards is applied at the latest time seen, with an info record
(--sort sorts the recording by time first). When the input holds no tick lines, ticks are derived
from the lines' times every --tick-seconds.

A journal describes itself (the daemon's root, engine settings and profiles, and any change of
them during the day): replayed with no other flag, it reproduces what the daemon published,
message for message. --root, --config or --profiles that disagree with the journal are refused,
unless --what-if asks to replay with them instead (the summary then says so under "what_if").

A journal is replayed from its first record; a new day's journal (the daemon keeps one per day)
from the day before's state it carries as a snapshot. --from-snapshot starts instead from the newest
snapshot of the state the daemon stored in it (or the newest at or before record SEQ) and replays
only the records after it: DIR then holds the outputs of those records, the very bytes a replay
from the first record gives for them, and the same summary.json. A snapshot is loaded only when
it was written by this very tracker (same version and source); a journal is the daemon's own
file: open only journals you trust (a snapshot is a Python pickle).
"""


def register(subparsers: argparse._SubParsersAction[argparse.ArgumentParser]) -> None:
    """Add the ``replay`` sub-command."""
    from tracker.cli import CAUTION
    from tracker.edge.intake import DEFAULT_TICK_SECONDS

    parser = subparsers.add_parser(
        "replay",
        help="replay recorded messages through the engine and write its outputs",
        description=DESCRIPTION,
        epilog=CAUTION,
        formatter_class=argparse.RawDescriptionHelpFormatter,
    )
    parser.add_argument("input", metavar="INPUT", help="JSON Lines recording or SQLite journal")
    parser.add_argument(
        "--out", "-o", metavar="DIR", required=True, help="folder for the output files"
    )
    parser.add_argument(
        "--profiles",
        metavar="DIR",
        help="folder of liquidity profiles, one SYMBOL.json per symbol as `tracker calibrate` "
        "writes them; a symbol without one runs on the stated default profile (with an alert)",
    )
    parser.add_argument(
        "--config",
        metavar="FILE",
        help="engine thresholds, a TOML or JSON file (keys as in EngineConfig); defaults otherwise",
    )
    parser.add_argument(
        "--root",
        help="MQTT topic root of the recording (default: the [daemon] root of --config, else "
        "tracker)",
    )
    parser.add_argument(
        "--tick-seconds",
        type=float,
        default=DEFAULT_TICK_SECONDS,
        metavar="S",
        help="interval of ticks derived from the lines' times when the input has no tick lines "
        f"(seconds, default: {DEFAULT_TICK_SECONDS:g})",
    )
    parser.add_argument(
        "--sort",
        action="store_true",
        help="sort the recording by its lines' ts before replaying it (a recording merged from "
        "several capture points); without it, a line whose time goes backwards is applied at "
        "the latest time seen",
    )
    parser.add_argument(
        "--what-if",
        action="store_true",
        help="replay a journal with --root/--config/--profiles that differ from the ones it "
        "records (labelled as a what-if in summary.json) instead of refusing them",
    )
    parser.add_argument(
        "--from-snapshot",
        nargs="?",
        const="latest",
        metavar="SEQ",
        help="journal only: start from the newest snapshot of the state stored in it (or the "
        "newest at or before record SEQ) and replay only the records after it",
    )
    parser.add_argument(
        "--progress",
        action=argparse.BooleanOptionalAction,
        default=None,
        help="show a progress bar on stderr (default: only when stderr is a terminal)",
    )
    parser.set_defaults(handler=run)


def run(args: argparse.Namespace) -> int:
    """Replay INPUT into DIR; print a one-line account; return 0."""
    from tracker.edge.recordings import BadLine
    from tracker.edge.records import Record
    from tracker.shell.config import validate_root
    from tracker.shell.files import load_engine_config, load_profiles
    from tracker.shell.journal import read_journal, read_setup
    from tracker.shell.replay import read_input, replay, write_outputs
    from tracker.shell.setup import later_changes, plan_replay

    config, config_root = load_engine_config(Path(args.config)) if args.config else (None, None)
    given_root = args.root or config_root
    if given_root is not None:
        given_root = validate_root(given_root, field="--root")
    path = Path(args.input)
    plan = plan_replay(
        path,
        root=given_root,
        config=config,
        profiles=load_profiles(Path(args.profiles)) if args.profiles else None,
        what_if=args.what_if,
        default_root=DEFAULT_ROOT,
    )
    engine, root, changes, what_if = plan.engine, plan.root, plan.changes, plan.what_if
    intake = None
    carried = _carried(path)
    if args.from_snapshot is None and carried:
        args.from_snapshot = str(carried)  # a new day's journal starts from the day before's state
    if args.from_snapshot is not None:
        restored = _restored(args, path, what_if is not None)
        intake, engine = restored.intake, restored.intake.engine
        changes = later_changes(read_setup(path), engine, restored.setup_id)
        records: list[Record | BadLine] = list(read_journal(path, after=restored.after_seq))
    else:
        records = list(read_input(path))
    show = stderr_is_terminal() if args.progress is None else bool(args.progress)
    with _progress_bar(len(records), show) as advance:
        result = replay(
            records,
            engine,
            root,
            tick_seconds=args.tick_seconds,
            sort=args.sort,
            changes=changes,
            progress=advance,
            intake=intake,
        )
    if what_if is not None:
        result.summary["what_if"] = what_if
    write_outputs(result, Path(args.out))
    counts = result.summary.get("replay", {})
    if intake is not None:
        print(f"from the snapshot after record {restored.after_seq}: {len(records)} records")
    print(
        f"replayed {counts.get('lines', 0)} lines: {counts.get('accepted', 0)} accepted, "
        f"{counts.get('rejected', 0)} rejected, {counts.get('redelivered', 0)} redelivered; "
        f"{len(result.targets)} targets, {len(result.alerts)} alerts, "
        f"{len(result.errors)} errors -> {args.out}"
    )
    return 0


def _carried(path: Path) -> int:
    """The record a new day's journal goes on from (0: a journal that starts afresh, or not a
    journal)."""
    from tracker.shell.journal import read_base_seq
    from tracker.shell.replay import is_journal

    return read_base_seq(path) if is_journal(path) else 0


def _restored(args: argparse.Namespace, path: Path, what_if: bool) -> Any:
    """The snapshot --from-snapshot asks for (:func:`tracker.shell.replay.restore`)."""
    from tracker.errors import InputError
    from tracker.shell.replay import is_journal, restore

    if not is_journal(path):
        raise InputError(
            "only a journal holds snapshots; replay a JSON Lines recording from its first line",
            field="--from-snapshot",
        )
    if what_if or args.sort:
        raise InputError(
            "a snapshot holds the state as the journal's setup made it, in the journal's order: "
            "replay from the first record to use --what-if or --sort",
            field="--from-snapshot",
        )
    at = None
    if args.from_snapshot != "latest":
        try:
            at = int(args.from_snapshot)
        except ValueError:
            raise InputError(
                f"must be a record number (or nothing, for the newest); got {args.from_snapshot!r}",
                field="--from-snapshot",
            ) from None
    carried = _carried(path)
    if at is not None and at < carried:
        raise InputError(
            f"{path} starts after record {carried} (a new day's journal); give a record from "
            f"{carried} on",
            field="--from-snapshot",
        )
    try:
        return restore(path, at=at)
    except InputError as exc:
        if not carried:
            raise
        raise InputError(
            f"{path} goes on from the day before's state, carried as a snapshot after record "
            f"{carried}, and that cannot be used here ({exc}); replay it with the tracker version "
            "that wrote it",
            field="--from-snapshot",
        ) from exc


@contextmanager
def _progress_bar(total: int, show: bool) -> Iterator[Callable[[int], None] | None]:
    """A rich progress bar on stderr, or nothing."""
    if not show:
        yield None
        return
    from rich.console import Console
    from rich.progress import BarColumn, MofNCompleteColumn, Progress, TimeRemainingColumn

    console = Console(stderr=True)
    with Progress(
        "replaying",
        BarColumn(),
        MofNCompleteColumn(),
        TimeRemainingColumn(),
        console=console,
        transient=console.is_terminal,  # a log file keeps the final bar
    ) as bar:
        task = bar.add_task("replay", total=total)

        def advance(done: int) -> None:
            bar.update(task, completed=done)

        yield advance


def stderr_is_terminal() -> bool:
    """Whether stderr is a terminal (the progress bar shows only then, unless asked for)."""
    return sys.stderr.isatty()
