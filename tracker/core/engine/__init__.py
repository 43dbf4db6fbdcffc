"""The tracking engine: parent orders against their plan, re-planned every bin.

Theory of operation
-------------------
The engine is a pure state machine (h11 style): ``handle(event) -> outputs``. It never reads the
clock, the network or the disk; time is the ``ts`` of the events, and
:class:`~tracker.core.messages.Tick` events (injected by the shells) move time when no message
arrives. The shells decode and validate at the edge (:func:`tracker.edge.wire.decode`) and publish
or write what the engine returns.

Per parent order the engine keeps: the lifecycle (:mod:`tracker.core.lifecycle`, one state table),
the *baseline* plan (made when the order starts; replaced by an amendment), the latest plan with its
version number, the fills (idempotent by fill id), the arrival price and the interval VWAP.

Events:

* ``order new``: checked against the symbol's session (:class:`~tracker.core.session.Session` of its
  :class:`~tracker.core.profiles.Profile`; the stated default profile when none was given, with an
  info alert once per symbol). It is ``pending`` until its start; then it is planned over its own
  remaining bins and its first target is published. ``amend`` (quantity, end, limit price,
  participation cap, urgency, preferences) re-plans at once and resets the baseline; ``cancel``
  publishes a final zero target and always wins (whatever else it carries, whatever its ``ts``).
  Every order message gets one :class:`~tracker.core.messages.AckMessage` (accepted or
  rejected, and why). An order without a participation cap gets ``default_max_participation``.
* ``fill``: recorded at once (status published); an overfill, a fill on an ended order and a fill
  whose price is far outside its bin's range raise alerts. A fill for an order not seen yet is
  parked until its order arrives (or, after ``fill_parking_seconds``, kept as unassigned with a
  critical alert). A fill id seen before with other shares, price or side, and a fill whose side
  differs from the order's, are rejected: one :class:`~tracker.core.messages.ErrorMessage` each,
  plus a one-shot alert. The same fill again (whatever its ``ts``) changes nothing.
* ``fill_correction``: a bust or a correction of an earlier fill; inventory, average price and
  plan are recomputed, with an alert.
* ``bin`` (a symbol's bin closed): the intraday forecast is updated; for every working order on
  the symbol the remaining horizon is re-solved from the realized inventory -- all orders of the
  event in one :func:`~tracker.core.solve.solve_batch` call -- and the next bin's target, the status
  and the alerts are published.
* ``control``: halt or resume one order or all (a global halt also holds orders that start while
  it is on). A halt publishes a zero target.
* ``tick`` (and every other event): starts pending orders whose start has come, expires orders
  whose end has passed (with a final zero target), gives up parked fills whose time is up, and
  judges stale market data.

Each target says the order's ``state``, the ``reason`` for its quantity and the plan's
``next_bins``.

The parts, one concept each:

* :mod:`~tracker.core.engine.machine` -- :class:`Engine`: one event in, its outputs out;
* :mod:`~tracker.core.engine.handlers` -- what each message does (orders, fills, bins, control,
  ticks);
* :mod:`~tracker.core.engine.step` -- the work of one event (:class:`~.step.Step`) and a re-plan
  to solve (:class:`~.step.ReplanJob`);
* :mod:`~tracker.core.engine.state` -- what is kept between events (orders, symbols, plans);
* :mod:`~tracker.core.engine.timers` -- event time: starts, expiries, stale data;
* :mod:`~tracker.core.engine.planning` -- the horizon, the problems, the solve, applying a re-plan;
* :mod:`~tracker.core.engine.outputs` -- targets, status, alerts and error records;
* :mod:`~tracker.core.engine.savepoint` -- undoing an event that failed inside the engine (it
  becomes an error record and an ``internal_error`` alert, live and in replay alike);
* :mod:`~tracker.core.engine.config` -- :class:`EngineConfig`.

The alert codes, severities, thresholds and hysteresis are in :mod:`tracker.core.alerts`.
"""

from tracker.core.engine.config import EngineConfig
from tracker.core.engine.machine import Engine, PlanView
from tracker.core.engine.planning import ASSUMED_SPREAD_BPS

__all__ = ["ASSUMED_SPREAD_BPS", "Engine", "EngineConfig", "PlanView"]
