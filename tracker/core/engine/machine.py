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
from dataclasses import dataclass, replace
from datetime import datetime, timedelta
from typing import Any

from tracker.core import alerts as rules
from tracker.core.engine import handlers, outputs, planning
from tracker.core.engine.config import EngineConfig
from tracker.core.engine.savepoint import Savepoint
from tracker.core.engine.state import EngineState
from tracker.core.engine.step import Rejected, Step
from tracker.core.forecast import forecast
from tracker.core.lifecycle import State
from tracker.core.messages import (
    AlertMessage,
    BinMessage,
    ControlMessage,
    ErrorMessage,
    FillCorrectionMessage,
    FillMessage,
    Inbound,
    OrderMessage,
    Outbound,
    Tick,
    payload_text,
)
from tracker.core.problem import FloatArray
from tracker.core.profiles import Profile
from tracker.core.solve import Schedule
from tracker.core.topics import DEFAULT_ROOT, Topics
from tracker.errors import InputError


@dataclass(frozen=True, slots=True)
class PlanView:
    """A plan as :meth:`Engine.plans` shows it: where it starts, what it expects, how it ended.

    Attributes:
        version: The order's plan version.
        first_bin: Session bin of the plan's first trade.
        filled_at: Shares filled when the plan was made.
        cumulative: Shares the plan trades by the end of each bin from ``first_bin`` (read-only).
        status: The solver's status (``optimal`` or ``capped_shortfall``).
        expected_cost: Expected spread and impact cost of the plan, currency.
    """

    version: int
    first_bin: int
    filled_at: int
    cumulative: FloatArray
    status: str
    expected_cost: float


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
        self._retry: dict[str, str] = {}  # re-plans a failed event left: order id -> reason

    # ---------------------------------------------------------------- public API

    def handle(self, event: Inbound) -> list[Outbound]:
        """Apply one validated inbound event and return what to publish.

        Never raises on bad input: a message the engine cannot accept becomes exactly one
        :class:`~tracker.core.messages.ErrorMessage` (possibly with alerts), and nothing changes.
        Nor on a failure of its own (a bug): the event is undone and becomes an error record and
        a critical ``internal_error`` alert; the re-plans it asked for are tried once more with
        the next event.

        Args:
            event: A message from :func:`tracker.edge.wire.decode` or a
                :class:`~tracker.core.messages.Tick`.

        Returns:
            Targets, status, alerts and errors, ordered by order id.
        """
        savepoint = Savepoint(self._state)
        step = Step(event.ts, savepoint)
        try:
            prepared = self._prepare(event, step)
            if prepared is not None:
                produced = prepared
            else:
                problems = [job.problem for job in step.jobs]
                schedules = planning.solve_problems(problems) if problems else []
                produced = self._conclude(step, schedules)
        except Exception as exc:  # a bug of ours, or a solver that raised what it should not
            savepoint.rollback()
            return self._failed(event, step, exc)
        savepoint.release()
        return self._count(produced)

    def handle_many(self, events: Sequence[Inbound]) -> list[list[Outbound]]:
        """Apply events in order; return the outputs of each, exactly as :meth:`handle` would.

        The one difference is speed: at a bin close every symbol's bin arrives with the same
        time, and each re-plans only that symbol's orders, so such a run of bins shares one
        :func:`~tracker.core.solve.solve_batch` call (the solver gives a problem the same answer,
        bit for bit, alone or in any batch). A run ends at any other event, a repeated symbol, a
        new time, or an event that also re-plans orders of another symbol. A run in which
        something fails is undone and handed over again one event at a time, the failed event
        failing as it did, so that the outputs are those of :meth:`handle`.

        Args:
            events: Messages from :func:`tracker.edge.wire.decode` or ticks, in arrival order.

        Returns:
            One list of outputs per event.
        """
        if len(events) == 1:  # the live daemon's usual call (a fill, an order, a tick)
            return [self._handle_one(events[0])]
        return self._handle_run(events)

    def _handle_one(self, event: Inbound) -> list[Outbound]:
        """:meth:`_handle_run` of one event, step for step without its bookkeeping of runs (a
        test holds the two to the same outputs and state, failures included)."""
        if self._retry:
            return self.handle(event)
        savepoint = Savepoint(self._state)
        step = Step(event.ts, savepoint)
        try:
            done = self._prepare(event, step)
        except Exception as exc:
            savepoint.rollback()
            return self._failed(event, step, exc)
        problems = [job.problem for job in step.jobs] if done is None else []
        try:
            schedules = iter(planning.solve_problems(problems) if problems else ())
        except Exception:  # a run's shared solve failed: handed over again, as handle has it
            savepoint.rollback()
            return self.handle(event)
        try:
            solved = [next(schedules) for _ in step.jobs]
            produced = done if done is not None else self._conclude(step, solved)
        except Exception as exc:
            savepoint.rollback()
            return self._failed(event, step, exc)
        savepoint.release()
        return self._count(produced)

    def _handle_run(self, events: Sequence[Inbound]) -> list[list[Outbound]]:
        """:meth:`handle_many` of any number of events (see there)."""
        results: list[list[Outbound]] = []
        run: list[tuple[Inbound, Step, list[Outbound] | None]] = []
        symbols: set[str] = set()
        savepoint: Savepoint | None = None

        def settle(failed: int | None, exc: Exception) -> None:
            """Undo the run and hand its events over one at a time, as handle would have had
            them; the event that failed (when known) fails again without running again."""
            assert savepoint is not None
            savepoint.rollback()
            for index, (event, step, _) in enumerate(run):
                if index == failed:
                    results.append(self._failed(event, step, exc))
                else:
                    results.append(self.handle(event))

        def flush() -> None:
            nonlocal savepoint
            if not run:
                return
            assert savepoint is not None
            steps = [step for _, step, done in run if done is None]
            problems = [job.problem for step in steps for job in step.jobs]
            try:
                schedules = iter(planning.solve_problems(problems) if problems else ())
            except Exception as exc:  # shared by the run: no one event to blame
                settle(None, exc)
            else:
                produced: list[list[Outbound]] = []
                for index, (_, step, done) in enumerate(run):
                    try:
                        solved = [next(schedules) for _ in step.jobs]
                        produced.append(done if done is not None else self._conclude(step, solved))
                    except Exception as exc:
                        settle(index, exc)
                        break
                else:
                    savepoint.release()
                    results.extend(self._count(outputs) for outputs in produced)
            run.clear()
            symbols.clear()
            savepoint = None

        for event in events:
            joins = (
                isinstance(event, BinMessage)
                and event.symbol not in symbols
                and (not run or event.ts == run[0][0].ts)
            )
            if not joins or self._retry:
                flush()
            if self._retry:  # a re-plan to try again: this event on its own, as handle does
                results.append(self.handle(event))
                continue
            if savepoint is None:
                savepoint = Savepoint(self._state)
            step = Step(event.ts, savepoint)
            try:
                done = self._prepare(event, step)
            except Exception as exc:
                run.append((event, step, None))
                settle(len(run) - 1, exc)
                run.clear()
                symbols.clear()
                savepoint = None
                continue
            run.append((event, step, done))
            if done is not None or (not step.jobs and len(run) == 1):
                flush()  # refused, or nothing to solve and nothing waiting: done now
            elif isinstance(event, BinMessage) and all(
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
        summary: dict[str, Any] = {
            "orders": [
                outputs.summary_row(state.orders[order_id], state.counts.get(order_id, Counter()))
                for order_id in sorted(state.orders)
            ]
        }
        # Fills whose order never came (given up, or still waiting at the end): never lost.
        unassigned = [
            *(outputs.unassigned_row(fill, "order never came") for fill in state.unassigned),
            *(outputs.unassigned_row(fill, "still waiting") for _, fill in state.parked),
        ]
        if unassigned:
            summary["unassigned_fills"] = unassigned
        return summary

    @property
    def profiles(self) -> Mapping[str, Profile]:
        """The liquidity profiles the engine was given (or last reconfigured with), by symbol."""
        return dict(self._state.profiles)

    def reconfigure(self, config: EngineConfig, profiles: Mapping[str, Profile]) -> None:
        """Run on from now with other settings and profiles (a daemon restarted with new ones).

        A symbol already seen switches to its new profile when the session is the same (its
        forecast is redone from today's bins); one on another session keeps its profile for the
        day (its bins are on the old grid).
        """
        state = self._state
        self.config = config
        state.config = config
        state.grace = timedelta(seconds=config.expiry_grace_seconds)
        state.profiles = dict(profiles)
        for name in sorted(state.symbols):
            sym = state.symbols[name]
            new = profiles.get(name)
            if new is None or new is sym.profile or new.session != sym.profile.session:
                continue
            sym.profile = new
            sym.forecast = forecast(new, sym.observed)

    def forget_ended(self) -> list[str]:
        """Drop the orders that have ended and all the engine keeps for them; return their ids.

        A long-running daemon calls it when a new day's journal begins, so that the state it
        carries (and loads at every restart) holds the orders that may still change, not every
        order it ever saw; the day before's journal keeps the rest. Between events only.
        """
        return self._state.forget_ended()

    def state_of(self, order_id: str) -> State | None:
        """The lifecycle state of an order, or ``None`` if unknown."""
        order = self._state.orders.get(order_id)
        return order.life.state if order else None

    def filled(self, order_id: str) -> int:
        """Shares filled on an order (0 if unknown)."""
        order = self._state.orders.get(order_id)
        return order.filled if order else 0

    def plans(self, order_id: str) -> list[PlanView]:
        """The order's latest plan and its baseline (one entry when they are the same plan).

        Read-only copies, for reviews and views; an unknown or unplanned order has none.
        """
        order = self._state.orders.get(order_id)
        if order is None:
            return []
        seen: list[PlanView] = []
        for plan in (order.plan, order.baseline):
            if plan is None or any(view.version == plan.version for view in seen):
                continue
            cumulative = plan.cumulative.copy()
            cumulative.setflags(write=False)
            seen.append(
                PlanView(
                    version=plan.version,
                    first_bin=plan.first_bin,
                    filled_at=plan.filled_at,
                    cumulative=cumulative,
                    status=plan.status,
                    expected_cost=plan.expected_cost,
                )
            )
        return seen

    def next_deadline(self) -> datetime | None:
        """The earliest event time at which the passage of time alone changes something.

        An order starts or expires, or a watched symbol's next bin becomes overdue. Before it, a
        :class:`~tracker.core.messages.Tick` changes nothing, so a shell need not inject one (the
        live daemon journals ticks only from then on). ``None``: nothing waits on time.
        """
        state = self._state
        candidates = [
            *([state.starts[0][0]] if state.starts else []),
            *([state.ends[0][0] + state.grace] if state.ends else []),
            *([state.stale_due] if state.stale_due is not None else []),
            *([state.parked[0][0]] if state.parked else []),
        ]
        return min(candidates) if candidates else None

    # ---------------------------------------------------------------- one event

    def _prepare(self, event: Inbound, step: Step) -> list[Outbound] | None:
        """Apply an event up to its re-plans (``step.jobs``); or its outputs, if it is refused.

        A re-plan left by a failed event (:meth:`_failed`) joins the first event applied after
        it, once.
        """
        state = self._state
        try:
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
            elif isinstance(event, FillCorrectionMessage):
                handlers.on_fill_correction(state, step, event)
            else:  # pragma: no cover - the type says it cannot happen
                raise Rejected(f"unknown event type {type(event).__name__}")
        except Rejected as rejection:
            # Only a first-sight alert (default profile) can have been produced before a refusal.
            error = outputs.error(state.topics, event, rejection.reason)
            return [
                *outputs.refused_ack(event, rejection.reason),
                error,
                *rejection.extra,
                *step.out,
            ]
        except InputError as exc:  # a check deeper down (session, preferences): same contract
            error = outputs.error(state.topics, event, str(exc))
            return [*outputs.refused_ack(event, str(exc)), error, *step.out]
        if isinstance(event, OrderMessage):  # the one reply to an order message, first
            step.out.insert(0, outputs.ack(event, "accepted", step.ack_note))
        if self._retry:
            step.retried = frozenset(self._retry)
            for order_id, reason in self._retry.items():
                step.to_plan.setdefault(order_id, reason)
            self._retry = {}
        step.jobs = planning.plan_jobs(state, step)
        return None

    def _conclude(self, step: Step, schedules: Sequence[Schedule | None]) -> list[Outbound]:
        """Apply the solved re-plans of a prepared event and return its outputs."""
        for job, schedule in zip(step.jobs, schedules, strict=True):
            planning.apply_replan(self._state, step, job, schedule)
        return sorted(step.out, key=outputs.order_key)

    def _failed(self, event: Inbound, step: Step, exc: Exception) -> list[Outbound]:
        """The outputs of an event that failed inside the engine (its changes already undone).

        One failure path, live and in replay alike (the daemon and ``tracker replay`` feed the
        same engine through the same intake): the event becomes an error record (it was not
        applied) and an ``internal_error`` alert naming its order (or symbol). The re-plans it
        asked for are tried once more with the next event; a re-plan that fails again is not
        carried further (the order is re-planned at its next bin).
        """
        state = self._state
        asked = {k: v for k, v in step.to_plan.items() if k not in step.retried}
        self._retry = {  # (still pending if the event failed before taking them on)
            order_id: reason
            for order_id, reason in {**asked, **self._retry}.items()
            if order_id in state.orders
        }
        what = type(exc).__name__
        reason = (
            f"internal error while handling this message ({what}); it was not applied -- "
            "please report it with the journal"
        )
        error = outputs.error(state.topics, event, reason)
        order = state.orders.get(error.order_id) if error.order_id else None
        symbol = order.symbol if order else getattr(event, "symbol", None)
        retry = sorted(self._retry)
        again = (
            f"; the re-plan of {', '.join(retry)} is tried again with the next one" if retry else ""
        )
        alert = outputs.alert(
            rules.INTERNAL_ERROR,
            f"The engine failed on a {event.type} message ({what}) and did not apply it{again}. "
            "Report this with the journal.",
            None,
            symbol,
            event.ts,
            {"message": event.type, "error": what, "retry": retry},
        )
        return self._count([error, replace(alert, order_id=error.order_id)])

    def _count(self, produced: list[Outbound]) -> list[Outbound]:
        """Count the raised alerts of each order (for the summary); return ``produced``."""
        counts = self._state.counts
        for out in produced:
            if isinstance(out, AlertMessage) and out.state == "raised" and out.order_id:
                counts.setdefault(out.order_id, Counter())[out.code] += 1
        return produced


__all__ = ["Engine", "PlanView"]
