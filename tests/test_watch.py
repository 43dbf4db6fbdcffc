"""tracker watch without a broker: reading published messages, ranking, banners, keys, frames."""

from __future__ import annotations

import json
import os
import threading
from datetime import UTC, datetime, timedelta
from pathlib import Path
from typing import Any
from zoneinfo import ZoneInfo

import pytest

from tracker.cli import main
from tracker.edge.wire import decode
from tracker.watch.app import control_payload
from tracker.watch.board import Board
from tracker.watch.link import LinkStatus
from tracker.watch.ordering import Filter, attention, rows
from tracker.watch.screen import ViewState, against_plan, bps, participation, render
from tracker.watch.terminal import FrameWriter, frame_text, parse_keys

ROOT = "desk"
NEW_YORK = ZoneInfo("America/New_York")
T0 = datetime(2026, 3, 10, 15, 0, tzinfo=UTC)


def status(order_id: str = "X_ZEPH-B1", **changes: Any) -> bytes:
    """A status message as the daemon publishes it (wire contract v1), with changes."""
    message: dict[str, Any] = {
        "type": "status",
        "order_id": order_id,
        "symbol": "X_ZEPH",
        "side": "buy",
        "state": "working",
        "quantity": 120_000,
        "filled": 45_175,
        "remaining": 74_825,
        "progress_pct": 37.645833,
        "planned_filled": 48_953,
        "deviation_shares": 3_778,
        "deviation_pct": 3.14858,
        "deviation_bins": 0.5,
        "average_price": 42.5,
        "arrival_price": 42.0,
        "limit_price": None,
        "volume_scale": 1.1,
        "expected_cost": 9344.36,
        "expected_cost_bps": 29.86,
        "plan_version": 24,
        "ts": "2026-03-10T15:25:14.155Z",
    }
    message.update(changes)
    return json.dumps({k: v for k, v in message.items() if v is not ...}).encode()


def target(order_id: str = "X_ZEPH-B1", **changes: Any) -> bytes:
    message: dict[str, Any] = {
        "type": "target",
        "order_id": order_id,
        "symbol": "X_ZEPH",
        "side": "buy",
        "bin_start": "2026-03-10T15:25:00Z",
        "bin_end": "2026-03-10T15:30:00Z",
        "quantity": 2_500,
        "cumulative_target": 46_000,
        "remaining": 76_500,
        "max_quantity": 3_000,
        "plan_version": 24,
        "ts": "2026-03-10T15:25:01Z",
    }
    message.update(changes)
    return json.dumps(message).encode()


def alert(
    code: str, severity: str, state: str = "raised", order_id: str | None = "X_ZEPH-B1"
) -> bytes:
    return json.dumps(
        {
            "type": "alert",
            "order_id": order_id,
            "symbol": "X_ZEPH",
            "code": code,
            "severity": severity,
            "state": state,
            "message": f"{code} {state}",
            "details": {},
            "ts": "2026-03-10T15:26:00Z",
        }
    ).encode()


def board_with(*messages: tuple[str, bytes], now: float = 0.0) -> Board:
    board = Board(ROOT, started=0.0)
    for topic, payload in messages:
        board.take(f"{ROOT}/{topic}", payload, retained=False, now=now)
    return board


# -- reading ------------------------------------------------------------------------------------


def test_unknown_fields_are_ignored_and_missing_optional_fields_are_blank() -> None:
    """A status with new fields (rate, reason, version) and without optional ones still shows."""
    payload = status(
        participation=0.12,
        reason="re-planned",
        version=2,
        expected_cost_bps=...,
        deviation_pct=...,
        average_price=...,
    )
    board = board_with(("status/X_ZEPH-B1", payload))
    view = board.orders["X_ZEPH-B1"]
    assert (45_175, 120_000, "working") == (view.filled, view.quantity, view.state)
    assert view.expected_cost_bps is None
    assert "" == bps(view.expected_cost_bps)
    assert "behind 3,778" == against_plan(view).plain


def test_a_target_with_the_coming_fields_is_read() -> None:
    """A target that states its order's state, a rate, a cap and a reason is read, not refused."""
    payload = target(state="working", participation=0.08, max_participation=0.15, reason="plan")
    board = board_with(("status/X_ZEPH-B1", status()), ("targets/X_ZEPH-B1", payload))
    view = board.orders["X_ZEPH-B1"]
    assert (2_500, 0.15) == (view.target.quantity if view.target else None, view.max_participation)
    assert (0.08, "plan") == (view.target_rate, view.target_reason)
    alone = board_with(("targets/X_ZEPH-B1", payload)).orders["X_ZEPH-B1"]
    assert "working" == alone.state  # before any status, the target's state is shown
    assert "(cap 15 %)" == participation(view)  # the planned rate is not what was done


