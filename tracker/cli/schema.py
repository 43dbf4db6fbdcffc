"""``tracker schema``: the wire contract as JSON Schema files, one per message type."""

from __future__ import annotations

import argparse
import json
from pathlib import Path
from typing import Any

from tracker.errors import InputError

DESCRIPTION = """\
Write a JSON Schema (draft 2020-12) for every message type of the wire contract into DIR, from
the same models the daemon validates with: inbound (order, fill, fill_correction, bin, control,
heartbeat) and outbound (target, status, alert, error, ack). Each file is TYPE.schema.json and
names the contract version it describes ("x-contract-version"). Inbound schemas allow fields they
do not name (the daemon accepts them); outbound schemas do not (the daemon writes exactly these).
"""


def register(subparsers: argparse._SubParsersAction[argparse.ArgumentParser]) -> None:
    """Add the ``schema`` sub-command."""
    parser = subparsers.add_parser(
        "schema",
        help="write a JSON Schema per wire message type",
        description=DESCRIPTION,
        formatter_class=argparse.RawDescriptionHelpFormatter,
    )
    parser.add_argument("--out", "-o", metavar="DIR", required=True, help="folder for the files")
    parser.set_defaults(handler=run)


def schemas() -> dict[str, dict[str, Any]]:
    """Every message type's JSON Schema, by type name."""
    from tracker.edge import wire

    models: dict[str, Any] = {
        "order": wire.OrderPayload,
        "fill": wire.FillPayload,
        "fill_correction": wire.FillCorrectionPayload,
        "bin": wire.BinPayload,
        "control": wire.ControlPayload,
        "heartbeat": wire.HeartbeatPayload,
        "target": wire.TargetPayload,
        "status": wire.StatusPayload,
        "alert": wire.AlertPayload,
        "error": wire.ErrorPayload,
        "ack": wire.AckPayload,
    }
    result: dict[str, dict[str, Any]] = {}
    for name, model in models.items():
        schema = model.model_json_schema(
            mode="serialization" if name in _OUTBOUND else "validation"
        )
        result[name] = {
            "$schema": "https://json-schema.org/draft/2020-12/schema",
            "x-contract-version": wire.WIRE_VERSION,
            "x-direction": "outbound" if name in _OUTBOUND else "inbound",
            **schema,
        }
    return result


_OUTBOUND = frozenset({"target", "status", "alert", "error", "ack"})


def run(args: argparse.Namespace) -> int:
    """Write the schemas into DIR; print where; return 0."""
    out = Path(args.out)
    try:
        out.mkdir(parents=True, exist_ok=True)
        for name, schema in schemas().items():
            text = json.dumps(schema, indent=2, sort_keys=True, ensure_ascii=False) + "\n"
            (out / f"{name}.schema.json").write_text(text, encoding="utf-8")
    except OSError as exc:
        raise InputError(f"cannot write to {out}: {exc.strerror}", field="--out") from exc
    print(f"wrote {len(schemas())} schemas of wire contract v{_version()} -> {out}")
    return 0


def _version() -> str:
    from tracker.edge.wire import WIRE_VERSION

    return str(WIRE_VERSION)
