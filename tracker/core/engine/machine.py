"""The engine: one event in, its outputs out.

See :mod:`tracker.core.engine` for the theory of operation. :class:`Engine` dispatches: each event
gets a fresh :class:`~tracker.core.engine.step.Step`, its handler
(:mod:`~tracker.core.engine.handlers`) applies it to the state, moving event time
(:mod:`~tracker.core.engine.timers`); then the re-plans it asked for are built, solved and applied
(:mod:`~tracker.core.engine.planning`) and the outputs (:mod:`~tracker.core.engine.outputs`) are
returned, ordered by order id. A message the engine cannot accept is rejected whole: one
ErrorMessage (plus, for some fills, a one-shot alert on the order's topic), and no order changes.
"""

from __future__ import annotations

from collections import Counter
from collections.abc import Mapping, Sequence
from datetime import datetime, timedelta
from typing import Any

from tracker.core.engine import handlers, outputs, planning
from tracker.core.engine.config import EngineConfig
from tracker.core.engine.state import EngineState
from tracker.core.engine.step import Rejected, Step
from tracker.core.lifecycle import State
from tracker.core.messages import (
    AlertMessage,
    BinMessage,
    ControlMessage,
    ErrorMessage,
    FillMessage,
    Inbound,
    OrderMessage,
    Outbound,
    Tick,
    payload_text,
)
from tracker.core.profiles import Profile
from tracker.core.solve import Schedule
from tracker.core.topics import DEFAULT_ROOT, Topics
from tracker.errors import InputError


