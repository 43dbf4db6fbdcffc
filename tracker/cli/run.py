"""``tracker run``: the live daemon (MQTT in and out, journal, crash recovery)."""

from __future__ import annotations

import argparse
import asyncio
import logging
import os
import signal
import sys
from typing import Any

from tracker.errors import InputError

DESCRIPTION = """\
Run the live daemon: subscribe to orders, fills, market bins and control messages on an MQTT broker
(QoS 1, persistent session), journal every message before applying it, and publish targets,
alerts, retained status per order, errors and a retained health message.

Topics (ROOT defaults to "tracker"):
  in   ROOT/orders/ORDER_ID  ROOT/fills/ORDER_ID  ROOT/bins/SYMBOL  ROOT/control
  out  ROOT/targets/ORDER_ID ROOT/alerts/ORDER_ID ROOT/status/ORDER_ID (retained)  ROOT/errors
       ROOT/health/INSTANCE (retained; "offline" as last will)

On start the daemon loads the newest snapshot of its state stored in the journal ([daemon]
snapshot_records, default every 2,500 records, and at a clean stop), replays the records after it,
and carries on where it stopped. SIGTERM or SIGINT: stop taking messages, finish those in hand,
flush, publish offline, exit 0. One journal per day ([daemon] rotate_journal, day_timezone): the
first record of a new day opens a new journal at PATH carrying the state; the day before's is kept
as STEM-YYYY-MM-DD.SUFFIX beside it. A snapshot is a Python pickle: the journal is the daemon's
private file.

The broker must keep the daemon's session: persistence on, no limit on queued messages
(max_queued_messages 0, max_queued_bytes 0) and a packet size limit (max_packet_size). A stock
Mosquitto keeps only 1,000 messages for a client that is away or slow and drops the rest while
their senders believe them delivered: fills are then lost. It also hands the daemon only 20
unacknowledged messages at a time (max_inflight_messages 1000 lifts that) and delays small packets
(set_tcp_nodelay true). The repository's deploy/mosquitto.conf holds these settings, each with
what breaks without it. To see a loss all the same, senders number their messages ("source" and
"seq" on any inbound message) and send a heartbeat ({"type": "heartbeat", "source", "seq"} on
ROOT/control) when they have had nothing else to say for a few seconds: a jump raises a critical
source_gap alert naming the missing numbers, and a source that sends heartbeats and then nothing
for three of its intervals (at least 10 s) raises a source_silent warning.

Every setting can also come from an environment variable (TRACKER_BROKER, TRACKER_ROOT,
TRACKER_JOURNAL, TRACKER_PROFILES, TRACKER_INSTANCE, TRACKER_BROKER_USERNAME,
TRACKER_BROKER_PASSWORD, TRACKER_BROKER_PASSWORD_FILE, TRACKER_BROKER_CA, TRACKER_BROKER_CERT,
TRACKER_BROKER_KEY, TRACKER_CONFIG) or the TOML file of --config ([broker], [daemon], [engine]
tables). Flags win over the environment, which wins over the file. Passwords never appear in logs.
"""

#: Flag destination -> dotted setting name of :func:`tracker.shell.config.load_settings`.
FLAGS = {
    "broker": "broker.url",
    "username": "broker.username",
    "password_file": "broker.password_file",
    "ca": "broker.ca",
    "cert": "broker.cert",
    "key": "broker.key",
    "root": "daemon.root",
    "journal": "daemon.journal",
    "profiles": "daemon.profiles",
    "instance": "daemon.instance",
    "durability": "daemon.durability",
    "tick_seconds": "daemon.tick_seconds",
    "summary": "daemon.summary",
    "clock_start": "daemon.clock_start",
    "clock_speed": "daemon.clock_speed",
}


def register(subparsers: argparse._SubParsersAction[argparse.ArgumentParser]) -> None:
    """Add the ``run`` sub-command."""
    from tracker.cli import CAUTION

    parser = subparsers.add_parser(
        "run",
        help="run the live daemon on an MQTT broker",
        description=DESCRIPTION,
        epilog=CAUTION,
        formatter_class=argparse.RawDescriptionHelpFormatter,
    )
    add_daemon_arguments(parser)
    parser.set_defaults(handler=run)


def add_broker_arguments(broker: argparse._ArgumentGroup) -> None:
    """The broker connection flags, shared by every command that talks to the daemon's broker
    (none has a default here: unset flags fall through to the environment and the file)."""
    broker.add_argument(
        "--broker",
        metavar="URL",
        help="mqtt://HOST:PORT, or mqtts://HOST:PORT for TLS (default mqtt://127.0.0.1:1883)",
    )
    broker.add_argument("--username", metavar="NAME", help="broker user name")
    broker.add_argument(
        "--password-file",
        metavar="FILE",
        help="file holding the broker password (or TRACKER_BROKER_PASSWORD; never a flag, so it "
        "does not show in the process list)",
    )
    broker.add_argument("--ca", metavar="FILE", help="TLS: CA bundle (PEM) to verify the broker")
    broker.add_argument("--cert", metavar="FILE", help="TLS: client certificate (PEM)")
    broker.add_argument("--key", metavar="FILE", help="TLS: the client certificate's key (PEM)")


