"""Wire contract v1.1 conformance, through ``tracker replay``: each router behaviour of
tests/contract_cases.py gives the filled shares, the state and the targets it must.

The same table runs against the live daemon on a real Mosquitto in
tests/test_contract_broker.py.
"""

from __future__ import annotations

import json
from pathlib import Path
from typing import Any

import pytest

from tests.contract_cases import CASES, ORDER_ID, ROOT, Case, jsonl
from tracker.cli import main
from tracker.core.engine import Engine
from tracker.edge.wire import decode, encode
from tracker.testing import MemoryPublisher, Recorder


def replayed(tmp_path: Path, case: Case) -> tuple[dict[str, Any], list[dict[str, Any]], list[Any]]:
    """Replay the case's recording; return the order's summary row, its targets and the errors."""
    path = tmp_path / "in.jsonl"
    path.write_text(jsonl(case), encoding="utf-8")
    out = tmp_path / "out"
    assert 0 == main(["replay", str(path), "--out", str(out), "--root", ROOT, "--no-progress"])
    summary = json.loads((out / "summary.json").read_text())
    (row,) = [r for r in summary["orders"] if r["order_id"] == ORDER_ID]
    targets = [json.loads(line) for line in (out / "targets.jsonl").read_text().splitlines()]
    errors = [json.loads(line) for line in (out / "errors.jsonl").read_text().splitlines()]
    return row, [t for t in targets if t["order_id"] == ORDER_ID], errors


@pytest.mark.parametrize("case", CASES.values(), ids=CASES.keys())
def test_router_behaviour_through_replay(tmp_path: Path, case: Case) -> None:
    """Filled shares, state and the last target are what the contract says, with no error."""
    row, targets, errors = replayed(tmp_path, case)
    last = targets[-1]
    assert (case.filled, case.state) == (row["filled"], row["state"])
    assert case.target_state == last["state"]
    assert last["reason"] in case.target_reasons
    assert [] == [e for e in errors if e["severity"] == "error"]
    if case.average_price is not None:
        assert case.average_price == pytest.approx(row["average_price"], rel=1e-12)


def test_extra_fields_are_named_once_each_as_info(tmp_path: Path) -> None:
    """Each unknown field name is one info record (per topic kind), not one per message."""
    case = CASES["extra-fields"]
    again = ("conf/fills/A1", {**case.lines[1][1], "fill_id": "F9", "ts": "2026-03-10T14:00:30Z"})
    doubled = Case([*case.lines, (*again, again[1]["ts"])], 2_000, "working", "", frozenset())
    _, _, errors = replayed(tmp_path, doubled)
    named = sorted(e["reason"].split(":")[0] for e in errors if e["severity"] == "info")
    assert list(case.info_fields) == named


def test_out_of_order_line_is_applied_with_an_info_record(tmp_path: Path) -> None:
    """A line whose time goes backwards counts, and one info record says it came late."""
    _, _, errors = replayed(tmp_path, CASES["out-of-order-recording"])
    expected = [(3, "info")]
    assert expected == [(e["line"], e["severity"]) for e in errors]
    assert "time goes backwards" in errors[0]["reason"]


def test_sorted_recording_has_no_time_remark(tmp_path: Path) -> None:
    """--sort applies a merged recording in time order: nothing goes backwards."""
    path = tmp_path / "in.jsonl"
    path.write_text(jsonl(CASES["out-of-order-recording"]), encoding="utf-8")
    out = tmp_path / "out"
    args = ["replay", str(path), "--out", str(out), "--root", ROOT, "--sort", "--no-progress"]
    assert 0 == main(args)
    summary = json.loads((out / "summary.json").read_text())
    expected = ("", 1_000)
    assert expected == ((out / "errors.jsonl").read_text(), summary["orders"][0]["filled"])


def test_restarted_router_reads_the_latest_target_retained() -> None:
    """Targets are retained per order: a router that restarts mid-bin gets the latest one."""
    publisher = MemoryPublisher()
    recorder = Recorder(Engine(root=ROOT), root=ROOT, publisher=publisher)
    for topic, payload, _ in CASES["restart-mid-bin"].lines:
        recorder.feed(decode(topic, payload, root=ROOT))
    recorder.feed(decode(f"{ROOT}/tick", {"type": "tick", "ts": "2026-03-10T14:00:00Z"}, root=ROOT))
    retained = publisher.retained[f"{ROOT}/targets/{ORDER_ID}"]
    latest = recorder.targets(ORDER_ID)[-1]
    assert (encode(latest), True) == (retained.payload, retained.retain)


def test_ended_order_leaves_no_retained_target() -> None:
    """An order's last target (here a cancel's) is published once and its retained one cleared."""
    publisher = MemoryPublisher()
    recorder = Recorder(Engine(root=ROOT), root=ROOT, publisher=publisher)
    case = CASES["echoed-cancel"]
    topic, payload, _ = case.lines[0]
    recorder.feed(decode(topic, payload, root=ROOT))
    recorder.feed(decode(f"{ROOT}/tick", {"type": "tick", "ts": "2026-03-10T14:00:00Z"}, root=ROOT))
    for topic, payload, _ in case.lines[1:]:
        recorder.feed(decode(topic, payload, root=ROOT))
    on_topic = publisher.on(f"{ROOT}/targets/{ORDER_ID}")
    expected = ("cancelled", b"", False)
    assert expected == (
        json.loads(on_topic[-2].payload)["state"],
        on_topic[-1].payload,
        f"{ROOT}/targets/{ORDER_ID}" in publisher.retained,
    )


def test_unreadable_order_message_gets_a_rejected_ack(tmp_path: Path) -> None:
    """An order message refused at the edge is still answered on its order's ack topic."""
    topic, payload = "conf/orders/A1", {"type": "order", "action": "new", "order_id": "A1"}
    case = Case(
        [(topic, {**payload, "ts": "2026-03-10T13:59:00Z"}, "2026-03-10T13:59:00Z")],
        0,
        "",
        "",
        frozenset(),
    )
    path = tmp_path / "in.jsonl"
    path.write_text(jsonl(case), encoding="utf-8")
    out = tmp_path / "out"
    assert 0 == main(["replay", str(path), "--out", str(out), "--root", ROOT, "--no-progress"])
    (ack,) = [json.loads(line) for line in (out / "acks.jsonl").read_text().splitlines()]
    assert ("A1", "new", "rejected") == (ack["order_id"], ack["action"], ack["result"])
    assert "missing: symbol, side, quantity, start, end" in ack["reason"]
