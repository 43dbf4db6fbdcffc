"""Learning how an order's targets really fill, so that plans expect the shortfall they will see.

Theory of operation
-------------------
A router seldom fills every share it is asked for: passive orders wait, limits block, venues
throttle. A plan that assumes full fills falls behind every bin and learns it only as a deviation;
near the close the lost shares can no longer be caught up under the participation cap. So the
engine measures, per order, the *fill ratio* of its targets and sizes targets and plans with it.

Per bin the order had a target for (:class:`WorkedBin`, kept when the target is published), when
the bin closes the engine knows what the router could work: the target's ``participation`` times
the bin's *real* volume (else its ``quantity``), never more than what was left. The fills since
the target was published are what it got. The ratio of the sums, over the bins the order had a
positive target in, is the order's evidence (:class:`FillRatio`). A bin whose fills reached the
cap times the real volume is censored (the cap, not the router, stopped it: the ratio is only
known to be at least what it shows) and is not counted.

Shrinkage (a normal-prior posterior mean on the ratio, as the forecast does for the day's scale):
with ``m`` bins of evidence and the prior worth :data:`PRIOR_BINS` bins, the estimate is
``w x filled / targeted + (1 - w) x prior`` with ``w = m / (m + PRIOR_BINS)``. The prior of an
order is its symbol's pooled ratio (every order on the symbol, the same shrinkage), whose own
prior is :data:`PRIOR_RATIO` = 1 (a router fills what it is asked for until shown otherwise). The
estimate is bounded to :data:`RATIO_BOUNDS`: never above 1 (asking for less than the plan because
a router once overfilled would be a bet), never below a quarter (a router that fills nothing is a
problem for an alert, not for sizing).

How it is used (:mod:`tracker.core.engine.planning`): with ratio ``r`` the target of the bin
ahead asks for the planned fills divided by ``r``: its shares at most the cap, its rate up to
``cap / r`` (the rate a router that fills ``r`` of what it works needs to fill the cap; it
executes never more than the cap of the real volume). So the remaining-horizon problem caps each
bin's fills at the cap itself. Before the working rate could exceed the cap, the plan had to
count on ``r x cap`` per bin and an order the cap binds fell behind a router-side catch-up by
``1 - r`` of the cap in every bin (``tracker evaluate``, partial fills: 5 of 300 days with more
than 1 % left, against none).

Fills that arrive after their bin has closed count toward the next bin; the error is one bin's
worth of a late report, and washes out in the sums.
"""

from __future__ import annotations

import math
from dataclasses import dataclass

#: The prior of a symbol's fill ratio: targets fill in full.
PRIOR_RATIO = 1.0

#: The prior's weight, in bins of evidence (after 2 bins the observed ratio weighs half). Until
#: the ratio is learnt each bin falls short by ``1 - r`` of its target; with the prior worth 6
#: bins an order on a router filling 70-100 % trailed its baseline enough to cost 95 % CVaR
#: (``tracker evaluate``, partial fills, 100 days: +1.6 bps at 6 bins, +0.6 at 2).
PRIOR_BINS = 2.0

#: Bounds of the estimated fill ratio.
RATIO_BOUNDS = (0.25, 1.0)


@dataclass(frozen=True, slots=True)
class FillRatio:
    """Evidence of how targets fill: shares filled and shares a router could work, over bins.

    Frozen: an update makes a new value (the engine's savepoint keeps the old one by reference).

    Attributes:
        filled: Shares filled in the bins counted.
        targeted: Shares the targets of those bins asked for, on the bins' real volume.
        bins: Bins counted (bins with a positive target).
    """

    filled: float = 0.0
    targeted: float = 0.0
    bins: int = 0

    def add(self, filled: float, targeted: float) -> FillRatio:
        """The evidence with one more bin (``targeted`` > 0)."""
        return FillRatio(self.filled + filled, self.targeted + targeted, self.bins + 1)

    def estimate(self, prior: float) -> float:
        """The shrunk fill ratio (module docstring), bounded to :data:`RATIO_BOUNDS`."""
        if self.bins == 0 or self.targeted <= 0:
            return min(max(prior, RATIO_BOUNDS[0]), RATIO_BOUNDS[1])
        weight = self.bins / (self.bins + PRIOR_BINS)
        value = weight * self.filled / self.targeted + (1.0 - weight) * prior
        return min(max(value, RATIO_BOUNDS[0]), RATIO_BOUNDS[1])


@dataclass(frozen=True, slots=True)
class WorkedBin:
    """The target an order has for one bin, as published, and where the order stood then.

    Attributes:
        index: The bin (index in the session).
        quantity: The target's shares (at the forecast volume).
        participation: The target's rate of the bin's volume (None: none given).
        max_participation: The cap as a rate (None: uncapped).
        remaining: Shares the order had left when the target was published.
        filled_at: Shares filled when the bin's first target was published.
    """

    index: int
    quantity: int
    participation: float | None
    max_participation: float | None
    remaining: int
    filled_at: int

    def workable(self, volume: float, filled: float) -> float:
        """What a router could work on the bin's real ``volume``: the rate (else the shares),
        at most what was left.

        A target whose rate is above the cap (worked at a fill ratio below 1, module docstring)
        asked a router reading the rate for more than one reading the shares, which never fills
        beyond ``quantity``: when ``filled`` is within ``quantity`` the bin is judged against the
        shares. Judged against the rate, a router that reads the shares would seem to fill ever
        less as the rate grows, and the ratio would run down to its bound.
        """
        wanted = (
            self.participation * volume if self.participation is not None else float(self.quantity)
        )
        if (
            self.participation is not None
            and self.max_participation is not None
            and self.participation > self.max_participation
            and filled <= self.quantity
        ):
            wanted = float(self.quantity)
        return max(min(wanted, float(self.remaining)), 0.0)

    def censored(self, volume: float, filled: float) -> bool:
        """Whether ``filled`` reached the cap of the bin's real ``volume`` (so the cap, not the
        router's fill ratio, set it)."""
        if self.max_participation is None:
            return False
        return filled >= math.floor(self.max_participation * volume + 1e-9) - 1.0


#: No evidence yet (the default of an order and a symbol).
NO_EVIDENCE = FillRatio()


def learn(
    order_ratio: FillRatio, symbol_ratio: FillRatio, worked: WorkedBin, volume: float, filled: int
) -> tuple[FillRatio, FillRatio]:
    """Both ratios with the bin of ``worked`` counted (unchanged when it asked for nothing).

    Args:
        order_ratio: The order's evidence so far.
        symbol_ratio: The symbol's pooled evidence so far.
        worked: The target of the bin that closed.
        volume: The bin's real volume.
        filled: The order's filled shares now.
    """
    got = float(max(filled - worked.filled_at, 0))
    workable = worked.workable(volume, got)
    if workable < 1.0 or worked.censored(volume, got):
        return order_ratio, symbol_ratio
    return order_ratio.add(got, workable), symbol_ratio.add(got, workable)


def fill_ratio(order_ratio: FillRatio, symbol_ratio: FillRatio) -> float:
    """The order's fill ratio, shrunk toward its symbol's (itself shrunk toward 1)."""
    return order_ratio.estimate(symbol_ratio.estimate(PRIOR_RATIO))


__all__ = [
    "NO_EVIDENCE",
    "PRIOR_BINS",
    "PRIOR_RATIO",
    "RATIO_BOUNDS",
    "FillRatio",
    "WorkedBin",
    "fill_ratio",
    "learn",
]