def add_daemon_arguments(parser: argparse.ArgumentParser) -> None:
    """The daemon's flags (none has a default here: unset flags fall through to env and file)."""
    add_broker_arguments(parser.add_argument_group("broker"))
    daemon = parser.add_argument_group("daemon")
    daemon.add_argument("--root", metavar="ROOT", help="MQTT topic root (default tracker)")
    daemon.add_argument("--journal", metavar="PATH", help="journal file (SQLite; created if new)")
    daemon.add_argument(
        "--profiles", metavar="DIR", help="folder of liquidity profiles, one SYMBOL.json each"
    )
    daemon.add_argument(
        "--config", metavar="FILE", help="TOML file with [broker], [daemon], [engine] tables"
    )
    daemon.add_argument(
        "--instance",
        metavar="ID",
        help="instance id: names the health topic and the MQTT client id (default main)",
    )
    daemon.add_argument(
        "--durability",
        choices=("full", "normal"),
        help="journal fsync policy: full (fsync every commit, default) or normal (a process "
        "crash loses nothing, a power cut may lose the last commits)",
    )
    daemon.add_argument(
        "--tick-seconds",
        metavar="S",
        help="staleness timer interval in seconds of the daemon's clock (default 1; 0: off)",
    )
    daemon.add_argument("--summary", metavar="FILE", help="write summary.json here on a clean stop")
    daemon.add_argument(
        "--clock-start",
        metavar="TIME",
        help="simulated clock for demos and tests: start at this ISO 8601 time ...",
    )
    daemon.add_argument(
        "--clock-speed", metavar="X", help="... and run X times real time (default 1)"
    )
    logs = parser.add_argument_group("logging")
    logs.add_argument(
        "--log-format",
        choices=("auto", "json", "console"),
        default="auto",
        help="JSON lines, or a readable console format; auto: console on a terminal",
    )
    logs.add_argument(
        "--log-level",
        choices=("debug", "info", "warning", "error"),
        default="info",
        help="least severe events logged (default info)",
    )


def settings_from_args(args: argparse.Namespace, environ: dict[str, str] | None = None) -> Any:
    """Build :class:`tracker.shell.config.Settings` from flags, the environment and --config."""
    from tracker.shell.config import load_settings

    flags = {name: getattr(args, dest, None) for dest, name in FLAGS.items()}
    return load_settings(flags, os.environ if environ is None else environ, args.config)


def configure_logging(log_format: str = "auto", level: str = "info") -> None:
    """structlog to stderr: one JSON object per line, or a readable renderer on a terminal.

    Records of the standard library's loggers (paho, amqtt) go through the same renderer.
    """
    import structlog

    console = log_format == "console" or (log_format == "auto" and sys.stderr.isatty())
    renderer: Any = (
        structlog.dev.ConsoleRenderer(colors=sys.stderr.isatty())
        if console
        else structlog.processors.JSONRenderer(sort_keys=False)
    )
    shared: list[Any] = [
        structlog.contextvars.merge_contextvars,
        structlog.stdlib.add_log_level,
        structlog.stdlib.add_logger_name,
        structlog.processors.TimeStamper(fmt="iso", utc=True),
    ]
    numeric = getattr(logging, level.upper())
    structlog.configure(
        processors=[
            *shared,
            structlog.processors.StackInfoRenderer(),
            structlog.stdlib.ProcessorFormatter.wrap_for_formatter,
        ],
        wrapper_class=structlog.make_filtering_bound_logger(numeric),
        logger_factory=structlog.stdlib.LoggerFactory(),
        cache_logger_on_first_use=True,
    )
    formatter = structlog.stdlib.ProcessorFormatter(
        foreign_pre_chain=shared,
        processors=[
            structlog.stdlib.ProcessorFormatter.remove_processors_meta,
            *([] if console else [structlog.processors.format_exc_info]),
            renderer,
        ],
    )
    handler = logging.StreamHandler(sys.stderr)
    handler.setFormatter(formatter)
    root = logging.getLogger()
    root.handlers[:] = [handler]
    root.setLevel(numeric)
    # The MQTT libraries are chatty below warning level.
    for name in ("mqtt", "amqtt", "transitions", "paho"):
        logging.getLogger(name).setLevel(max(numeric, logging.WARNING))


def run(args: argparse.Namespace) -> int:
    """Run the daemon until SIGTERM/SIGINT; return 0 after an orderly stop."""
    settings = settings_from_args(args)
    configure_logging(args.log_format, args.log_level)
    return asyncio.run(serve(settings))


async def serve(settings: Any) -> int:
    """Run one daemon with signal handlers installed; 0 after an orderly stop."""
    from tracker.shell.daemon import Daemon

    loop = asyncio.get_running_loop()
    async with Daemon(settings, freeze=True) as daemon:
        for signum in (signal.SIGTERM, signal.SIGINT):
            loop.add_signal_handler(signum, daemon.stop)
        try:
            await daemon.run()
        finally:
            for signum in (signal.SIGTERM, signal.SIGINT):
                loop.remove_signal_handler(signum)
    if daemon.failure is not None:
        raise daemon.failure
    if not daemon.stopped_cleanly:
        raise InputError("the daemon did not stop cleanly; see the log")
    return 0
