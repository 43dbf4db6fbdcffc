"""The shipped broker configuration holds the settings the daemon's guarantees rest on."""

from __future__ import annotations

from tests.brokers import SHIPPED_CONFIG, contract_lines


def test_shipped_contract_names_every_setting_the_daemon_needs() -> None:
    """Persistence, an unlimited queue for the daemon's session and a packet size limit."""
    settings = dict(line.split(None, 1) for line in contract_lines())
    expected = {
        "persistence": "true",
        "max_queued_messages": "0",
        "max_queued_bytes": "0",
        "max_packet_size": "1048576",
    }
    assert expected == {key: settings.get(key) for key in expected}


def test_each_contract_setting_says_what_breaks_without_it() -> None:
    """Each group of contract settings follows a comment saying what breaks "Without it"."""
    section = SHIPPED_CONFIG.read_text(encoding="utf-8").split("# --- contract", 1)[1]
    unexplained = []
    reason = False
    for line in section.splitlines()[1:]:
        if line.startswith("# Without it"):
            reason = True
        elif line.strip() and not line.startswith("#"):
            if not reason:
                unexplained.append(line)
        elif not line.startswith("#"):
            reason = False  # a blank line ends a group
    assert [] == unexplained
