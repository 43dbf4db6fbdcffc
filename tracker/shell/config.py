"""Settings of the live daemon: command-line flags, environment variables and a TOML file.

Every setting can come from three places; the first that gives it wins:

1. a command-line flag of ``tracker run`` (``--broker``, ``--root``, ...),
2. an environment variable (``TRACKER_BROKER``, ``TRACKER_ROOT``, ...; see :data:`ENVIRONMENT`),
3. the TOML file named by ``--config`` or ``TRACKER_CONFIG``::

       [broker]
       url = "mqtts://broker.example:8883"   # mqtt:// (plain) or mqtts:// (TLS)
       username = "desk"
       password_file = "/run/secrets/mqtt"   # or password = "..." (keep the file private)
       ca = "/etc/tracker/ca.pem"            # TLS: CA bundle; cert + key for a client certificate
       cert = "/etc/tracker/client.pem"
       key = "/etc/tracker/client.key"
       keepalive = 30

       [daemon]
       root = "tracker"                      # MQTT topic root
       journal = "/var/lib/tracker/journal.sqlite"
       profiles = "/etc/tracker/profiles"    # liquidity profiles (PROFILE.json files)
       instance = "desk-1"                   # names the health topic and the MQTT client id
       durability = "full"                   # journal fsync policy: "full" or "normal"
       tick_seconds = 1.0                    # staleness timer; 0 turns it off
       max_payload_bytes = 65536
       queue_size = 1000
       snapshot_records = 2500               # a snapshot of the state every so many records
       snapshot_seconds = 900                # ... or this often (seconds) when records came
       rotate_journal = true                 # one journal per day (the day before's kept dated)
       day_timezone = "America/New_York"     # whose midnight ends the day

       [engine]                              # thresholds, passed to EngineConfig.from_mapping
       ...

and otherwise the default. Credentials are held as :class:`Secret`, whose ``repr`` and ``str`` are
``***``; a URL given with ``user@`` has the user moved into the credentials and is kept and shown
without it; a URL with a password is refused (the password belongs in a file), so no process list,
log line or error message carries a password.
"""

from __future__ import annotations

import math
import re
from collections.abc import Mapping
from dataclasses import dataclass, field
from datetime import UTC, datetime
from pathlib import Path
from typing import Any, Final, Literal
from urllib.parse import unquote, urlsplit

from tracker.core.topics import DEFAULT_ROOT
from tracker.errors import InputError
from tracker.shell.files import read_document

__all__ = [
    "ENVIRONMENT",
    "BrokerSettings",
    "Secret",
    "Settings",
    "load_settings",
    "parse_broker_url",
    "validate_root",
]

DEFAULT_BROKER: Final = "mqtt://127.0.0.1:1883"

#: Environment variable of each setting (the key is the setting's dotted name).
ENVIRONMENT: Final[Mapping[str, str]] = {
    "broker.url": "TRACKER_BROKER",
    "broker.username": "TRACKER_BROKER_USERNAME",
    "broker.password": "TRACKER_BROKER_PASSWORD",
    "broker.password_file": "TRACKER_BROKER_PASSWORD_FILE",
    "broker.ca": "TRACKER_BROKER_CA",
    "broker.cert": "TRACKER_BROKER_CERT",
    "broker.key": "TRACKER_BROKER_KEY",
    "daemon.root": "TRACKER_ROOT",
    "daemon.journal": "TRACKER_JOURNAL",
    "daemon.profiles": "TRACKER_PROFILES",
    "daemon.instance": "TRACKER_INSTANCE",
    "daemon.durability": "TRACKER_DURABILITY",
    "daemon.tick_seconds": "TRACKER_TICK_SECONDS",
}
CONFIG_ENVIRONMENT: Final = "TRACKER_CONFIG"

_LEVEL = re.compile(r"[A-Za-z0-9._-]{1,64}")
_ID_RULE = "1 to 64 characters of A-Z, a-z, 0-9, '.', '_' or '-'"

_BROKER_KEYS = frozenset(
    {"url", "username", "password", "password_file", "ca", "cert", "key", "keepalive"}
)
_DAEMON_KEYS = frozenset(
    {
        "root",
        "journal",
        "profiles",
        "instance",
        "durability",
        "tick_seconds",
        "heartbeat_seconds",
        "max_payload_bytes",
        "queue_size",
        "batch_size",
        "reconnect_min_seconds",
        "reconnect_max_seconds",
        "clock_start",
        "clock_speed",
        "summary",
        "snapshot_records",
        "snapshot_seconds",
        "rotate_journal",
        "day_timezone",
    }
)


