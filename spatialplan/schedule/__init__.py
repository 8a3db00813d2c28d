"""The spatial harvest scheduler: LP bound, construction, local search, CP-SAT.

The public face is small: :func:`solve` returns the best plan found within the time
limit as a :class:`PlanResult`; :func:`lp_bound` solves Model I without spatial rules as an
LP (HiGHS); :func:`diagnose` names the rule family that makes a problem infeasible and the
smallest relaxation that works; :func:`gap` is the relative gap of an NPV to a bound;
:func:`best_bound` and :func:`best_bound_method` give the tightest proven upper bound of a
result and the method that proved it.
The modules inside are the parts of one job:

* ``model`` - rule rows, openness, the float64 plan check, over-size covers;
* ``bound`` - the LP relaxation (HiGHS);
* ``construct`` - greedy construction of a first legal plan;
* ``repair`` - priced descent and the flow sweep (plans brought back under the rows);
* ``starts`` - the construction runs of a solve (and the looser construction, swept);
* ``phases`` - the search phases of a solve (annealing, CP-SAT, windows, looser search);
* ``anneal`` - simulated-annealing local search;
* ``cpsat`` and ``windows`` - CP-SAT models of the whole problem or of a window;
* ``diagnosis`` - infeasibility diagnosis;
* ``driver`` - :func:`solve`, which runs them in turn;
* ``quality`` - the gap, the proven bounds of a result and the best of them.
"""

from spatialplan.schedule.bound import LpResult, lp_bound
from spatialplan.schedule.driver import PlanResult, SolveProgress, diagnose, solve
from spatialplan.schedule.quality import (
    BOUND_METHODS,
    best_bound,
    best_bound_method,
    gap,
    proven_bounds,
)

__all__ = [
    "BOUND_METHODS",
    "LpResult",
    "PlanResult",
    "SolveProgress",
    "best_bound",
    "best_bound_method",
    "diagnose",
    "gap",
    "lp_bound",
    "proven_bounds",
    "solve",
]
