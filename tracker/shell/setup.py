"""What a daemon ran with -- topic root, engine settings, liquidity profiles -- as its journal
describes it, and the engine that description makes.

The daemon journals its setup when it starts (:meth:`tracker.shell.journal.Journal.describe`):
the root, the whole :class:`~tracker.core.engine.EngineConfig` (every setting, defaults
included, so that a later change of a default cannot change a replay) and each profile, each as
canonical JSON (sorted keys). An entry written later -- a profile replaced, a setting changed
before a restart -- takes effect after the journal record it names (``after_seq``). A replay of
the journal (and the daemon's own recovery after a restart) starts from the first description
and applies the later ones at their places, so it reproduces what the daemon published with no
flags at all.
"""

from __future__ import annotations

import dataclasses
import functools
import json
from collections.abc import Callable, Mapping, Sequence
from dataclasses import dataclass
from pathlib import Path
from typing import TYPE_CHECKING, Any

from tracker.errors import InputError
from tracker.shell.journal import SetupEntry

if TYPE_CHECKING:
    from tracker.core.engine import Engine, EngineConfig
    from tracker.core.profiles import Profile


@dataclass(frozen=True)
class Setup:
    """One complete setup: the root, the engine settings and the profiles by symbol."""

    root: str
    config: EngineConfig
    profiles: Mapping[str, Profile]


def _canonical(data: Any) -> bytes:
    return json.dumps(data, sort_keys=True, separators=(",", ":"), allow_nan=False).encode()


def entries_of(setup: Setup) -> list[tuple[str, str, bytes]]:
    """The journal entries ``(kind, name, content)`` that describe ``setup``."""
    return [
        ("root", "", _canonical(setup.root)),
        ("engine", "", _canonical(dataclasses.asdict(setup.config))),
        *(
            ("profile", symbol, _canonical(setup.profiles[symbol].to_mapping()))
            for symbol in sorted(setup.profiles)
        ),
    ]


def removed_profiles(entries: Sequence[SetupEntry], setup: Setup) -> list[tuple[str, str, bytes]]:
    """Entries (empty content) for the profiles a journal holds that ``setup`` no longer has."""
    held = {entry.name for entry in entries if entry.kind == "profile" and entry.content}
    gone = {entry.name for entry in entries if entry.kind == "profile" and not entry.content}
    return [("profile", name, b"") for name in sorted(held - gone - set(setup.profiles))]


def timeline(entries: Sequence[SetupEntry]) -> list[tuple[int, Setup]]:
    """The setups a journal describes, each with the record after which it took effect.

    Returns:
        ``(after_seq, setup)`` pairs, oldest first; empty for a journal without a description.

    Raises:
        InputError: an entry cannot be read back (a damaged or foreign description).
    """
    from tracker.core.engine import EngineConfig
    from tracker.core.profiles import Profile

    result: list[tuple[int, Setup]] = []
    root: str | None = None
    config: EngineConfig | None = None
    profiles: dict[str, Profile] = {}
    groups: dict[int, list[SetupEntry]] = {}
    for entry in entries:
        groups.setdefault(entry.after_seq, []).append(entry)
    for after_seq in sorted(groups):
        for entry in groups[after_seq]:
            try:
                data = json.loads(entry.content) if entry.content else None
                if entry.kind == "root":
                    root = str(data)
                elif entry.kind == "engine":
                    settings = dict(data or {})
                    # Journals written before the receive time became the clock ran on the
                    # messages' own ts: replay them as they ran.
                    settings.setdefault("event_time", "message")
                    config = EngineConfig.from_mapping(settings)
                elif entry.kind == "profile":
                    if data is None:
                        profiles.pop(entry.name, None)
                    else:
                        profiles[entry.name] = Profile.from_mapping(data)
            except (ValueError, InputError) as exc:
                raise InputError(
                    f"the journal's {entry.kind} {entry.name!r} cannot be read back: {exc}",
                    field="journal",
                ) from exc
        if root is None or config is None:
            raise InputError(
                "the journal's self-description lacks its root or engine settings",
                field="journal",
            )
        result.append((after_seq, Setup(root, config, dict(profiles))))
    return result


def timeline_ids(entries: Sequence[SetupEntry]) -> list[tuple[int, Setup, int]]:
    """:func:`timeline` with, for each setup, the id of the last entry it holds (a snapshot
    holds the setups up to the entry it names, :mod:`tracker.shell.snapshot`).

    Raises:
        InputError: an entry cannot be read back.
    """
    return [
        (after, setup, max(entry.id for entry in entries if entry.after_seq <= after))
        for after, setup in timeline(entries)
    ]