class Secret:
    """A credential that never shows itself in logs, errors or reprs."""

    __slots__ = ("_value",)

    def __init__(self, value: str) -> None:
        self._value = value

    def reveal(self) -> str:
        """The secret itself (only for handing to the MQTT client)."""
        return self._value

    def __repr__(self) -> str:
        return "Secret('***')"

    def __str__(self) -> str:
        return "***"

    def __eq__(self, other: object) -> bool:
        return isinstance(other, Secret) and other._value == self._value

    def __hash__(self) -> int:
        return hash(self._value)


@dataclass(frozen=True)
class BrokerSettings:
    """Where and how to connect to the MQTT broker.

    Attributes:
        host, port: The broker address.
        tls: Connect with TLS (``mqtts://``, or implied by a CA or client certificate).
        username, password: Credentials, or ``None``.
        ca, cert, key: TLS files: CA bundle, client certificate and its key.
        keepalive: MQTT keep-alive in seconds.
    """

    host: str = "127.0.0.1"
    port: int = 1883
    tls: bool = False
    username: str | None = None
    password: Secret | None = None
    ca: Path | None = None
    cert: Path | None = None
    key: Path | None = None
    keepalive: int = 30

    @property
    def url(self) -> str:
        """The broker URL without credentials (safe to log)."""
        return f"{'mqtts' if self.tls else 'mqtt'}://{self.host}:{self.port}"


@dataclass(frozen=True)
class Settings:
    """Everything ``tracker run`` needs.

    Attributes:
        broker: The broker connection.
        root: MQTT topic root.
        journal: The journal file.
        profiles: Folder of liquidity profiles (PROFILE.json per symbol), or ``None`` for the
            built-in default profile.
        instance: This instance's id: names ``{root}/health/{instance}`` and the MQTT client id
            ``tracker-{instance}`` (stable, so the broker keeps our session while we are down).
        durability: The journal's fsync policy ("full" or "normal"; see
        :mod:`tracker.shell.journal`). tick_seconds: Interval of the staleness timer in seconds of
        the daemon's clock (0: off). heartbeat_seconds: Interval of the health message in wall-clock
        seconds. max_payload_bytes: Larger inbound payloads are rejected.
        queue_size: Capacity of the inbound queue (back-pressure beyond it).
        batch_size: Most messages journaled in one commit.
        reconnect_min_seconds, reconnect_max_seconds: Bounds of the reconnect back-off.
        clock_start, clock_speed: A simulated clock (the demo): starts at ``clock_start`` and runs
            ``clock_speed`` times real time. ``None``: the wall clock (UTC).
        engine: The ``[engine]`` table, for :meth:`EngineConfig.from_mapping`.
        summary: Where to write ``summary.json`` on a clean stop (``None``: not written).
        snapshot_records: Store a snapshot of the engine's state in the journal after every so
            many journal records (0: never), so that a restart replays at most about that many
            (during a burst the snapshot waits for the daemon to catch up, or until applying
            the records since the last one took 1.5 s of CPU).
        snapshot_seconds: Also store one when this many wall-clock seconds have passed since the
            last and records came meanwhile (0: only by count). A clean stop stores one too.
        rotate_journal: One journal per day: the first record of a new day (by the calendar of
            ``day_timezone``) goes into a new journal at the configured path, which starts from
            the state carried over as a snapshot; the day before's is kept as
            ``STEM-YYYY-MM-DD.SUFFIX`` beside it.
        day_timezone: The IANA time zone whose midnight ends a day.
    """

    journal: Path
    broker: BrokerSettings = field(default_factory=BrokerSettings)
    root: str = DEFAULT_ROOT
    profiles: Path | None = None
    instance: str = "main"
    durability: Literal["full", "normal"] = "full"
    tick_seconds: float = 1.0
    heartbeat_seconds: float = 10.0
    max_payload_bytes: int = 65_536
    queue_size: int = 1_000
    batch_size: int = 64
    reconnect_min_seconds: float = 0.2
    reconnect_max_seconds: float = 30.0
    clock_start: datetime | None = None
    clock_speed: float = 1.0
    engine: Mapping[str, Any] = field(default_factory=dict)
    summary: Path | None = None
    snapshot_records: int = 2_500
    snapshot_seconds: float = 900.0
    rotate_journal: bool = True
    day_timezone: str = "America/New_York"

    @property
    def client_id(self) -> str:
        """The MQTT client id: stable per instance, so the persistent session survives restarts."""
        return f"tracker-{self.instance}"


