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
import json
from collections.abc import Mapping, Sequence
from dataclasses import dataclass
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
                    config = EngineConfig.from_mapping(data or {})
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
    "removed_profiles",
    "timeline",
]