class Engine:
    """The pure core: feed it inbound events, get outbound messages.

    Args:
        config: Thresholds and settings (defaults when ``None``).
        profiles: Liquidity profiles by symbol; a symbol without one uses
            :func:`tracker.core.profiles.default_profile` (an info alert says so, once per symbol).
        root: The topic root, to name the topic of a message the engine itself rejects.
    """

    def __init__(
        self,
        config: EngineConfig | None = None,
        profiles: Mapping[str, Profile] | None = None,
        *,
        root: str = DEFAULT_ROOT,
    ) -> None:
        self.config = config or EngineConfig()
        self.root = root
        self._state = EngineState(
            config=self.config,
            profiles=dict(profiles or {}),
            topics=Topics(root),
            grace=timedelta(seconds=self.config.expiry_grace_seconds),
        )

    # ---------------------------------------------------------------- public API

    def handle(self, event: Inbound) -> list[Outbound]:
        """Apply one validated inbound event and return what to publish.

        Never raises on bad input: a message the engine cannot accept becomes exactly one
        :class:`~tracker.core.messages.ErrorMessage` (possibly with alerts), and nothing changes.

        Args:
            event: A message from :func:`tracker.edge.wire.decode` or a
                :class:`~tracker.core.messages.Tick`.

        Returns:
            Targets, status, alerts and errors, ordered by order id.
        """
        step = self._prepare(event)
        if isinstance(step, list):
            return step
        problems = [job.problem for job in step.jobs]
        return self._conclude(step, planning.solve_problems(problems) if problems else [])

    def handle_many(self, events: Sequence[Inbound]) -> list[list[Outbound]]:
        """Apply events in order; return the outputs of each, exactly as :meth:`handle` would.

        The one difference is speed: at a bin close every symbol's bin arrives with the same
        time, and each re-plans only that symbol's orders, so such a run of bins shares one
        :func:`~tracker.core.solve.solve_batch` call (the solver gives a problem the same answer,
        bit for bit, alone or in any batch). A run ends at any other event, a repeated symbol, a
        new time, or an event that also re-plans orders of another symbol.

        Args:
            events: Messages from :func:`tracker.edge.wire.decode` or ticks, in arrival order.

        Returns:
            One list of outputs per event.
        """
        results: list[list[Outbound]] = []
        group: list[Step] = []
        symbols: set[str] = set()

        def flush() -> None:
            if not group:
                return
            problems = [job.problem for step in group for job in step.jobs]
            schedules = iter(planning.solve_problems(problems) if problems else ())
            for step in group:
                results.append(self._conclude(step, [next(schedules) for _ in step.jobs]))
            group.clear()
            symbols.clear()

        for event in events:
            joins = (
                isinstance(event, BinMessage)
                and event.symbol not in symbols
                and (not group or event.ts == group[0].ts)
            )
            if not joins:
                flush()
            step = self._prepare(event)
            if isinstance(step, list):
                flush()
                results.append(step)
                continue
            if not step.jobs and not group:  # nothing to solve and nothing waiting: done now
                results.append(self._conclude(step, []))
                continue
            group.append(step)
            if isinstance(event, BinMessage) and all(
                job.order.symbol == event.symbol for job in step.jobs
            ):
                symbols.add(event.symbol)
            else:
                flush()  # it re-plans across symbols, or is no bin: nothing may join it
        flush()
        return results

    def reject(
        self, topic: str, payload: bytes | str | Mapping[str, Any], reason: str, ts: datetime | None
    ) -> ErrorMessage:
        """The error record of a message that did not pass the edge (decode, line checks).

        Args:
            topic: The topic it arrived on.
            payload: The raw payload (kept, truncated).
            reason: What is wrong and how to fix it.
            ts: When it was received (event time), if known.
        """
        return ErrorMessage(
            reason=reason,
            topic=topic,
            payload=payload_text(payload),
            ts=ts,
            order_id=self._state.topics.order_id_of(topic),
        )

    def summary(self) -> dict[str, Any]:
        """Per order: quantity, fills, prices, costs against arrival and interval VWAP, alerts.

        ``shortfall_bps`` and ``vwap_bps`` are signed so that positive is a cost for buys and
        sells alike: ``side_sign * (average_price - benchmark) / benchmark * 1e4``.
        """
        state = self._state
        return {
            "orders": [
                outputs.summary_row(state.orders[order_id], state.counts.get(order_id, Counter()))
                for order_id in sorted(state.orders)
            ]
        }

    def state_of(self, order_id: str) -> State | None:
        """The lifecycle state of an order, or ``None`` if unknown."""
        order = self._state.orders.get(order_id)
        return order.life.state if order else None

    def filled(self, order_id: str) -> int:
        """Shares filled on an order (0 if unknown)."""
        order = self._state.orders.get(order_id)
        return order.filled if order else 0

    # ---------------------------------------------------------------- one event

    def _prepare(self, event: Inbound) -> Step | list[Outbound]:
        """Apply an event up to its re-plans: the step with its jobs, or the final outputs."""
        step = Step(event.ts)
        try:
            state = self._state
            if isinstance(event, FillMessage):
                handlers.on_fill(state, step, event)
            elif isinstance(event, BinMessage):
                handlers.on_bin(state, step, event)
            elif isinstance(event, OrderMessage):
                handlers.on_order(state, step, event)
            elif isinstance(event, ControlMessage):
                handlers.on_control(state, step, event)
            elif isinstance(event, Tick):
                handlers.on_tick(state, step, event)
            else:  # pragma: no cover - the type says it cannot happen
                raise Rejected(f"unknown event type {type(event).__name__}")
        except Rejected as rejection:
            # Only a first-sight alert (default profile) can have been produced before a refusal.
            return self._count(
                [
                    outputs.error(self._state.topics, event, rejection.reason),
                    *rejection.extra,
                    *step.out,
                ]
            )
        except InputError as exc:  # a check deeper down (session, preferences): same contract
            return self._count([outputs.error(self._state.topics, event, str(exc)), *step.out])
        step.jobs = planning.plan_jobs(self._state, step)
        return step

    def _conclude(self, step: Step, schedules: Sequence[Schedule | None]) -> list[Outbound]:
        """Apply the solved re-plans of a prepared event and return its outputs."""
        for job, schedule in zip(step.jobs, schedules, strict=True):
            planning.apply_replan(self._state, step, job, schedule)
        return self._count(sorted(step.out, key=outputs.order_key))

    def _count(self, produced: list[Outbound]) -> list[Outbound]:
        """Count the raised alerts of each order (for the summary); return ``produced``."""
        counts = self._state.counts
        for out in produced:
            if isinstance(out, AlertMessage) and out.state == "raised" and out.order_id:
                counts.setdefault(out.order_id, Counter())[out.code] += 1
        return produced


__all__ = ["Engine"]
