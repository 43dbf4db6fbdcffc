"""``tracker calibrate``: estimate a liquidity profile from per-bin history.

The shell around :func:`tracker.core.calibration.calibrate`: it reads the CSV or Parquet file (with
a progress bar on long inputs), records each row's line so that rejected rows can be reported by
line, writes PROFILE.json and prints the quality report.
"""

from __future__ import annotations

import argparse
import io
import json
import sys
from collections.abc import Callable
from datetime import time
from pathlib import Path
from typing import Any

from tracker.core.calibration import HISTORY_COLUMNS, calibrate
from tracker.core.profiles import Profile
from tracker.core.session import Session, parse_clock
from tracker.errors import InputError

DESCRIPTION = """\
Estimate a liquidity profile (PROFILE.json) for one symbol from per-bin history.

HISTORY is CSV or Parquet (told by the extension .parquet/.pq, else CSV), one row per day and bin,
with the columns start, symbol, volume, vwap, open, high, low, close, spread in any order. start is
the bin start in ISO 8601 with an offset (2026-01-05T09:30:00-05:00) or without one, then taken in
the session's timezone. volume in shares; prices in currency; spread is the time-averaged quoted
spread in currency. CSV lines starting with # are comments. Rows of other symbols are ignored.

PROFILE.json holds symbol, session, bins (per bin: start HH:MM, volume_share, spread in currency,
volatility = standard deviation of the bin's log return), average_daily_volume (shares), days and
quality: rows rejected (with their line and why), half days / late opens, missing bins, outliers
removed and how, and the Parkinson vs close-to-close volatility check. Statistics are robust
(outlier screen on the median absolute deviation, 10% trimmed means).
"""

#: Inputs with more rows than this get a progress bar (when stderr is a terminal).
PROGRESS_ROWS = 100_000
#: Rows read per chunk of a CSV.
CHUNK_ROWS = 200_000
#: Rejected rows printed on stderr (all are counted and up to 100 listed in PROFILE.json).
REJECTED_SHOWN = 20


def add_session_arguments(parser: argparse.ArgumentParser) -> None:
    """The session flags shared by ``calibrate`` and ``simulate``."""
    default = Session()
    group = parser.add_argument_group("session (the venue's regular trading day)")
    group.add_argument(
        "--session-start",
        default=f"{default.start:%H:%M}",
        metavar="HH:MM",
        help="regular open, local time (default: %(default)s)",
    )
    group.add_argument(
        "--session-end",
        default=f"{default.end:%H:%M}",
        metavar="HH:MM",
        help="regular close, local time (default: %(default)s)",
    )
    group.add_argument(
        "--timezone",
        default=default.timezone,
        metavar="ZONE",
        help="IANA timezone of the venue (default: %(default)s)",
    )
    group.add_argument(
        "--bin-minutes",
        type=int,
        default=default.bin_minutes,
        metavar="M",
        help="bin length in minutes; must divide the session (default: "
        "%(default)s, i.e. 78 bins for 09:30-16:00)",
    )


def session_from_args(args: argparse.Namespace) -> Session:
    """The session the flags describe (raises InputError naming the flag's field)."""
    start: time = parse_clock(args.session_start, "--session-start")
    end: time = parse_clock(args.session_end, "--session-end")
    return Session(start=start, end=end, timezone=args.timezone, bin_minutes=args.bin_minutes)


def register(subparsers: argparse._SubParsersAction[argparse.ArgumentParser]) -> None:
    """Add the ``calibrate`` sub-command."""
    from tracker.cli import CAUTION

    parser = subparsers.add_parser(
        "calibrate",
        help="estimate a liquidity profile from per-bin history",
        description=DESCRIPTION,
        epilog=CAUTION,
        formatter_class=argparse.RawDescriptionHelpFormatter,
    )
    parser.add_argument("history", type=Path, metavar="HISTORY", help="CSV or Parquet history")
    parser.add_argument("--symbol", required=True, help="the symbol to calibrate")
    parser.add_argument(
        "-o",
        "--output",
        type=Path,
        required=True,
        metavar="PROFILE.json",
        help="where to write the profile",
    )
    parser.add_argument(
        "--quiet", action="store_true", help="no progress bar and no report on stderr"
    )
    add_session_arguments(parser)
    parser.set_defaults(handler=run)


def _csv_text(path: Path) -> tuple[str, list[int]]:
    """The file without comment and blank lines, and the 1-based line of each kept line."""
    try:
        raw = path.read_text(encoding="utf-8-sig")
    except OSError as exc:
        raise InputError(f"cannot read history {str(path)!r}: {exc.strerror or exc}") from exc
    except UnicodeDecodeError as exc:
        raise InputError(f"history {str(path)!r} is not UTF-8 text; give CSV or Parquet") from exc
    kept: list[str] = []
    lines: list[int] = []
    for number, line in enumerate(raw.splitlines(), start=1):
        stripped = line.strip()
        if stripped and not stripped.startswith("#"):
            kept.append(line)
            lines.append(number)
    return "\n".join(kept) + "\n", lines


