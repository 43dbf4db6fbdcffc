"""The statistics of an evaluation: sample summaries, CVaR and paired differences.

Plain formulas on numpy arrays, written out so that a reader can check them (the tests compare
them with :mod:`scipy.stats` on the same samples):

* standard deviation with ``n - 1`` in the denominator; standard error ``sd / sqrt(n)``;
* CVaR at level ``alpha`` (default 95 %) of a cost: the mean of the worst ``1 - alpha`` of the
  days, by the Rockafellar-Uryasev (2000) formula ``VaR + E[(X - VaR)+] / (1 - alpha)`` with
  ``VaR`` the empirical ``alpha`` quantile; when ``(1 - alpha) n`` is not whole, the boundary day
  counts with its fraction;
* paired differences ``a_i - b_i`` over the same days: their mean, standard error and the
  Student-t interval ``mean +- t_{n-1, 0.975} se``.
"""

from __future__ import annotations

import math
from dataclasses import dataclass
from typing import Any

import numpy as np
import numpy.typing as npt
from scipy import stats

FloatArray = npt.NDArray[np.float64]

#: Level of the CVaR (the worst 5 % of days).
CVAR_LEVEL = 0.95

#: Confidence of the paired intervals.
CONFIDENCE = 0.95


@dataclass(frozen=True, slots=True)
class Summary:
    """Mean, standard deviation, standard error and CVaR of one sample."""

    n: int
    mean: float
    sd: float
    se: float
    cvar: float

    def to_mapping(self) -> dict[str, Any]:
        """The summary as a JSON object."""
        return {"n": self.n, "mean": self.mean, "sd": self.sd, "se": self.se, "cvar95": self.cvar}


@dataclass(frozen=True, slots=True)
class Paired:
    """Paired differences ``a - b`` over the same days, with a Student-t interval."""

    n: int
    mean: float
    se: float
    low: float
    high: float

    def to_mapping(self) -> dict[str, Any]:
        """The difference as a JSON object."""
        return {"n": self.n, "mean": self.mean, "se": self.se, "ci95": [self.low, self.high]}


def _sample(values: Any) -> FloatArray:
    sample = np.asarray(values, dtype=np.float64)
    if sample.ndim != 1 or sample.size == 0:
        raise ValueError(f"need a non-empty one-dimensional sample; got shape {sample.shape}")
    return sample


def sd(values: Any) -> float:
    """Sample standard deviation (``n - 1``); 0 for a single value."""
    sample = _sample(values)
    if sample.size < 2:
        return 0.0
    return float(math.sqrt(np.sum((sample - sample.mean()) ** 2) / (sample.size - 1)))


def se(values: Any) -> float:
    """Standard error of the mean, ``sd / sqrt(n)``."""
    sample = _sample(values)
    return sd(sample) / math.sqrt(sample.size)


def cvar(values: Any, level: float = CVAR_LEVEL) -> float:
    """Mean of the worst ``1 - level`` of a cost sample (the higher, the worse).

    Rockafellar-Uryasev: ``VaR + mean((X - VaR)+) / (1 - level)`` with ``VaR`` the smallest value
    whose empirical distribution function reaches ``level``.
    """
    sample = _sample(values)
    if not 0.0 < level < 1.0:
        raise ValueError(f"level must be in (0, 1); got {level}")
    var = float(np.quantile(sample, level, method="inverted_cdf"))
    return var + float(np.mean(np.maximum(sample - var, 0.0))) / (1.0 - level)


def summarize(values: Any, level: float = CVAR_LEVEL) -> Summary:
    """Mean, sd, se and CVaR of a sample."""
    sample = _sample(values)
    return Summary(
        n=int(sample.size),
        mean=float(sample.mean()),
        sd=sd(sample),
        se=se(sample),
        cvar=cvar(sample, level),
    )


def paired(a: Any, b: Any, confidence: float = CONFIDENCE) -> Paired:
    """The paired difference ``a - b`` (same days, same order), with a Student-t interval.

    Raises:
        ValueError: the samples differ in length.
    """
    first, second = _sample(a), _sample(b)
    if first.shape != second.shape:
        raise ValueError(
            f"paired samples must have the same days; got {first.size} and {second.size}"
        )
    difference = first - second
    mean = float(difference.mean())
    error = se(difference)
    if difference.size < 2:
        return Paired(int(difference.size), mean, error, math.nan, math.nan)
    half = float(stats.t.ppf(0.5 + confidence / 2.0, difference.size - 1)) * error
    return Paired(int(difference.size), mean, error, mean - half, mean + half)