# ------------------------------------------------------------------------------------------------
# Validation helpers


def validate_root(root: str, *, field: str = "root") -> str:
    """Check a topic root: one or more levels of letters, digits, '.', '_' or '-', joined by '/'."""
    if not isinstance(root, str) or not root:
        raise InputError("must be a non-empty topic root such as 'tracker'", field=field)
    for level in root.split("/"):
        if not _LEVEL.fullmatch(level):
            raise InputError(
                f"each level of the topic root must be {_ID_RULE} (no MQTT wildcards '+' or '#', "
                f"no empty level); got {root!r}",
                field=field,
            )
    return root


def _validate_id(value: Any, field: str) -> str:
    if not isinstance(value, str) or not _LEVEL.fullmatch(value):
        raise InputError(f"must be {_ID_RULE}; got {value!r}", field=field)
    return value


def parse_broker_url(
    url: str, *, field: str = "broker.url"
) -> tuple[BrokerSettings, str | None, Secret | None]:
    """Split ``mqtt[s]://[user@]host[:port]`` into settings and the user name.

    A password in the URL is refused: it would show in the process list. It belongs in a file
    (``--password-file``) or the environment.

    Returns:
        The broker settings (host, port, tls), the username found in the URL, and ``None`` for the
        password (kept in the signature for the callers that merge credentials).

    Raises:
        InputError: not a URL of that form, or one with a password (the message never repeats it).
    """
    if not isinstance(url, str):
        raise InputError(f"must be a URL string like {DEFAULT_BROKER}", field=field)
    try:
        parts = urlsplit(url)
        port = parts.port
    except ValueError:
        raise InputError(
            f"is not a broker URL; write it like {DEFAULT_BROKER} (port 1 to 65535)", field=field
        ) from None
    safe = _redacted(url)
    if parts.scheme not in ("mqtt", "mqtts"):
        raise InputError(f"must start with mqtt:// or mqtts:// (TLS); got {safe!r}", field=field)
    if not parts.hostname:
        raise InputError(
            f"names no host; write it like {DEFAULT_BROKER}; got {safe!r}", field=field
        )
    if parts.path not in ("", "/") or parts.query or parts.fragment:
        raise InputError(
            f"must be only scheme, host and port (no path or query); got {safe!r}", field=field
        )
    if parts.password:
        raise InputError(
            "holds a password, which anyone can read in the process list and the shell history; "
            "keep only the user name in the URL and put the password in a file given by "
            f"--password-file (or TRACKER_BROKER_PASSWORD_FILE); got {safe!r}",
            field=field,
        )
    tls = parts.scheme == "mqtts"
    if port is None:
        port = 8883 if tls else 1883
    username = unquote(parts.username) if parts.username else None
    password = Secret(unquote(parts.password)) if parts.password else None
    return BrokerSettings(host=parts.hostname, port=port, tls=tls), username, password


def _redacted(url: str) -> str:
    """The URL with any ``user:password@`` replaced by ``***@``."""
    if "@" not in url:
        return url
    scheme, sep, rest = url.partition("://")
    if not sep:
        return "***"
    return f"{scheme}://***@{rest.rpartition('@')[2]}"


def _number(
    value: Any, field: str, *, minimum: float, integer: bool = False, allow_zero: bool = False
) -> Any:
    if isinstance(value, str):
        try:
            value = int(value) if integer else float(value)
        except ValueError:
            raise InputError(f"must be a number; got {value!r}", field=field) from None
    if isinstance(value, bool) or not isinstance(value, int | float) or not math.isfinite(value):
        raise InputError(f"must be a finite number; got {value!r}", field=field)
    if integer and not float(value).is_integer():
        raise InputError(f"must be a whole number; got {value!r}", field=field)
    if value < minimum and not (allow_zero and value == 0):
        allowed = f"at least {minimum}" + (" (or 0 to turn it off)" if allow_zero else "")
        raise InputError(f"must be {allowed}; got {value!r}", field=field)
    return int(value) if integer else float(value)