@pytest.mark.parametrize(
    "payload",
    [
        b"not json",
        b"[1, 2]",
        b"\xff\xfe",
        json.dumps({"type": "status", "filled": "many"}).encode(),
    ],
    ids=["text", "list", "not-utf8", "wrong-kind"],
)
def test_a_malformed_message_costs_nothing_else(payload: bytes) -> None:
    """A payload that is not a JSON object, or a field of the wrong kind, breaks nothing."""
    board = board_with(("status/X_ZEPH-B1", status()), ("status/X_ZEPH-B1", payload))
    assert "X_ZEPH-B1" in board.orders


def test_this_bins_filled_share_comes_from_the_target_and_the_status() -> None:
    """Filled in the bin = filled now - (cumulative target - bin target), per the contract."""
    # The target was made with 46,000 - 2,500 = 43,500 filled; 45,175 filled now: 1,675 in the bin.
    board = board_with(("targets/X_ZEPH-B1", target()), ("status/X_ZEPH-B1", status()))
    assert 1_675 == board.orders["X_ZEPH-B1"].bin_filled


@pytest.mark.parametrize(
    ("side", "average", "expected"),
    [("buy", 42.42, 100.0), ("sell", 42.42, -100.0), ("buy", 41.58, -100.0)],
    ids=["buy-above-arrival-costs", "sell-above-arrival-gains", "buy-below-arrival-gains"],
)
def test_cost_so_far_is_the_shortfall_against_arrival(
    side: str, average: float, expected: float
) -> None:
    """(average - arrival) / arrival in bps, signed so that a cost is positive (common practice)."""
    board = board_with(("status/O1", status("O1", side=side, average_price=average)))
    assert expected == pytest.approx(board.orders["O1"].realized_bps)


def test_participation_is_the_orders_fills_over_the_bins_volume() -> None:
    """2,000 shares filled in a bin of 20,000 traded: 10 % (common practice: share of volume)."""
    volume = {"type": "bin", "symbol": "X_ZEPH", "start": "2026-03-10T15:25:00Z"}
    volume |= {"end": "2026-03-10T15:30:00Z", "volume": 20_000}
    # Made at the 15:25 close with 43,500 filled; the next at the 15:30 close with 45,500 filled.
    board = board_with(
        ("status/X_ZEPH-B1", status()),
        ("targets/X_ZEPH-B1", target()),
        ("bins/X_ZEPH", json.dumps(volume).encode()),
        (
            "targets/X_ZEPH-B1",
            target(
                bin_start="2026-03-10T15:30:00Z",
                bin_end="2026-03-10T15:35:00Z",
                quantity=2_400,
                cumulative_target=47_900,
            ),
        ),
    )
    assert 0.10 == pytest.approx(board.orders["X_ZEPH-B1"].participation)


# -- attention ------------------------------------------------------------------------------------


def test_orders_needing_attention_come_first() -> None:
    """Critical alert, then behind plan, then residual at risk, then the rest, then finished."""
    board = board_with(
        ("status/DONE", status("DONE", state="done", deviation_pct=0.0)),
        ("status/CALM", status("CALM", deviation_bins=0.2, deviation_pct=0.5)),
        ("status/HALT", status("HALT", state="halted", deviation_bins=0.1)),
        ("status/LATE", status("LATE", deviation_bins=2.5, deviation_pct=6.0)),
        ("status/CRIT", status("CRIT", deviation_bins=0.0)),
        ("alerts/CRIT", alert("completion_infeasible", "critical", order_id="CRIT")),
    )
    assert ["CRIT", "LATE", "HALT", "CALM", "DONE"] == [v.order_id for v in rows(board)]


def test_a_cleared_or_acknowledged_critical_alert_no_longer_ranks_first() -> None:
    """Cleared by the daemon, or acknowledged in the view: the order leaves the top."""
    board = board_with(
        ("status/A", status("A")),
        ("alerts/A", alert("completion_infeasible", "critical", order_id="A")),
        ("status/B", status("B")),
        ("alerts/B", alert("fill_overfill", "critical", order_id="B")),
    )
    board.take(
        f"{ROOT}/alerts/A",
        alert("completion_infeasible", "info", "cleared", "A"),
        retained=False,
        now=1.0,
    )
    assert 1 == board.acknowledge("B")
    assert [3, 3] == [attention(board.orders[o], board) for o in ("A", "B")]


