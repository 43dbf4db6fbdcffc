"""``tracker journal``: look into the daemon's journal and export it as a replay file."""

from __future__ import annotations

import argparse
import json
import sys
from collections.abc import Iterable
from pathlib import Path
from typing import Any

from tracker.edge.records import Record, compact_json
from tracker.errors import InputError

DESCRIPTION = """\
Work with the journal that `tracker run` writes (SQLite; every inbound message and tick, in the
order the engine saw them).

  export JOURNAL -o FILE.jsonl   one {"topic", "payload", "ts"} line per record, for review or as a
                                 regression fixture; `tracker replay FILE.jsonl` gives the same
                                 outputs as `tracker replay JOURNAL`
  info JOURNAL                   how many records, of which kinds, the time span, what was published
"""


def register(subparsers: argparse._SubParsersAction[argparse.ArgumentParser]) -> None:
    """Add the ``journal`` sub-command and its actions."""
    from tracker.cli import CAUTION

    parser = subparsers.add_parser(
        "journal",
        help="export or inspect the daemon's journal",
        description=DESCRIPTION,
        epilog=CAUTION,
        formatter_class=argparse.RawDescriptionHelpFormatter,
    )
    actions = parser.add_subparsers(dest="action", metavar="ACTION", required=True)
    export = actions.add_parser(
        "export",
        help="write the journal as a JSON Lines replay file",
        description="Write the journal as a JSON Lines replay file: one "
        '{"topic", "payload", "ts"} line per record, in order. The payload is the message '
        "object when that is exactly how it arrived (compact JSON), otherwise its raw text, so a "
        "replay of the file reproduces a replay of the journal.",
        epilog=CAUTION,
    )
    export.add_argument("journal", metavar="JOURNAL", help="the journal file")
    export.add_argument("-o", "--out", metavar="FILE", required=True, help="the .jsonl to write")
    export.set_defaults(handler=run_export)
    info = actions.add_parser(
        "info", help="summarise a journal", description="Summarise a journal.", epilog=CAUTION
    )
    info.add_argument("journal", metavar="JOURNAL", help="the journal file")
    info.set_defaults(handler=run_info)


def export_payload(payload: bytes) -> tuple[Any, bool]:
    """The payload as a replay line carries it, and whether that is exact.

    A payload that is UTF-8 compact JSON of one object (what the JSON encoders of our senders
    write) becomes the object itself, which reads best. Anything else -- spaced JSON, malformed
    text, NaN -- stays raw text, so a replay rejects it with the same reason as the daemon did.
    Bytes that are not UTF-8 cannot go into a JSON line as they are: they become text with
    U+FFFD replacement characters, and the export is then not exact for that record.
    """
    try:
        text = payload.decode("utf-8")
    except UnicodeDecodeError:
        return payload.decode("utf-8", errors="replace"), False
    try:
        parsed = json.loads(text, parse_constant=_no_constants)
    except (ValueError, RecursionError):
        return text, True
    if isinstance(parsed, dict) and compact_json(parsed) == text:
        return parsed, True
    return text, True


def _no_constants(name: str) -> Any:
    raise ValueError(name)


def export_lines(records: Iterable[Record]) -> Iterable[tuple[str, bool]]:
    """One replay line per journal record (without newline), and whether it is exact."""
    for record in records:
        payload = record.payload
        if isinstance(payload, bytes):
            value, exact = export_payload(payload)
        else:
            value, exact = payload, True
        line = {"topic": record.topic, "payload": value, "ts": record.ts}
        yield compact_json(line), exact


def run_export(args: argparse.Namespace) -> int:
    """Export JOURNAL to FILE; print how many lines; return 0."""
    from tracker.shell.journal import read_journal

    out = Path(args.out)
    count = inexact = 0
    try:
        out.parent.mkdir(parents=True, exist_ok=True)
        with open(out, "w", encoding="utf-8") as handle:
            for line, exact in export_lines(read_journal(args.journal)):
                handle.write(line + "\n")
                count += 1
                inexact += not exact
    except OSError as exc:
        raise InputError(f"cannot write {out}: {exc.strerror}", field="--out") from exc
    print(f"exported {count} records from {args.journal} -> {out}")
    if inexact:
        print(
            f"note: {inexact} payloads were not UTF-8 and were written with replacement "
            "characters; a replay of the export can differ from the journal on those lines",
            file=sys.stderr,
        )
    return 0


def run_info(args: argparse.Namespace) -> int:
    """Print a short account of JOURNAL; return 0."""
    from tracker.shell.journal import published_through, read_journal

    kinds: dict[str, int] = {}
    first = last = None
    count = 0
    for record in read_journal(args.journal):
        count += 1
        parts = record.topic.split("/")
        kind = parts[1] if len(parts) > 1 else record.topic
        kinds[kind] = kinds.get(kind, 0) + 1
        first = first or record.ts
        last = record.ts
    published = published_through(args.journal)
    print(f"{args.journal}: {count} records from {first} to {last}")
    for kind in sorted(kinds):
        print(f"  {kind:10s} {kinds[kind]}")
    print(f"outputs confirmed published through record {published}")
    return 0
