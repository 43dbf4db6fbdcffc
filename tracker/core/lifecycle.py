"""The lifecycle of a parent order: every state and every allowed transition, in one table.

States::

    pending ---start---> working ---complete---> done
       |                  |   ^
       |                halt  resume
       |                  v   |
       +-----halt------> halted ---complete---> done
       |                  |
       +--cancel / expire-+---> cancelled / expired   (also from working)

* ``pending``: accepted, its start time not reached yet.
* ``working``: between start and end; the engine re-plans it every bin and publishes targets.
* ``halted``: stopped by a control message; targets are zero until ``resume``. A halted order whose
  start has not come yet resumes to ``pending`` (event ``resume_pending``).
* ``done``: filled quantity reached the order quantity. ``cancelled``: cancelled by the desk.
  ``expired``: its end passed with shares left (or without, if it never completed formally).
  These three are terminal: nothing leaves them.

Fills are not transitions: a fill on a terminal order is still recorded (it happened in the
market) and the engine raises an alert. Amendments are not transitions either; they are allowed
in the non-terminal states only (see :data:`AMENDABLE`).
"""

from __future__ import annotations

from collections.abc import Mapping
from enum import StrEnum

from tracker.errors import InputError


class State(StrEnum):
    """Lifecycle states of a parent order."""

    PENDING = "pending"
    WORKING = "working"
    HALTED = "halted"
    DONE = "done"
    CANCELLED = "cancelled"
    EXPIRED = "expired"


class Event(StrEnum):
    """What can happen to a parent order's lifecycle."""

    START = "start"
    HALT = "halt"
    RESUME = "resume"
    RESUME_PENDING = "resume_pending"
    COMPLETE = "complete"
    CANCEL = "cancel"
    EXPIRE = "expire"


#: The whole lifecycle: (state, event) -> next state. Anything not listed is illegal.
TRANSITIONS: Mapping[tuple[State, Event], State] = {
    (State.PENDING, Event.START): State.WORKING,
    (State.PENDING, Event.HALT): State.HALTED,
    (State.PENDING, Event.COMPLETE): State.DONE,
    (State.PENDING, Event.CANCEL): State.CANCELLED,
    (State.PENDING, Event.EXPIRE): State.EXPIRED,
    (State.WORKING, Event.HALT): State.HALTED,
    (State.WORKING, Event.COMPLETE): State.DONE,
    (State.WORKING, Event.CANCEL): State.CANCELLED,
    (State.WORKING, Event.EXPIRE): State.EXPIRED,
    (State.HALTED, Event.RESUME): State.WORKING,
    (State.HALTED, Event.RESUME_PENDING): State.PENDING,
    (State.HALTED, Event.COMPLETE): State.DONE,
    (State.HALTED, Event.CANCEL): State.CANCELLED,
    (State.HALTED, Event.EXPIRE): State.EXPIRED,
}

#: States in which nothing can happen any more.
TERMINAL: frozenset[State] = frozenset({State.DONE, State.CANCELLED, State.EXPIRED})

#: States in which an order may be amended.
AMENDABLE: frozenset[State] = frozenset({State.PENDING, State.WORKING, State.HALTED})

#: States in which the order is live in the market (its interval VWAP accumulates).
LIVE: frozenset[State] = frozenset({State.WORKING, State.HALTED})


class TransitionError(InputError):
    """An event that the order's current state does not allow (e.g. halting a done order).

    Attributes:
        state: The state the order is in (unchanged).
        event: The event that was refused.
    """

    def __init__(self, state: State, event: Event, *, order_id: str | None = None) -> None:
        allowed = sorted(e.value for (s, e) in TRANSITIONS if s == state)
        what = f"order {order_id!r} is {state.value}" if order_id else f"state {state.value}"
        hint = f"allowed now: {', '.join(allowed)}" if allowed else "it is final"
        super().__init__(f"cannot {event.value}: {what}; {hint}", field="state")
        self.state = state
        self.event = event


def allowed(state: State, event: Event) -> bool:
    """Whether ``event`` is a legal transition from ``state``."""
    return (state, event) in TRANSITIONS


def transition(state: State, event: Event, *, order_id: str | None = None) -> State:
    """The state after ``event``.

    Raises:
        TransitionError: the transition is not in :data:`TRANSITIONS`.
    """
    try:
        return TRANSITIONS[(state, event)]
    except KeyError:
        raise TransitionError(state, event, order_id=order_id) from None


class Lifecycle:
    """The mutable lifecycle of one order; an illegal event raises and changes nothing."""

    __slots__ = ("order_id", "state")

    def __init__(self, order_id: str, state: State = State.PENDING) -> None:
        self.order_id = order_id
        self.state = state

    def apply(self, event: Event) -> State:
        """Apply ``event`` and return the new state.

        Raises:
            TransitionError: illegal in the current state; the state is left unchanged.
        """
        self.state = transition(self.state, event, order_id=self.order_id)
        return self.state

    def can(self, event: Event) -> bool:
        """Whether ``event`` is legal now."""
        return allowed(self.state, event)

    @property
    def terminal(self) -> bool:
        """True once the order is done, cancelled or expired."""
        return self.state in TERMINAL

    def __repr__(self) -> str:
        return f"Lifecycle({self.order_id!r}, {self.state.value})"


__all__ = [
    "AMENDABLE",
    "LIVE",
    "TERMINAL",
    "TRANSITIONS",
    "Event",
    "Lifecycle",
    "State",
    "TransitionError",
    "allowed",
    "transition",
]
