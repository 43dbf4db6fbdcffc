"""The canonical execution problem: validated, broadcast, immutable.

Bins ``n = 0 .. N-1`` of the remaining horizon; ``q_0 = Q`` shares still to execute (the side is
handled outside); ``v_n`` shares traded in bin ``n``; ``q_{n+1} = q_n - v_n``::

    minimize   sum_n [ h_n v_n + k_n v_n^(1+beta) ] + (b/2) [ (Q - q_N)^2 - sum_n v_n^2 ]
             + sum_{n=1..N} c_n q_n^p + A q_N^p
    subject to 0 <= v_n <= u_n,  q_N >= 0,  and q_N = 0 when A is "force".

Units: quantities in shares; ``h`` in currency per share; ``k`` in currency per share^(1+beta);
``b`` in currency per share^2; ``c`` and ``A`` in currency per share^p. ``inventory_penalty[n]``
applies to ``q_{n+1}``, the inventory left at the end of bin ``n``.

A :class:`Problem` is built from Python values or from the JSON problem file (:meth:`from_mapping`);
either way every field is checked once, here, and scalars are broadcast over the bins. Whatever
is inside a ``Problem`` can be trusted by the solver.
"""

from __future__ import annotations

import math
from collections.abc import Mapping, Sequence
from dataclasses import dataclass
from typing import Any

import numpy as np
import numpy.typing as npt

from tracker.errors import ProblemError

FloatArray = npt.NDArray[np.float64]

#: Value of ``terminal_penalty`` that requires the order to be complete at the end (q_N = 0).
FORCE = "force"

#: Largest horizon accepted, in bins (a week of one-minute bins; far beyond any intraday use).
MAX_BINS = 10_000

#: The fields of the JSON problem file, in the order they are documented.
FIELDS = (
    "quantity",
    "bins",
    "fixed_cost",
    "temporary_impact",
    "impact_exponent",
    "permanent_impact",
    "inventory_penalty",
    "penalty_exponent",
    "terminal_penalty",
    "caps",
)

PerBin = float | Sequence[float] | FloatArray


def _number(
    name: str,
    value: Any,
    *,
    low: float,
    high: float = math.inf,
    low_open: bool = False,
    allowed: str,
) -> float:
    """Return ``value`` as a finite float inside the stated range, or raise ``ProblemError``."""
    if isinstance(value, bool) or not isinstance(value, int | float | np.integer | np.floating):
        raise ProblemError(f"must be {allowed}; got {type(value).__name__} {value!r}", field=name)
    number = float(value)
    if not math.isfinite(number):
        raise ProblemError(f"must be {allowed}; got {value!r}", field=name)
    if number < low or (low_open and number == low) or number > high:
        raise ProblemError(f"must be {allowed}; got {number!r}", field=name)
    return number


def _per_bin(
    name: str,
    value: Any,
    bins: int,
    *,
    allowed: str,
    allow_inf: bool = False,
    positive: bool = False,
) -> FloatArray:
    """Broadcast a scalar or check a per-bin list; return a read-only float array of ``bins``."""
    what = f"{allowed}, or a list of {bins} such numbers (one per bin)"
    if isinstance(value, str | bytes | Mapping | bool):
        raise ProblemError(f"must be {what}; got {type(value).__name__} {value!r}", field=name)
    if allow_inf and isinstance(value, Sequence):
        value = [math.inf if item is None else item for item in value]
    try:
        array = np.array(value, dtype=np.float64)
    except (TypeError, ValueError) as exc:
        raise ProblemError(f"must be {what}; got {value!r}", field=name) from exc
    if array.ndim == 0:
        array = np.full(bins, float(array))
    elif array.ndim != 1 or array.shape[0] != bins:
        raise ProblemError(f"must be {what}; got a list of length {array.size}", field=name)
    bad = np.isnan(array) | (array < 0) | (np.isinf(array) & ~allow_inf)
    if positive:
        bad |= array == 0
    if bad.any():
        index = int(np.flatnonzero(bad)[0])
        where = f" at bin {index}" if np.ndim(value) else ""
        raise ProblemError(f"must be {what}; got {array[index]!r}{where}", field=name)
    array.setflags(write=False)
    return array


