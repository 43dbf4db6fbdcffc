"""Snapshots: the engine and its intake as one blob, so that a restart replays only the tail.

Theory of operation
-------------------
The daemon's state is what the journal's records made of a fresh engine: the engine's orders,
symbols, alerts raised, learnt fill ratios and clocks, and the intake's redelivery memory,
counters and clocks (the :class:`~tracker.edge.intake.Intake` holds the engine, so the pair is
one object graph). A snapshot is that graph pickled after record ``after_seq``; a restart loads
the newest usable one and replays only the records after it, and gives the same outputs as a
replay from the first record (a test holds the two together on the invented day).

Pickle is code: loading one runs whatever it names. The journal is the daemon's private file
(like its lock and its database), never something received, and a snapshot is loaded only when

* its format tag -- this module's format, the package version, Python's and NumPy's versions and
  a SHA-256 of the source of every module whose objects it holds (``tracker/core``,
  ``tracker/edge`` and this file) -- equals the running code's, so a state written by other code
  (a new field, a renamed class) is never read into this one; and
* the SHA-256 of the stored bytes matches the one stored beside them (a damaged page).

Anything else -- a mismatch, a failure to load, an object of the wrong kind -- raises
:class:`SnapshotUnusable` with the reason; the daemon logs it and falls back to the snapshot
before, or to a full replay: never to a wrong state.

Speed: the state holds every fill of the day (the engine keeps them per order, the intake keeps
their identities), 200,000 of them on a busy day. Frozen slotted dataclasses, which pickle
through a Python call per object, are written as (class, field values) and each order's fills
as columns, which halves the time to load and to write (``benchmarks/bench_restart.py``). The
blob is compressed (zlib level 1: a quarter of the size for a tenth of the time).
"""

from __future__ import annotations

import dataclasses
import functools
import gc
import hashlib
import importlib.metadata
import io
import pickle
import platform
import zlib
from collections import deque
from collections.abc import Callable
from pathlib import Path
from typing import Any

import numpy as np

from tracker.core.messages import FillMessage
from tracker.edge.intake import Intake

__all__ = ["FORMAT", "SnapshotUnusable", "dump", "format_tag", "load", "source_digest"]

#: The layout of the blob (bump on any change to how it is written).
FORMAT = "tracker-snapshot/1"

_PACKAGE = Path(__file__).resolve().parent.parent


class SnapshotUnusable(Exception):
    """A stored snapshot that must not be used (written by other code, damaged, or unreadable);
    ``reason`` says which. Not an error of the journal: a restart then replays more of it."""

    def __init__(self, reason: str) -> None:
        super().__init__(reason)
        self.reason = reason


@functools.cache
def source_digest() -> str:
    """SHA-256 of the source of every module whose objects a snapshot holds, hex."""
    digest = hashlib.sha256()
    files = sorted(
        [
            *(_PACKAGE / "core").rglob("*.py"),
            *(_PACKAGE / "edge").rglob("*.py"),
            Path(__file__).resolve(),
        ]
    )
    for path in files:
        digest.update(path.relative_to(_PACKAGE).as_posix().encode() + b"\0")
        digest.update(path.read_bytes() + b"\0")
    return digest.hexdigest()


@functools.cache
def format_tag() -> str:
    """What a snapshot written now is tagged with; only a snapshot with the same tag is loaded."""
    try:
        version = importlib.metadata.version("tracker")
    except importlib.metadata.PackageNotFoundError:
        version = "unknown"
    python = ".".join(platform.python_version_tuple()[:2])
    return (
        f"{FORMAT} tracker={version} python={python} numpy={np.__version__} "
        f"source={source_digest()}"
    )


def dump(intake: Intake) -> bytes:
    """The intake and its engine as a snapshot blob (compressed pickle).

    The caller must not change either while this runs (the daemon pauses applying records).
    """
    buffer = io.BytesIO()
    _Pickler(buffer, protocol=pickle.HIGHEST_PROTOCOL).dump(intake)
    return zlib.compress(buffer.getbuffer(), 1)


def load(blob: bytes, *, format: str, sha256: str) -> Intake:
    """The intake (and its engine) a snapshot holds.

    Args:
        blob: The stored state.
        format: The format tag stored with it.
        sha256: The SHA-256 stored with it, hex.

    Raises:
        SnapshotUnusable: Another format tag, a damaged blob, or one that does not load.
    """
    if format != format_tag():
        raise SnapshotUnusable(
            f"written by other code ({_differences(format, format_tag())}); not loaded"
        )
    if hashlib.sha256(blob).hexdigest() != sha256:
        raise SnapshotUnusable("damaged: its SHA-256 does not match the one stored with it")
    # Millions of objects, none of them garbage: the cyclic collector would scan them again and
    # again while they are made (a third of the time), to no avail.
    collecting = gc.isenabled()
    gc.disable()
    try:
        state = pickle.loads(zlib.decompress(blob))
    except Exception as exc:  # anything a damaged or foreign pickle raises
        raise SnapshotUnusable(f"does not load ({type(exc).__name__}: {exc})") from exc
    finally:
        if collecting:
            gc.enable()
    if not isinstance(state, Intake):
        raise SnapshotUnusable(f"holds a {type(state).__name__}, not the daemon's intake")
    return state


