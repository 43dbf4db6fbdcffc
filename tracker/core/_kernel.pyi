"""Types of the compiled inner loop of :mod:`tracker.core.solve` (source:
``tracker/core/_kernel.c``; its numpy twin, :mod:`tracker.core.kernel_numpy`, has the same
signatures, and :class:`tracker.core.kernel.Kernel` holds both to them)."""

import numpy as np
import numpy.typing as npt

_Vector = npt.NDArray[np.float64]

_Counts = npt.NDArray[np.int64]

def interior_point(
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
def tridiagonal(d: _Vector, e: _Vector, b: _Vector, /) -> None: ...
