"""One event's work in progress: what it has said so far and the re-plans it asks for.

A :class:`Step` is made for each event and passed explicitly to every function that works on
that event (nothing about the event in progress lives on the engine). It holds the event time,
the outputs so far, the orders to re-plan (with why), the re-plans ready to solve
(:class:`ReplanJob`) and a cache of where each symbol's session stands at a given time.
"""

from __future__ import annotations

from dataclasses import dataclass, field
from datetime import date, datetime

from tracker.core.engine.savepoint import Savepoint
from tracker.core.engine.state import OrderState
from tracker.core.messages import Outbound
from tracker.core.problem import Problem


@dataclass(frozen=True, slots=True)
class ReplanJob:
    """One re-plan to solve: an order, from its first bin still ahead.

    Attributes:
        order: The order.
        reason: Why: ``start``, ``amend``, ``resume`` or ``bin`` (a bin closed on its symbol).
        first: The first bin still ahead (absolute index in the session).
        fraction: The part of that bin still ahead (1 = all of it).
        blocked: The market is beyond the order's limit: nothing trades in ``first``, the plan
            starts at the bin after it.
        problem: The remaining-horizon problem, or ``None`` when no bin is left to trade in.
    """

    order: OrderState
    reason: str
    first: int
    fraction: float
    blocked: bool
    problem: Problem | None


@dataclass(slots=True, eq=False)
class Step:
    """The work of one event.

    Attributes:
        ts: The event's time (its ``ts``).
        undo: Where the event saves each record before changing it (see
            :mod:`tracker.core.engine.savepoint`).
        out: The outputs produced so far, in production order.
        to_plan: Orders to re-plan once the event is applied: order id -> reason (the first
            reason asked for wins; a later stop of the order removes it).
        jobs: The re-plans built from ``to_plan``, ready to solve.
        offsets: Cache: (symbol, time) -> (local day, bin offset) of the symbol's session.
        retried: The orders whose re-plan a failed event left to this one (tried once more).
        ack_note: For an order message the engine accepted: a remark for its acknowledgement
            (say, a cancel of an order already done), else ``None``.
    """

    ts: datetime
    undo: Savepoint
    out: list[Outbound] = field(default_factory=list)
    to_plan: dict[str, str] = field(default_factory=dict)
    jobs: list[ReplanJob] = field(default_factory=list)
    offsets: dict[tuple[str, datetime], tuple[date, float]] = field(default_factory=dict)
    retried: frozenset[str] = frozenset()
    ack_note: str | None = None

    def emit(self, message: Outbound | None) -> None:
        """Add an output (``None``: nothing to say)."""
        if message is not None:
            self.out.append(message)


class Rejected(Exception):
    """The current message is rejected with this reason (it becomes one ErrorMessage).

    Attributes:
        reason: What is wrong and how to fix it.
        extra: Outputs that go with the error (a one-shot alert on the order's topic).
    """

    def __init__(self, reason: str, extra: list[Outbound] | None = None) -> None:
        super().__init__(reason)
        self.reason = reason
        self.extra = extra or []


__all__ = ["Rejected", "ReplanJob", "Step"]
