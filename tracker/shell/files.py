"""Reading the files people write: JSON and TOML documents, liquidity profiles, engine settings.

One reader for every file the commands and the daemon take (a problem, an order, a profile, a
configuration), so that each failure reads the same way: the file, what is wrong with it, and the
flag it came from. Numbers must be finite: ``NaN`` and ``Infinity`` are refused, not read.
"""

from __future__ import annotations

import json
import tomllib
from collections.abc import Mapping
from pathlib import Path
from typing import TYPE_CHECKING, Any

from tracker.errors import InputError

if TYPE_CHECKING:
    from tracker.core.engine import EngineConfig
    from tracker.core.profiles import Profile


def read_document(path: Path, what: str, *, field: str | None = None) -> dict[str, Any]:
    """Read one object from a JSON file, or from a TOML file when the name ends in ``.toml``.

    Args:
        path: The file.
        what: What the file is, for the error ("problem file", "--config", ...).
        field: The flag or field to name in the error (default: ``what``).

    Raises:
        InputError: The file cannot be read, is not valid JSON/TOML, holds a non-finite number, or
            is not one object at its top level.
    """
    field = field or what
    try:
        text = path.read_bytes().decode("utf-8")
    except OSError as exc:
        raise InputError(
            f"cannot read {what} {str(path)!r}: {exc.strerror or exc}", field=field
        ) from exc
    except UnicodeDecodeError as exc:
        raise InputError(f"{what} {str(path)!r} is not UTF-8 text: {exc}", field=field) from None
    toml = path.suffix.lower() == ".toml"
    try:
        data = tomllib.loads(text) if toml else json.loads(text, parse_constant=_no_constant)
    except tomllib.TOMLDecodeError as exc:
        raise InputError(f"{what} {str(path)!r} is not valid TOML: {exc}", field=field) from None
    except json.JSONDecodeError as exc:
        raise InputError(
            f"{what} {str(path)!r} is not valid JSON: {exc.msg} at line {exc.lineno}, "
            f"column {exc.colno}",
            field=field,
        ) from None
    except _NonFinite as exc:
        raise InputError(
            f"{what} {str(path)!r} holds {exc}, which is not allowed; every number must be finite",
            field=field,
        ) from None
    if not isinstance(data, dict):
        raise InputError(f"{what} {str(path)!r} must hold one object at its top level", field=field)
    return data


class _NonFinite(ValueError):
    pass


def _no_constant(name: str) -> Any:
    raise _NonFinite(name)


def load_engine_config(path: Path) -> tuple[EngineConfig, str | None]:
    """Read engine thresholds from a TOML (``.toml``) or JSON file.

    A daemon configuration file (tables ``[engine]``, ``[daemon]``, ...) gives its ``[engine]``
    table, and the topic root of its ``[daemon]`` table.

    Returns:
        The engine settings, and the topic root the file names (``None`` if none).

    Raises:
        InputError: The file is missing, not TOML/JSON, or a threshold is unknown or out of range.
    """
    from tracker.core.engine import EngineConfig

    data = read_document(path, "--config")
    root: str | None = None
    engine_table, daemon_table = data.get("engine"), data.get("daemon")
    if isinstance(engine_table, Mapping) or isinstance(daemon_table, Mapping):
        if isinstance(daemon_table, Mapping) and isinstance(daemon_table.get("root"), str):
            root = daemon_table["root"]
        data = dict(engine_table) if isinstance(engine_table, Mapping) else {}
    return EngineConfig.from_mapping(data), root


def load_profiles(folder: Path) -> dict[str, Profile]:
    """Read every ``SYMBOL.json`` of a folder as a liquidity profile.

    Raises:
        InputError: The folder is missing, a file is not a profile, or a file's name does not match
            the symbol inside it.
    """
    from tracker.core.profiles import Profile

    if not folder.is_dir():
        raise InputError(f"{folder} is not a folder", field="--profiles")
    profiles: dict[str, Profile] = {}
    for path in sorted(folder.glob("*.json")):
        data = read_document(path, "profile", field="--profiles")
        try:
            profile = Profile.from_mapping(data)
        except InputError as exc:
            raise InputError(f"{path.name}: {exc}", field="--profiles") from exc
        if profile.symbol != path.stem:
            raise InputError(
                f"{path.name} holds the profile of {profile.symbol!r}; name it "
                f"{profile.symbol}.json (one file per symbol)",
                field="--profiles",
            )
        profiles[profile.symbol] = profile
    return profiles


__all__ = ["load_engine_config", "load_profiles", "read_document"]
