"""``tracker evaluate``: does re-planning pay? Paired Monte-Carlo of the engine against baselines.

The same simulated (or recorded) days are worked by four policies -- the real engine re-planning
every bin, the opening plan with catch-up, TWAP with catch-up and a constant participation rate
-- through one router and one market model, and their implementation shortfall, completion and
the planner's cost model are compared day by day. Everything simulated is invented.

Modules, in the order a day flows through them:

* :mod:`.config` -- the scenario file (market, orders, costs, scenario families);
* :mod:`.market_day` -- one day of the market and its order (simulated, or recorded bins);
* :mod:`.policies` -- the four policies (the engine through the wire contract);
* :mod:`.execution` -- the router and the market's charge, the day's bill;
* :mod:`.runner` -- every policy over every day of every scenario;
* :mod:`.statistics` -- summaries, CVaR, paired differences;
* :mod:`.report` -- the terminal tables, JSON and the chart.
"""

from tracker.sim.evaluation.config import EvaluationConfig, Scenario, load_config, parse_config
from tracker.sim.evaluation.policies import BASELINE, POLICIES
from tracker.sim.evaluation.runner import Evaluation, evaluate, results_of

__all__ = [
    "BASELINE",
    "POLICIES",
    "Evaluation",
    "EvaluationConfig",
    "Scenario",
    "evaluate",
    "load_config",
    "parse_config",
    "results_of",
]