def _path(value: Any, field: str) -> Path:
    if not isinstance(value, str | Path) or not str(value):
        raise InputError(f"must be a file or folder path; got {value!r}", field=field)
    return Path(value).expanduser()


def _existing_file(value: Any, field: str) -> Path:
    path = _path(value, field)
    if not path.is_file():
        raise InputError(f"file {path} does not exist or is not a file", field=field)
    return path


def _time(value: Any, field: str) -> datetime:
    if isinstance(value, datetime):
        moment = value
    else:
        try:
            moment = datetime.fromisoformat(str(value))
        except ValueError:
            raise InputError(
                "must be an ISO 8601 time with an offset, e.g. 2026-03-02T14:30:00Z; "
                f"got {value!r}",
                field=field,
            ) from None
    if moment.tzinfo is None:
        raise InputError(f"must carry a UTC offset, e.g. 'Z'; got {value!r}", field=field)
    return moment.astimezone(UTC)


# ------------------------------------------------------------------------------------------------
# Loading


def read_config_file(path: str | Path) -> dict[str, Any]:
    """Read and check the layout of a TOML config file (tables broker, daemon, engine).

    Raises:
        InputError: The file cannot be read, is not TOML, or has an unknown table or key.
    """
    path = Path(path)
    data = read_document(path, "--config")
    allowed = {"broker": _BROKER_KEYS, "daemon": _DAEMON_KEYS, "engine": None}
    for table, value in data.items():
        if table not in allowed:
            raise InputError(
                f"unknown table [{table}] in {path}; the tables are [broker], [daemon], [engine]",
                field=table,
            )
        if not isinstance(value, dict):
            raise InputError(f"{table} in {path} must be a table [{table}]", field=table)
        keys = allowed[table]
        if keys is None:
            continue
        for key in value:
            if key not in keys:
                raise InputError(
                    f"unknown key in {path}; [{table}] takes {', '.join(sorted(keys))}",
                    field=f"{table}.{key}",
                )
    return data


