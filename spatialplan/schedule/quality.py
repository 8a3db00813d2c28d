"""How good a plan is: the proven upper bounds on the optimal NPV and the best of them.

Three methods bound the optimum from above: the aspatial LP (Model I without the spatial
rules, solved with HiGHS: a relaxation, so its optimum is at least the spatial optimum), the
same LP with the opening rule added as cover inequalities (still a relaxation, tighter where
openings bind) and CP-SAT's own bound on the full model. The best proven bound is the
smallest of them, never below the plan's NPV (a legal plan reaches it), and the NPV itself
once the plan is proven optimal. The functions take anything with ``npv``, ``lp_bound``,
``cpsat_bound`` and ``gap`` (``cover_bound`` when there is one): a
:class:`~spatialplan.schedule.PlanResult` or a scenario's result.
"""

from __future__ import annotations

import math
from typing import Protocol

__all__ = [
    "BOUND_METHODS",
    "HasBounds",
    "best_bound",
    "best_bound_method",
    "gap",
    "proven_bounds",
]

#: The proven bounds a result may carry (attribute -> the method, in words).
BOUND_METHODS: dict[str, str] = {
    "lp_bound": "aspatial LP (HiGHS)",
    "cover_bound": "LP with opening covers (HiGHS)",
    "cpsat_bound": "CP-SAT",
}


def gap(npv: float, bound: float) -> float:
    """Relative gap of a plan's NPV to an upper bound: ``(bound - npv) / |bound|``.

    Never negative; infinite when there is no finite bound. The denominator is kept away
    from zero so a bound of 0 gives a large gap rather than a division error.

    Examples
    --------
    >>> gap(95.0, 100.0)
    0.05
    >>> gap(100.0, float("nan"))
    inf
    """
    if not math.isfinite(bound):
        return float("inf")
    return max(0.0, (bound - npv) / max(abs(bound), 1e-9))


class HasBounds(Protocol):
    """A solved plan with its NPV, its proven bounds and its gap."""

    @property
    def npv(self) -> float: ...  # pragma: no cover - a protocol

    @property
    def lp_bound(self) -> float | None: ...  # pragma: no cover - a protocol

    @property
    def cover_bound(self) -> float | None: ...  # pragma: no cover - a protocol

    @property
    def cpsat_bound(self) -> float | None: ...  # pragma: no cover - a protocol

    @property
    def gap(self) -> float: ...  # pragma: no cover - a protocol


def proven_bounds(result: HasBounds) -> dict[str, float]:
    """Every finite proven upper bound of ``result``, keyed by its method.

    Examples
    --------
    >>> from types import SimpleNamespace as R
    >>> proven_bounds(R(npv=90.0, lp_bound=110.0, cpsat_bound=None, gap=0.18))
    {'aspatial LP (HiGHS)': 110.0}
    """
    out = {}
    for attr, method in BOUND_METHODS.items():
        b = getattr(result, attr, None)  # results made before a method existed lack it
        if b is not None and math.isfinite(float(b)):
            out[method] = float(b)
    return out


def _best(result: HasBounds) -> tuple[float, str]:
    npv = float(result.npv)
    if not math.isfinite(npv):
        return math.nan, ""
    bounds = proven_bounds(result)
    if not bounds:
        return math.nan, ""
    method = min(bounds, key=bounds.__getitem__)
    if result.gap == 0.0:  # proven optimal: the plan's NPV is the optimum
        return npv, method
    return max(npv, bounds[method]), method


def best_bound(result: HasBounds) -> float:
    """The tightest proven upper bound on the optimal NPV.

    The smallest of the aspatial LP bound, the cover LP bound and CP-SAT's bound on the
    full model (all bound the optimum from above), never below the plan's own NPV; the NPV itself when the gap
    is 0 (the plan is proven optimal). NaN without a plan (NaN NPV) or without any finite
    bound.

    Examples
    --------
    >>> from types import SimpleNamespace as R
    >>> best_bound(R(npv=90.0, lp_bound=110.0, cpsat_bound=100.0, gap=0.1))
    100.0
    >>> best_bound(R(npv=90.0, lp_bound=110.0, cover_bound=97.0, cpsat_bound=100.0, gap=0.07))
    97.0
    >>> best_bound(R(npv=90.0, lp_bound=110.0, cpsat_bound=90.0004, gap=0.0))
    90.0
    """
    return _best(result)[0]


def best_bound_method(result: HasBounds) -> str:
    """The method that gave :func:`best_bound` (a :data:`BOUND_METHODS` value; ``""`` when
    there is none).

    Examples
    --------
    >>> from types import SimpleNamespace as R
    >>> best_bound_method(R(npv=90.0, lp_bound=110.0, cpsat_bound=100.0, gap=0.1))
    'CP-SAT'
    """
    return _best(result)[1]
