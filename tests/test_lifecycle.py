"""Order lifecycle: every legal transition and every illegal one."""

from __future__ import annotations

import itertools

import pytest

from tracker.core.lifecycle import (
    TERMINAL,
    TRANSITIONS,
    Event,
    Lifecycle,
    State,
    TransitionError,
)

LEGAL = [
    (State.PENDING, Event.START, State.WORKING),
    (State.PENDING, Event.HALT, State.HALTED),
    (State.PENDING, Event.COMPLETE, State.DONE),
    (State.PENDING, Event.CANCEL, State.CANCELLED),
    (State.PENDING, Event.EXPIRE, State.EXPIRED),
    (State.WORKING, Event.HALT, State.HALTED),
    (State.WORKING, Event.COMPLETE, State.DONE),
    (State.WORKING, Event.CANCEL, State.CANCELLED),
    (State.WORKING, Event.EXPIRE, State.EXPIRED),
    (State.HALTED, Event.RESUME, State.WORKING),
    (State.HALTED, Event.RESUME_PENDING, State.PENDING),
    (State.HALTED, Event.COMPLETE, State.DONE),
    (State.HALTED, Event.CANCEL, State.CANCELLED),
    (State.HALTED, Event.EXPIRE, State.EXPIRED),
]
ILLEGAL = [
    (state, event)
    for state, event in itertools.product(State, Event)
    if (state, event, TRANSITIONS.get((state, event))) not in LEGAL
]


@pytest.mark.parametrize(
    ("state", "event", "expected"), LEGAL, ids=[f"{s}-{e}" for s, e, _ in LEGAL]
)
def test_legal_transition(state: State, event: Event, expected: State) -> None:
    """A legal event moves the order to the state the table says."""
    lifecycle = Lifecycle("A", state)
    assert expected == lifecycle.apply(event)
    assert expected == lifecycle.state


@pytest.mark.parametrize(("state", "event"), ILLEGAL, ids=[f"{s}-{e}" for s, e in ILLEGAL])
def test_illegal_transition_raises_and_leaves_state(state: State, event: Event) -> None:
    """An illegal event raises TransitionError and the state stays what it was."""
    lifecycle = Lifecycle("A", state)
    with pytest.raises(TransitionError):
        lifecycle.apply(event)
    assert state == lifecycle.state


def test_table_has_exactly_the_documented_transitions() -> None:
    """The state table holds the documented transitions and nothing else."""
    expected = {(s, e): t for s, e, t in LEGAL}
    assert expected == dict(TRANSITIONS)


def test_terminal_states_have_no_way_out() -> None:
    """Done, cancelled and expired are final."""
    leaving = [key for key in TRANSITIONS if key[0] in TERMINAL]
    expected: list[tuple[State, Event]] = []
    assert expected == leaving


def test_error_says_what_is_allowed() -> None:
    """The refusal names the order, its state and the events allowed now."""
    with pytest.raises(TransitionError) as info:
        Lifecycle("X_ZEPH-1", State.HALTED).apply(Event.START)
    expected = (
        "cannot start: order 'X_ZEPH-1' is halted; allowed now: cancel, complete, expire, resume, "
        "resume_pending"
    )
    assert expected == info.value.reason