def later_changes(
    entries: Sequence[SetupEntry], engine: Any, after_id: int
) -> list[tuple[int, Callable[[], None]]]:
    """The setups a journal records after entry ``after_id``, as ``(after, change)`` pairs for
    :func:`tracker.shell.replay.replay` that switch ``engine`` to each at its place.

    Raises:
        InputError: an entry cannot be read back.
    """
    return [
        (after, functools.partial(apply, engine, setup))
        for after, setup, last in timeline_ids(entries)
        if last > after_id
    ]


def engine_of(setup: Setup) -> Engine:
    """A fresh engine with ``setup``'s settings, profiles and root."""
    from tracker.core.engine import Engine

    return Engine(config=setup.config, profiles=setup.profiles, root=setup.root)


def apply(engine: Any, setup: Setup) -> None:
    """Switch a running engine to ``setup`` (settings and profiles; the root never changes)."""
    engine.reconfigure(setup.config, setup.profiles)


def differences(journal: Setup, flags: Setup) -> list[str]:
    """What the flags of a replay say differently from the journal, one phrase each."""
    said: list[str] = []
    if journal.root != flags.root:
        said.append(f"--root {flags.root!r} (the journal: {journal.root!r})")
    if journal.config != flags.config:
        changed = [
            item.name
            for item in dataclasses.fields(journal.config)
            if getattr(journal.config, item.name) != getattr(flags.config, item.name)
        ]
        said.append(f"--config ({', '.join(changed)} differ from the journal's)")
    ours = {symbol: _canonical(p.to_mapping()) for symbol, p in journal.profiles.items()}
    theirs = {symbol: _canonical(p.to_mapping()) for symbol, p in flags.profiles.items()}
    if ours != theirs:
        changed = sorted(
            symbol for symbol in set(ours) | set(theirs) if ours.get(symbol) != theirs.get(symbol)
        )
        said.append(f"--profiles ({', '.join(changed)} differ from the journal's)")
    return said


__all__ = [
    "Setup",
    "apply",
    "differences",
    "engine_of",
    "entries_of",
    "later_changes",
    "removed_profiles",
    "timeline",
    "timeline_ids",
]


@dataclass(frozen=True)
class ReplayPlan:
    """How to replay an input: the engine to feed, the root, the setups to switch to on the way.

    Attributes:
        engine: A fresh engine with the setup the replay starts from.
        root: The topic root of the recording.
        changes: ``(after, change)`` pairs for :func:`tracker.shell.replay.replay`: a journal's
            later setups, each applied before the first record numbered above ``after``.
        what_if: For a journal replayed with flags that differ from it on purpose (``--what-if``):
            what differs, for the summary. ``None`` otherwise.
    """

    engine: Engine
    root: str
    changes: list[tuple[int, Callable[[], None]]]
    what_if: dict[str, Any] | None


def plan_replay(
    path: Path,
    *,
    root: str | None,
    config: EngineConfig | None,
    profiles: Mapping[str, Profile] | None,
    what_if: bool = False,
    default_root: str,
) -> ReplayPlan:
    """The engine and setups that replay ``path`` as it was published (``tracker replay``'s rule).

    A journal describes itself: given no flag, it is replayed with the setup it recorded, switching
    at its place to every later one. Flags (``root``, ``config``, ``profiles``; ``None`` = not
    given) that disagree with the journal are refused, unless ``what_if`` asks to replay with them
    (the plan then says what differs). A JSON Lines recording has no setup: the flags, or the
    defaults, apply.

    Raises:
        InputError: Flags that disagree with the journal, without ``what_if``.
    """
    from tracker.core.engine import Engine
    from tracker.shell.journal import read_setup
    from tracker.shell.replay import is_journal

    described = timeline(read_setup(path)) if is_journal(path) else []
    if not described:
        engine = Engine(config=config, profiles=dict(profiles or {}), root=root or default_root)
        return ReplayPlan(engine, root or default_root, [], None)
    recorded = described[0][1]
    flags = Setup(
        root=root if root is not None else recorded.root,
        config=config if config is not None else recorded.config,
        profiles=profiles if profiles is not None else recorded.profiles,
    )
    # Flags are judged against the setup the journal started with.
    said = differences(recorded, flags)
    if said and not what_if:
        raise InputError(
            f"{path} records the setup its daemon ran with; these flags disagree with it: "
            f"{'; '.join(said)}. Leave them out to reproduce what was published, or add "
            "--what-if to replay with them",
            field="--what-if",
        )
    if said:
        return ReplayPlan(engine_of(flags), flags.root, [], {"differs_from_journal": said})
    engine = engine_of(recorded)
    changes: list[tuple[int, Callable[[], None]]] = [
        (after, functools.partial(apply, engine, later)) for after, later in described[1:]
    ]
    return ReplayPlan(engine, recorded.root, changes, None)