def load_settings(
    flags: Mapping[str, Any],
    environ: Mapping[str, str],
    config_file: str | Path | None = None,
) -> Settings:
    """Merge flags, environment and config file into :class:`Settings` (flags win, then env).

    Args:
        flags: Dotted setting names (``"broker.url"``, ``"daemon.journal"``, ...) to values given on
            the command line; ``None`` values count as not given.
        environ: The environment (``os.environ``), read for :data:`ENVIRONMENT`.
        config_file: The TOML file; when ``None``, ``TRACKER_CONFIG`` from ``environ`` if set.

    Raises:
        InputError: A value is missing or not allowed; the field says which setting.
    """
    if config_file is None and environ.get(CONFIG_ENVIRONMENT):
        config_file = environ[CONFIG_ENVIRONMENT]
    file_data = read_config_file(config_file) if config_file is not None else {}

    def get(name: str) -> Any:
        if flags.get(name) is not None:
            return flags[name]
        env_name = ENVIRONMENT.get(name)
        if env_name is not None and environ.get(env_name):
            return environ[env_name]
        table, _, key = name.partition(".")
        return file_data.get(table, {}).get(key)

    url = get("broker.url") or DEFAULT_BROKER
    broker, url_user, url_password = parse_broker_url(url)
    username = get("broker.username") or url_user
    if username is not None and not isinstance(username, str):
        raise InputError(
            f"must be a string; got {type(username).__name__}", field="broker.username"
        )
    password: Secret | None = url_password
    if get("broker.password") is not None:
        raw = get("broker.password")
        if not isinstance(raw, str):
            raise InputError("must be a string", field="broker.password")
        password = Secret(raw)
    if get("broker.password_file") is not None:
        secret_path = _existing_file(get("broker.password_file"), "broker.password_file")
        try:
            password = Secret(secret_path.read_text(encoding="utf-8").rstrip("\r\n"))
        except OSError as exc:
            raise InputError(
                f"cannot read {secret_path}: {exc.strerror}", field="broker.password_file"
            ) from exc
    if password is not None and username is None:
        raise InputError(
            "a password was given without a username; set broker.username too",
            field="broker.username",
        )
    ca = get("broker.ca")
    cert = get("broker.cert")
    key = get("broker.key")
    if (cert is None) != (key is None):
        raise InputError(
            "a client certificate needs both broker.cert and broker.key", field="broker.cert"
        )
    keepalive = get("broker.keepalive")
    broker = BrokerSettings(
        host=broker.host,
        port=broker.port,
        tls=broker.tls or ca is not None or cert is not None,
        username=username,
        password=password,
        ca=_existing_file(ca, "broker.ca") if ca is not None else None,
        cert=_existing_file(cert, "broker.cert") if cert is not None else None,
        key=_existing_file(key, "broker.key") if key is not None else None,
        keepalive=30
        if keepalive is None
        else _number(keepalive, "broker.keepalive", minimum=5, integer=True),
    )

    journal = get("daemon.journal")
    if journal is None:
        raise InputError(
            "is required: give --journal PATH, TRACKER_JOURNAL or [daemon] journal in the "
            "config file",
            field="journal",
        )
    profiles = get("daemon.profiles")
    if profiles is not None:
        profiles = _path(profiles, "daemon.profiles")
        if not profiles.is_dir():
            raise InputError(f"folder {profiles} does not exist", field="daemon.profiles")
    durability = get("daemon.durability") or "full"
    if durability not in ("full", "normal"):
        raise InputError(
            f"must be 'full' or 'normal'; got {durability!r}", field="daemon.durability"
        )
    clock_start = get("daemon.clock_start")
    defaults = Settings(journal=Path("."))

    def number(name: str, default: Any, **rules: Any) -> Any:
        value = get(f"daemon.{name}")
        return default if value is None else _number(value, f"daemon.{name}", **rules)

    reconnect_min = number("reconnect_min_seconds", defaults.reconnect_min_seconds, minimum=0.01)
    reconnect_max = number("reconnect_max_seconds", defaults.reconnect_max_seconds, minimum=0.01)
    if reconnect_max < reconnect_min:
        raise InputError(
            f"must be at least reconnect_min_seconds ({reconnect_min}); got {reconnect_max}",
            field="daemon.reconnect_max_seconds",
        )
    summary = get("daemon.summary")
    return Settings(
        journal=_path(journal, "daemon.journal"),
        broker=broker,
        root=validate_root(get("daemon.root") or DEFAULT_ROOT, field="daemon.root"),
        profiles=profiles,
        instance=_validate_id(get("daemon.instance") or defaults.instance, "daemon.instance"),
        durability="normal" if durability == "normal" else "full",
        tick_seconds=number("tick_seconds", defaults.tick_seconds, minimum=0.001, allow_zero=True),
        heartbeat_seconds=number("heartbeat_seconds", defaults.heartbeat_seconds, minimum=0.1),
        max_payload_bytes=number(
            "max_payload_bytes", defaults.max_payload_bytes, minimum=256, integer=True
        ),
        queue_size=number("queue_size", defaults.queue_size, minimum=1, integer=True),
        batch_size=number("batch_size", defaults.batch_size, minimum=1, integer=True),
        reconnect_min_seconds=reconnect_min,
        reconnect_max_seconds=reconnect_max,
        clock_start=None if clock_start is None else _time(clock_start, "daemon.clock_start"),
        clock_speed=number("clock_speed", defaults.clock_speed, minimum=1e-6),
        engine=dict(file_data.get("engine", {})),
        summary=None if summary is None else _path(summary, "daemon.summary"),
        snapshot_records=number(
            "snapshot_records", defaults.snapshot_records, minimum=1, integer=True, allow_zero=True
        ),
        snapshot_seconds=number(
            "snapshot_seconds", defaults.snapshot_seconds, minimum=1, allow_zero=True
        ),
        rotate_journal=_flag(get("daemon.rotate_journal"), "daemon.rotate_journal", True),
        day_timezone=_zone(get("daemon.day_timezone") or defaults.day_timezone),
    )


def _flag(value: Any, field: str, default: bool) -> bool:
    if value is None:
        return default
    if isinstance(value, bool):
        return value
    if isinstance(value, str) and value.lower() in ("true", "false", "1", "0", "yes", "no"):
        return value.lower() in ("true", "1", "yes")
    raise InputError(f"must be true or false; got {value!r}", field=field)


def _zone(value: Any) -> str:
    from zoneinfo import ZoneInfo

    try:
        ZoneInfo(str(value))
    except (ValueError, KeyError) as exc:
        raise InputError(
            f"must be an IANA time zone such as America/New_York; got {value!r}",
            field="daemon.day_timezone",
        ) from exc
    return str(value)