def _differences(stored: str, current: str) -> str:
    """Which parts of two format tags differ, e.g. ``source differs``."""
    ours = dict(part.partition("=")[::2] for part in current.split(" ")[1:])
    theirs = dict(part.partition("=")[::2] for part in stored.split(" ")[1:])
    if stored.split(" ")[0] != current.split(" ")[0]:
        return f"format {stored.split(' ')[0]!r}, this code writes {FORMAT!r}"
    changed = sorted(key for key in ours.keys() | theirs.keys() if ours.get(key) != theirs.get(key))
    return ", ".join(f"{key} differs" for key in changed) or "tag differs"


# -- the pickler ---------------------------------------------------------------------------------


class _Unset:
    """Marks a slot left unset (the class itself is the marker: pickled by name, it stays one)."""


@functools.cache
def _layout(cls: type) -> tuple[tuple[str, ...], tuple[Callable[[Any, Any], None], ...]] | None:
    """A slotted dataclass's slots and their setters, or ``None`` for anything else (written
    the ordinary way): a class of ours, no instance ``__dict__``, no pickling of its own."""
    if not dataclasses.is_dataclass(cls) or not cls.__module__.startswith("tracker."):
        return None
    if any("__slots__" not in klass.__dict__ for klass in cls.__mro__[:-1]):
        return None  # a class in the chain without __slots__: instances have a __dict__
    if cls.__reduce__ is not object.__reduce__ or cls.__reduce_ex__ is not object.__reduce_ex__:
        return None
    for method in ("__getstate__", "__setstate__"):
        name = getattr(getattr(cls, method, None), "__qualname__", "_dataclass")
        if not name.startswith(("_dataclass", "object.")):
            return None
    names = tuple(
        name
        for klass in reversed(cls.__mro__)
        for name in klass.__dict__.get("__slots__", ())
        if name != "__weakref__"
    )
    if not names or "__dict__" in names:
        return None
    return names, tuple(getattr(cls, name).__set__ for name in names)


def _rebuild(cls: type, values: tuple[Any, ...]) -> Any:
    """An object of a slotted dataclass from its slot values (``_Unset``: left unset)."""
    layout = _layout(cls)
    assert layout is not None
    obj: Any = object.__new__(cls)
    for setter, value in zip(layout[1], values, strict=True):
        if value is not _Unset:
            setter(obj, value)
    return obj


_FILL_FIELDS = tuple(item.name for item in dataclasses.fields(FillMessage))


class _Fills:
    """A mapping of fills, written as columns (one list per field) instead of one object each."""

    __slots__ = ("fills",)

    def __init__(self, fills: dict[Any, FillMessage]) -> None:
        self.fills = fills

    def __reduce__(self) -> tuple[Any, ...]:
        fills = self.fills
        values = list(fills.values())
        columns = [[getattr(fill, name) for fill in values] for name in _FILL_FIELDS]
        return _fills_from_columns, (list(fills), columns)


def _fills_from_columns(keys: list[Any], columns: list[list[Any]]) -> dict[Any, FillMessage]:
    layout = _layout(FillMessage)
    assert layout is not None and layout[0] == _FILL_FIELDS
    fills = [object.__new__(FillMessage) for _ in keys]
    for setter, column in zip(layout[1], columns, strict=True):
        deque(map(setter, fills, column), maxlen=0)  # column by column: no Python loop per fill
    return dict(zip(keys, fills, strict=True))


class _Pickler(pickle.Pickler):
    """Slotted dataclasses as (class, slot values); mappings of fills as columns."""

    def reducer_override(self, obj: Any) -> Any:
        cls: type = type(obj)
        layout = _layout(cls)
        if layout is None:
            return NotImplemented
        values = tuple(_column_fills(getattr(obj, name, _Unset)) for name in layout[0])
        return _rebuild, (cls, values)


def _column_fills(value: Any) -> Any:
    """A mapping of fills wrapped to be written as columns; any other value as it is."""
    if (
        type(value) is dict
        and len(value) > 8
        and all(type(item) is FillMessage for item in value.values())
    ):
        return _Fills(value)
    return value
