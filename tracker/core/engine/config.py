"""The engine's settings: every alert threshold plus the engine's own."""

from __future__ import annotations

import math
from collections.abc import Mapping
from dataclasses import dataclass, fields
from typing import Any

from tracker.core.alerts import AlertConfig
from tracker.errors import InputError


@dataclass(frozen=True)
class EngineConfig(AlertConfig):
    """Engine settings: every alert threshold (:class:`~tracker.core.alerts.AlertConfig`) plus
    these.

    Attributes:
        expiry_grace_seconds: An order expires this long after its end (fills of its last bin
            that arrive within the grace still count as live).
    """

    expiry_grace_seconds: float = 0.0

    def __post_init__(self) -> None:
        super().__post_init__()
        grace = self.expiry_grace_seconds
        if (
            isinstance(grace, bool)
            or not isinstance(grace, int | float)
            or not (math.isfinite(grace) and grace >= 0)
        ):
            raise InputError(
                f"must be a number of seconds >= 0; got {grace!r}", field="expiry_grace_seconds"
            )

    @classmethod
    def from_mapping(cls, data: Mapping[str, Any]) -> EngineConfig:
        """Build from a JSON object of thresholds; missing keys keep their defaults.

        Raises:
            InputError: an unknown key (named, with the allowed keys) or a bad value.
        """
        if not isinstance(data, Mapping):
            raise InputError(f"must be a JSON object; got {type(data).__name__}", field="config")
        names = [f.name for f in fields(cls)]
        for key in data:
            if key not in names:
                raise InputError(
                    f"is not an engine setting; the settings are {', '.join(sorted(names))}",
                    field=str(key),
                )
        return cls(**dict(data))


__all__ = ["EngineConfig"]
