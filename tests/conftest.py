"""Fixtures shared by the test files."""

from __future__ import annotations

from collections.abc import Iterator

import pytest

from tests.brokers import DaemonProcess


@pytest.fixture
def daemons() -> Iterator[list[DaemonProcess]]:
    """Daemon subprocesses started by a test, killed at teardown whatever happened."""
    started: list[DaemonProcess] = []
    yield started
    for daemon in started:
        daemon.cleanup()