def test_the_filter_keeps_a_symbol_prefix_and_a_state() -> None:
    """Symbol prefix in any case, and state exactly."""
    board = board_with(
        ("status/Z1", status("Z1")),
        ("status/Z2", status("Z2", state="halted")),
        ("status/K1", status("K1", symbol="X_KALO")),
    )
    assert ["Z1", "Z2"] == sorted(v.order_id for v in rows(board, "order", Filter(symbol="x_ze")))
    assert ["Z2"] == [v.order_id for v in rows(board, "order", Filter(state="halted"))]


# -- banners ------------------------------------------------------------------------------------


def test_an_offline_daemon_gets_a_banner() -> None:
    """The retained last will ("offline") of an instance shows as a banner."""
    board = board_with(
        ("health/t1", b'{"type":"health","status":"online","ts":"2026-03-10T15:00:00Z"}'),
        ("health/t1", b'{"type":"health","status":"offline","client_id":"tracker-t1"}'),
    )
    assert ["offline"] == [banner.kind for banner in board.banners(now=1.0)]


def test_lost_and_silent_sources_in_a_daemons_health_get_banners() -> None:
    """The daemon's health lists the seq ranges that never arrived (``gaps``) and the sources
    gone quiet (``silent``): each is a banner naming the source, the count and the ranges."""
    health = (
        b'{"type":"health","status":"online","ts":"2026-03-10T15:00:00Z",'
        b'"gaps":{"gw":[[3,4],[9,9]],"ok":[]},"silent":["router-1"]}'
    )
    board = board_with(("health/t1", health))
    banners = board.banners(now=1.0)
    assert ["lost", "source"] == [banner.kind for banner in banners]
    assert "3 messages of source gw never reached daemon t1 (seq 3-4, 9)" in banners[0].text
    assert "source router-1 has gone quiet" in banners[1].text
    board = board_with(("health/t1", b'{"type":"health","status":"online","gaps":{},"silent":[]}'))
    assert [] == board.banners(now=1.0)


@pytest.mark.parametrize(
    ("quiet", "state", "expected"),
    [(599.0, "working", []), (601.0, "working", ["stale"]), (601.0, "done", [])],
    ids=["within-two-bins", "past-two-bins", "nothing-working"],
)
def test_data_stopped_means_no_status_or_bin_for_two_bins(
    quiet: float, state: str, expected: list[str]
) -> None:
    """Two 5-minute bins (seen on the bus) without a status or a bin, with an order working."""
    board = board_with(("targets/X_ZEPH-B1", target()), ("status/X_ZEPH-B1", status(state=state)))
    assert expected == [banner.kind for banner in board.banners(now=quiet)]


def test_a_retained_status_is_not_fresh_data() -> None:
    """Statuses the broker kept from earlier do not count as data arriving now."""
    board = Board(ROOT, started=0.0)
    board.take(f"{ROOT}/status/X_ZEPH-B1", status(), retained=True, now=700.0)
    assert ["stale"] == [banner.kind for banner in board.banners(now=700.0)]


def test_the_daemons_clock_is_its_latest_time_plus_the_time_since() -> None:
    """A daemon on a simulated clock: the view's control time follows it, not the wall clock."""
    board = board_with(("status/X_ZEPH-B1", status()), now=10.0)
    wall = datetime(2030, 1, 1, tzinfo=UTC)
    expected = datetime(2026, 3, 10, 15, 25, 14, 155_000, tzinfo=UTC) + timedelta(seconds=5)
    assert expected == board.daemon_clock(15.0, wall)


# -- control ------------------------------------------------------------------------------------


@pytest.mark.parametrize("order_id", ["X_ZEPH-B1", None], ids=["one-order", "all-orders"])
def test_the_control_message_is_valid_under_the_wire_contract(order_id: str | None) -> None:
    """What the view sends passes the daemon's own decoder (tracker.edge.wire.decode)."""
    payload = control_payload("halt", order_id, T0)
    message = decode(f"{ROOT}/control", payload, root=ROOT)
    assert ("halt", order_id, T0) == (message.command, message.order_id, message.ts)  # type: ignore[union-attr]