@dataclass(frozen=True, eq=False, init=False)
class Problem:
    """One remaining-horizon execution problem (see the module docstring for the formula).

    Scalars are broadcast over the bins; lists must have one value per bin. After construction every
    per-bin field is a read-only ``float64`` array of length ``bins``.

    Args:
        quantity: Q, shares still to execute (>= 0).
        bins: N, number of bins in the remaining horizon (1 .. 10,000).
        fixed_cost: h_n, currency per share (half spread plus fees), >= 0.
        temporary_impact: k_n, temporary impact coefficient, >= 0.
        impact_exponent: beta in (0, 2]; 1 is linear impact, 0.5 the square-root law.
        permanent_impact: b, linear permanent impact, >= 0 (must keep the problem convex).
        inventory_penalty: c_n, inventory-risk weight on q_{n+1}, >= 0.
        penalty_exponent: p in [1, 4]; 2 is the classic quadratic risk penalty.
        terminal_penalty: A >= 0 on the unfinished quantity, or ``"force"`` (q_N = 0 required).
            Stored as a float; ``math.inf`` means force.
        caps: u_n, most shares bin n may trade; ``None`` (no cap), a number or a list; ``inf`` in a
            list means no cap in that bin.

    Raises:
        ProblemError: a field is missing, of the wrong type, out of range or of the wrong length.
    """

    quantity: float
    bins: int
    fixed_cost: FloatArray
    temporary_impact: FloatArray
    impact_exponent: float
    permanent_impact: float
    inventory_penalty: FloatArray
    penalty_exponent: float
    terminal_penalty: float
    caps: FloatArray | None

    def __init__(
        self,
        quantity: float,
        bins: int,
        fixed_cost: PerBin = 0.0,
        temporary_impact: PerBin = 1.0,
        impact_exponent: float = 1.0,
        permanent_impact: float = 0.0,
        inventory_penalty: PerBin = 0.0,
        penalty_exponent: float = 2.0,
        terminal_penalty: float | str = math.inf,
        caps: PerBin | Sequence[float | None] | None = None,
    ) -> None:
        put = object.__setattr__
        if (
            isinstance(bins, bool)
            or not isinstance(bins, int | np.integer)
            or not (1 <= bins <= MAX_BINS)
        ):
            raise ProblemError(
                f"must be a whole number from 1 to {MAX_BINS}; got {bins!r}", field="bins"
            )
        put(self, "bins", int(bins))
        put(
            self,
            "quantity",
            _number("quantity", quantity, low=0.0, allowed="a finite number of shares >= 0"),
        )
        put(
            self,
            "fixed_cost",
            _per_bin(
                "fixed_cost",
                fixed_cost,
                bins,
                allowed="a finite number >= 0 (currency per share)",
            ),
        )
        put(
            self,
            "temporary_impact",
            _per_bin("temporary_impact", temporary_impact, bins, allowed="a finite number >= 0"),
        )
        put(
            self,
            "impact_exponent",
            _number(
                "impact_exponent",
                impact_exponent,
                low=0.0,
                high=2.0,
                low_open=True,
                allowed="a number in (0, 2] (1 linear impact, 0.5 square-root law)",
            ),
        )
        put(
            self,
            "permanent_impact",
            _number("permanent_impact", permanent_impact, low=0.0, allowed="a finite number >= 0"),
        )
        put(
            self,
            "inventory_penalty",
            _per_bin("inventory_penalty", inventory_penalty, bins, allowed="a finite number >= 0"),
        )
        put(
            self,
            "penalty_exponent",
            _number(
                "penalty_exponent",
                penalty_exponent,
                low=1.0,
                high=4.0,
                allowed="a number in [1, 4]",
            ),
        )
        terminal: Any = terminal_penalty
        if isinstance(terminal, str):
            if terminal != FORCE:
                raise ProblemError(
                    f'must be a number >= 0 or "force"; got {terminal!r}', field="terminal_penalty"
                )
            terminal = math.inf
        elif (
            isinstance(terminal, int | float)
            and not isinstance(terminal, bool)
            and (terminal == math.inf)
        ):
            terminal = math.inf
        else:
            terminal = _number(
                "terminal_penalty", terminal, low=0.0, allowed='a finite number >= 0 or "force"'
            )
        put(self, "terminal_penalty", terminal)
        put(self, "caps", None)
        if caps is not None:
            caps = _per_bin(
                "caps",
                caps,
                bins,
                allow_inf=True,
                allowed="null (no cap), a number of shares >= 0 "
                "(null inside a list: no cap in that bin)",
            )
            put(self, "caps", None if np.isinf(caps).all() else caps)

    @property
    def forced(self) -> bool:
        """True when the order must be complete at the end of the horizon (q_N = 0)."""
        return math.isinf(self.terminal_penalty)

    @property
    def cap_array(self) -> FloatArray:
        """The caps as an array of ``bins`` values, ``inf`` where a bin has no cap."""
        if self.caps is None:
            return np.full(self.bins, math.inf)
        return self.caps

    @classmethod
    def from_arrays(
        cls,
        *,
        quantity: float,
        fixed_cost: FloatArray,
        temporary_impact: FloatArray,
        impact_exponent: float,
        permanent_impact: float,
        inventory_penalty: FloatArray,
        penalty_exponent: float,
        terminal_penalty: float,
        caps: FloatArray | None,
    ) -> Problem:
        """Build a problem from values the caller has already validated, without checking them.

        For hot paths inside the package (the engine builds a thousand problems per bin close
        from forecasts it has checked): the per-bin arrays must be ``float64`` of one length,
        finite and >= 0 (``caps`` may hold ``inf``), the scalars in the ranges of the class
        docstring, ``terminal_penalty`` a float (``inf`` = force). The arrays are made
        read-only, not copied (unless they are not contiguous: the compiled solver reads them
        as plain C arrays). Input from outside goes through the constructor instead.
        """
        problem = object.__new__(cls)
        put = object.__setattr__
        put(problem, "quantity", float(quantity))
        put(problem, "bins", int(fixed_cost.shape[0]))
        for name, array in (
            ("fixed_cost", fixed_cost),
            ("temporary_impact", temporary_impact),
            ("inventory_penalty", inventory_penalty),
        ):
            array = np.ascontiguousarray(array, dtype=np.float64)
            array.setflags(write=False)
            put(problem, name, array)
        put(problem, "impact_exponent", float(impact_exponent))
        put(problem, "permanent_impact", float(permanent_impact))
        put(problem, "penalty_exponent", float(penalty_exponent))
        put(problem, "terminal_penalty", float(terminal_penalty))
        if caps is not None:
            caps = np.ascontiguousarray(caps, dtype=np.float64)
            caps.setflags(write=False)
        put(problem, "caps", caps)
        return problem

    @classmethod
    def from_mapping(cls, data: Any) -> Problem:
        """Build a problem from the JSON problem file's object.

        Every field of :data:`FIELDS` must be present (``caps`` may be ``null``); unknown fields
        are rejected so that a misspelt name is not silently ignored.

        Raises:
            ProblemError: naming the first offending field and what it allows.
        """
        if not isinstance(data, Mapping):
            raise ProblemError(
                f"the problem must be a JSON object with the fields "
                f"{', '.join(FIELDS)}; got {type(data).__name__}"
            )
        missing = [name for name in FIELDS if name not in data]
        if missing:
            raise ProblemError(
                "is missing; a problem file needs every one of "
                f"{', '.join(FIELDS)} (caps may be null)",
                field=missing[0],
            )
        unknown = sorted(set(data) - set(FIELDS))
        if unknown:
            raise ProblemError(
                f"is not a problem field; the fields are {', '.join(FIELDS)}", field=unknown[0]
            )
        return cls(**{name: data[name] for name in FIELDS})

    def to_mapping(self) -> dict[str, Any]:
        """The problem as the JSON problem file's object (lists, ``"force"``, ``null``)."""

        def per_bin(array: FloatArray) -> float | list[float]:
            return float(array[0]) if (array == array[0]).all() else array.tolist()

        caps: Any = None
        if self.caps is not None:
            caps = [c if math.isfinite(c) else None for c in self.caps.tolist()]
            if all(c == caps[0] for c in caps):
                caps = caps[0]
        return {
            "quantity": self.quantity,
            "bins": self.bins,
            "fixed_cost": per_bin(self.fixed_cost),
            "temporary_impact": per_bin(self.temporary_impact),
            "impact_exponent": self.impact_exponent,
            "permanent_impact": self.permanent_impact,
            "inventory_penalty": per_bin(self.inventory_penalty),
            "penalty_exponent": self.penalty_exponent,
            "terminal_penalty": FORCE if self.forced else self.terminal_penalty,
            "caps": caps,
        }
