"""``tracker watch``: the desk's live view of a running daemon, fed only from the MQTT bus.

Modules, one concept each: :mod:`~tracker.watch.reading` (tolerant reading of published
messages), :mod:`~tracker.watch.board` (what the bus said), :mod:`~tracker.watch.ordering`
(attention first, sorts, filter), :mod:`~tracker.watch.link` (the MQTT connection),
:mod:`~tracker.watch.screen` and :mod:`~tracker.watch.chart` (what is drawn),
:mod:`~tracker.watch.terminal` (keys in, frames out, never blocking), :mod:`~tracker.watch.app`
(the interactive loop and control messages), :mod:`~tracker.watch.snapshot` (``--once``).
"""

from tracker.watch.board import Board
from tracker.watch.link import Link

__all__ = ["Board", "Link"]