# -- terminal -----------------------------------------------------------------------------------


def test_keys_are_parsed_from_terminal_input() -> None:
    """Arrows, Enter, Escape and plain keys, in one chunk as a terminal sends them."""
    assert ["up", "down", "enter", "esc", "h", "pagedown"] == parse_keys(
        "\x1b[A\x1b[B\r\x1bh\x1b[6~"
    )


def test_a_slow_terminal_never_blocks_the_view() -> None:
    """The terminal not reading: handing over frames returns at once, stale ones are dropped."""
    read_end, write_end = os.pipe()
    try:
        writer = FrameWriter(write_end)
        writer.start()
        frame = "x" * 100_000  # more than a pipe holds: the writer thread blocks on it
        shown = threading.Thread(target=lambda: [writer.show(frame) for _ in range(50)])
        shown.start()
        shown.join(timeout=30.0)  # a deadlock guard, not a speed check: show() must not block
        assert not shown.is_alive()
        assert writer.dropped >= 45
    finally:
        os.close(read_end)  # the blocked write fails; the thread ends
        writer.close(timeout=2.0)
        os.close(write_end)


def test_the_screen_shows_rows_alerts_health_and_words() -> None:
    """One frame: the order's row in words, the alert in the feed, the daemon's health."""
    board = board_with(
        ("health/t1", b'{"type":"health","status":"online","ts":"2026-03-10T15:00:00Z"}'),
        ("targets/X_ZEPH-B1", target()),
        ("status/X_ZEPH-B1", status()),
        ("alerts/X_ZEPH-B1", alert("behind_plan", "warning")),
    )
    link = LinkStatus("connected", "mqtt://127.0.0.1:1883")
    frame = frame_text(
        render(board, ViewState(), link, now=1.0, wall=T0, zone=NEW_YORK, width=200, height=40),
        200,
        40,
        color=False,
    )
    assert "45,175 of 120,000" in frame
    assert "behind 3,778 (3.1 %)" in frame
    assert "1,675 of 2,500" in frame
    assert "11:26:00" in frame  # the alert's 15:26 UTC in New York (EDT on 10 March 2026)
    assert "t1 online" in frame


# -- command line -------------------------------------------------------------------------------


def test_help_carries_the_caution(capsys: pytest.CaptureFixture[str]) -> None:
    """--help says the tool advises and does not place orders."""
    with pytest.raises(SystemExit):
        main(["watch", "--help"])
    assert "it does not place orders" in capsys.readouterr().out.replace("\n", " ")


def test_broker_settings_come_from_the_same_places_as_run(tmp_path: Path) -> None:
    """Environment and --config give the view the daemon's broker, TLS files and root."""
    from tracker.cli.watch import settings_from_args

    ca = tmp_path / "ca.pem"
    ca.write_text("not read here")
    config = tmp_path / "tracker.toml"
    config.write_text(f'[broker]\nca = "{ca}"\n[daemon]\nroot = "desk"\njournal = "j.sqlite"\n')
    parser_args = [
        "watch",
        "--config",
        str(config),
    ]
    from tracker.cli import build_parser

    args = build_parser().parse_args(parser_args)
    settings = settings_from_args(args, {"TRACKER_BROKER": "mqtts://broker.example:8883"})
    assert ("broker.example", 8883, True, ca, "desk") == (
        settings.broker.host,
        settings.broker.port,
        settings.broker.tls,
        settings.broker.ca,
        settings.root,
    )


def test_once_without_a_broker_says_so(capsys: pytest.CaptureFixture[str]) -> None:
    """No broker on the port: one line naming the broker, exit code 2."""
    from tests.brokers import free_port

    code = main(
        ["watch", "--broker", f"mqtt://127.0.0.1:{free_port()}", "--once", "--timeout", "1"]
    )
    assert 2 == code
    assert "cannot reach the broker" in capsys.readouterr().err


def test_a_symbol_alert_on_its_own_topic_is_the_symbols_not_an_orders() -> None:
    """An alert on {root}/alerts/symbol/X_ZEPH (order_id null) is filed under the symbol."""
    board = board_with(("alerts/symbol/X_ZEPH", alert("volume_shock", "warning", order_id=None)))
    assert ([], ["volume_shock"]) == (list(board.orders), list(board.symbol_alerts["X_ZEPH"]))