def read_history(path: Path, *, show_progress: bool = False) -> Any:
    """Read a CSV or Parquet history into a DataFrame with a ``line`` column.

    ``line`` is the 1-based line in a CSV file (comments and blank lines counted) or the 1-based
    row in a Parquet file.

    Raises:
        InputError: the file cannot be read or has no header.
    """
    import pandas as pd

    if path.suffix.lower() in (".parquet", ".pq"):
        try:
            frame = pd.read_parquet(path)
        except (OSError, ValueError) as exc:
            raise InputError(f"cannot read Parquet history {str(path)!r}: {exc}") from exc
        frame["line"] = range(1, len(frame) + 1)
        return frame
    text, lines = _csv_text(path)
    if not lines:
        raise InputError(
            f"history {str(path)!r} is empty; it needs a header line with "
            f"{', '.join(HISTORY_COLUMNS)}"
        )
    rows = len(lines) - 1
    chunks: list[Any] = []
    with _progress(show_progress and rows > PROGRESS_ROWS, rows, "reading") as advance:
        try:
            reader = pd.read_csv(
                io.StringIO(text),
                dtype=str,
                keep_default_na=False,
                chunksize=CHUNK_ROWS,
                skip_blank_lines=False,
            )
            for chunk in reader:
                chunks.append(chunk)
                advance(len(chunk))
        except (pd.errors.ParserError, ValueError) as exc:
            raise InputError(f"history {str(path)!r} is not valid CSV: {exc}") from exc
    frame = pd.concat(chunks, ignore_index=True) if chunks else pd.DataFrame()
    frame["line"] = lines[1 : len(frame) + 1]
    return frame


class _progress:
    """A rich progress bar on stderr, or nothing."""

    def __init__(self, enabled: bool, total: int, label: str) -> None:
        self.enabled, self.total, self.label = enabled, total, label
        self._bar: Any = None

    def __enter__(self) -> Callable[[int], None]:
        if not self.enabled:
            return lambda _count: None
        from rich.console import Console
        from rich.progress import Progress

        self._bar = Progress(console=Console(stderr=True), transient=True)
        self._bar.start()
        task = self._bar.add_task(self.label, total=self.total)
        return lambda count: self._bar.advance(task, count)

    def __exit__(self, *exc: object) -> None:
        if self._bar is not None:
            self._bar.stop()


def run(args: argparse.Namespace) -> int:
    """Calibrate, write PROFILE.json, report."""
    session = session_from_args(args)
    if not args.history.exists():
        raise InputError(f"history file {str(args.history)!r} does not exist")
    interactive = not args.quiet and sys.stderr.isatty()
    history = read_history(args.history, show_progress=interactive)
    progress = None
    if interactive and len(history) > PROGRESS_ROWS:

        def progress(stage: str, fraction: float) -> None:
            print(f"\rcalibrating: {stage} ({fraction:.0%})", end="", file=sys.stderr)

    profile = calibrate(history, args.symbol, session, progress=progress)
    if progress is not None:
        print(file=sys.stderr)
    write_profile(profile, args.output)
    if not args.quiet:
        report(profile, args.output)
    return 0


def write_profile(profile: Profile, path: Path) -> None:
    """Write PROFILE.json (raises InputError when the path cannot be written)."""
    text = json.dumps(profile.to_mapping(), indent=2, allow_nan=False) + "\n"
    try:
        path.write_text(text, encoding="utf-8")
    except OSError as exc:
        raise InputError(f"cannot write {str(path)!r}: {exc.strerror or exc}") from exc


def report(profile: Profile, path: Path) -> None:
    """Print the quality report: rejected rows on stderr, a summary on stdout."""
    quality = profile.quality
    rejected = quality.get("rejected", [])
    for row in rejected[:REJECTED_SHOWN]:
        print(f"line {row['line']}: {row['field']} {row['reason']} (row skipped)", file=sys.stderr)
    more = quality.get("rows_rejected", 0) - min(len(rejected), REJECTED_SHOWN)
    if more > 0:
        print(
            f"... and {more} more rejected rows (up to 100 listed in the profile's quality)",
            file=sys.stderr,
        )
    check = quality.get("volatility_check", {})
    short = quality.get("short_days", [])
    print(
        f"{profile.symbol}: {profile.days} days ({quality.get('full_days')} full, "
        f"{len(short)} short), {quality.get('rows_used')} rows used, "
        f"{quality.get('rows_rejected')} rejected; average daily volume "
        f"{profile.average_daily_volume:,.0f} shares; daily volatility "
        f"{check.get('parkinson_daily', float('nan')):.4f} (Parkinson) vs "
        f"{check.get('close_to_close_daily', float('nan')):.4f} (close-to-close); "
        f"wrote {path}"
    )
