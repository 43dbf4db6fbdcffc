"""The one place for writing times and floats, and the topic names."""

from datetime import UTC, datetime, timedelta, timezone

import pytest

from tracker.core.formats import rounded, utc_text
from tracker.core.topics import DEFAULT_ROOT, Topics


def test_utc_text_converts_to_utc_with_z() -> None:
    """An aware time in any zone is written in UTC with a Z."""
    moment = datetime(2026, 3, 10, 9, 30, tzinfo=timezone(timedelta(hours=-5)))
    assert "2026-03-10T14:30:00Z" == utc_text(moment)


def test_utc_text_milliseconds() -> None:
    """Recordings write milliseconds."""
    moment = datetime(2026, 3, 10, 14, 30, 0, 123456, tzinfo=UTC)
    assert "2026-03-10T14:30:00.123Z" == utc_text(moment, "milliseconds")


@pytest.mark.parametrize(
    ("value", "expected"),
    [
        (1.23456789, 1.234568),
        (-1e-9, 0.0),
        (float("nan"), None),
        (float("inf"), None),
        (None, None),
        (3, 3),
        ({"b": 0.1234567, "a": [1e-12, 2.0]}, {"a": [0.0, 2.0], "b": 0.123457}),
    ],
    ids=["six-decimals", "no-negative-zero", "nan", "inf", "none", "int", "nested-sorted"],
)
def test_rounded(value: object, expected: object) -> None:
    """Floats are rounded to six decimals, non-finite ones become None, keys are sorted."""
    assert expected == rounded(value)


def test_rounded_fewer_digits() -> None:
    """A caller can ask for fewer decimals."""
    assert 12.3457 == rounded(12.345678, 4)


def test_topics_under_root() -> None:
    """Every topic is under the root; symbol and engine alerts sit two levels below alerts."""
    topics = Topics("desk")
    assert ("desk/orders/+", "desk/fills/+", "desk/bins/+", "desk/control") == topics.inbound
    assert "desk/targets/A-1" == topics.targets("A-1")
    assert "desk/alerts/engine/all" == topics.alerts(None)
    assert "desk/alerts/symbol/X_ZEPH" == topics.symbol_alerts("X_ZEPH")
    assert "desk/acks/A-1" == topics.acks("A-1")
    assert "desk/health/i1" == topics.health("i1")
    assert DEFAULT_ROOT == Topics().root


@pytest.mark.parametrize(
    ("topic", "expected"),
    [("t/orders/A-1", "A-1"), ("t/fills/B", "B"), ("t/bins/X", None), ("t/orders/a/b", None)],
    ids=["order", "fill", "bin", "nested"],
)
def test_order_id_of(topic: str, expected: str | None) -> None:
    """Only an order or fill topic names an order."""
    assert expected == Topics("t").order_id_of(topic)


@pytest.mark.parametrize(
    ("topic", "expected"),
    [
        ("desk/orders/A-1", ("orders", "A-1")),
        ("desk/fills/A-1", ("fills", "A-1")),
        ("desk/bins/X_ZEPH", ("bins", "X_ZEPH")),
        ("desk/control", ("control", None)),
        ("desk/tick", ("tick", None)),
        ("desk/orders", None),
        ("desk/orders/A/B", None),
        ("desk/targets/A-1", None),
        ("other/orders/A-1", None),
    ],
    ids=["order", "fill", "bin", "control", "tick", "no-id", "too-deep", "outbound", "other-root"],
)
def test_inbound_topics_split_into_kind_and_name(
    topic: str, expected: tuple[str, str | None] | None
) -> None:
    """An inbound topic gives its kind and last level; any other topic gives None."""
    assert expected == Topics("desk").split_inbound(topic)
