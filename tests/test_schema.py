"""``tracker schema``: one JSON Schema per wire message type, from the contract's own models."""

from __future__ import annotations

import json
from pathlib import Path

from tracker.cli import main
from tracker.edge.wire import TargetPayload

TYPES = (
    "ack",
    "alert",
    "bin",
    "control",
    "error",
    "fill",
    "fill_correction",
    "heartbeat",
    "order",
    "status",
)


def test_schema_writes_one_file_per_message_type_with_the_version(tmp_path: Path) -> None:
    """Every type gets TYPE.schema.json naming contract version 1.1."""
    assert 0 == main(["schema", "--out", str(tmp_path)])
    names = sorted(path.name for path in tmp_path.iterdir())
    versions = {json.loads(path.read_text())["x-contract-version"] for path in tmp_path.iterdir()}
    expected = sorted(f"{name}.schema.json" for name in (*TYPES, "target"))
    assert (expected, {"1.1"}) == (names, versions)


def test_inbound_schemas_are_open_and_outbound_closed(tmp_path: Path) -> None:
    """A fill may carry more fields (tolerant reading); a target has exactly its own."""
    main(["schema", "--out", str(tmp_path)])
    fill = json.loads((tmp_path / "fill.schema.json").read_text())
    target = json.loads((tmp_path / "target.schema.json").read_text())
    expected = (True, False, sorted(TargetPayload.model_fields))
    assert expected == (
        fill.get("additionalProperties"),
        target.get("additionalProperties"),
        sorted(target["properties"]),
    )
