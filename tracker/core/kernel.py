"""Which kernel the solver runs: the compiled one, or its numpy twin when it is missing.

The solver's inner loops (:mod:`tracker.core.solve`) live in a compiled CPython extension,
``tracker/core/_kernel.c``, which pip builds when a C compiler and Python's headers are there. The
extension is optional: without them the package still installs, and the solver runs
:mod:`tracker.core.kernel_numpy`, the same method step for step in numpy (same answers to
rounding, 7-30 times slower: benchmarks/bench_solve.py). This module chooses once, at import:

* ``TRACKER_KERNEL`` unset or empty: the compiled kernel when it imports, else the numpy one,
  with one :class:`RuntimeWarning` saying that the compiled kernel is missing and the solver is
  slower;
* ``TRACKER_KERNEL=numpy``: the numpy kernel, on purpose and without a warning (to check the
  fallback, or to compare the two);
* ``TRACKER_KERNEL=compiled``: the compiled kernel, and an ImportError if it is missing (for a
  deployment that must not run slow without saying so).

:data:`KERNEL` is the chosen module and :data:`NAME` says which (``"compiled"`` or ``"numpy"``).
"""

from __future__ import annotations

import os
import warnings
from typing import Final, Protocol

import numpy as np
import numpy.typing as npt

from tracker.core import kernel_numpy
from tracker.errors import InputError

#: The environment variable that picks the kernel (``compiled``, ``numpy``, or unset).
ENVIRONMENT: Final = "TRACKER_KERNEL"

_Vector = npt.NDArray[np.float64]
_Counts = npt.NDArray[np.int64]


class Kernel(Protocol):
    """What a kernel module provides (``_kernel.c``'s header comment documents the arguments)."""

    def interior_point(
        self,
        h: _Vector,
        k: _Vector,
        c: _Vector,
        caps: _Vector,
        out: _Vector,
        sizes: _Counts,
        iterations: _Counts,
        quantity: _Vector,
        beta: _Vector,
        b: _Vector,
        p: _Vector,
        terminal: _Vector,
        tolerance: float,
        max_iterations: int,
        /,
    ) -> None: ...

    def riccati(
        self,
        h: _Vector,
        kappa: _Vector,
        c: _Vector,
        out: _Vector,
        a: float,
        d: float,
        forced: bool,
        quantity: float,
        /,
    ) -> float: ...

    def costs(
        self,
        h: _Vector,
        k: _Vector,
        c: _Vector,
        trades: _Vector,
        trajectory: _Vector,
        quantity: float,
        beta: float,
        b: float,
        p: float,
        terminal: float,
        settle: bool,
        /,
    ) -> tuple[float, float, float, float, float]: ...

    def tridiagonal(self, d: _Vector, e: _Vector, b: _Vector, /) -> None: ...


def compiled() -> Kernel | None:
    """The compiled kernel, or ``None`` when it was not built (no compiler at install time)."""
    try:
        from tracker.core import _kernel
    except ImportError:
        return None
    return _kernel


def choose(setting: str | None) -> tuple[str, Kernel]:
    """The kernel a value of ``TRACKER_KERNEL`` asks for, and its name.

    Args:
        setting: ``"compiled"``, ``"numpy"``, or ``None``/``""`` for the compiled kernel when it
            is there, else the numpy one (with a warning).

    Raises:
        InputError: ``setting`` is none of these.
        ImportError: ``"compiled"`` was asked for and the compiled kernel is missing.
    """
    if setting == "numpy":
        return "numpy", kernel_numpy
    if setting not in (None, "", "compiled"):
        raise InputError(
            f"{setting!r} is not a kernel: use 'compiled', 'numpy', or leave it unset",
            field=ENVIRONMENT,
        )
    found = compiled()
    if found is not None:
        return "compiled", found
    if setting == "compiled":
        raise ImportError(
            f"{ENVIRONMENT}=compiled, but the compiled solver kernel (tracker.core._kernel) is "
            "missing: reinstall tracker where a C compiler and Python's headers are available"
        )
    warnings.warn(
        "tracker: the compiled solver kernel (tracker.core._kernel) is missing, so the solver "
        "runs its numpy twin, which gives the same answers but is 7-30x slower; reinstall "
        f"with a C compiler and Python's headers to build it, or set {ENVIRONMENT}=numpy to "
        "choose the numpy kernel on purpose",
        RuntimeWarning,
        stacklevel=2,
    )
    return "numpy", kernel_numpy


NAME, KERNEL = choose(os.environ.get(ENVIRONMENT))
