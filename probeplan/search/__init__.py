"""The layout search: greedy and exchange on a candidate grid, a certified bound, refinement.

Stages of :func:`plan` (modules: ``grid`` the grid objective, greedy and exchange; ``bound``
the relaxation; ``restarts`` the randomised greedy starts; ``refine`` the Bayesian
refinement; ``stages`` the stream of every step of every stage; ``outcome`` :func:`plan`, which
drains that stream, and the one builder of its result):

1. **Candidate grid** over the mounting regions, keep-outs removed (``Site.candidate_grid``),
   and the Fisher information each candidate adds in every scenario, A_sc, computed once.
2. **Greedy** selection: add the candidate that improves the criterion most, one probe at a
   time, with a tiny prior so that log det is finite from the first pick. For ``d`` log det is
   submodular and the greedy set reaches at least (1 − 1/e) of the best gain (Nemhauser, Wolsey
   & Fisher 1978; for sensor selection: Shamaiah, Banerjee & Vikalo 2010; Krause, Singh &
   Guestrin 2008).
3. **Fedorov exchange**: swap a chosen probe for a candidate while any swap helps (Fedorov,
   Theory of Optimal Experiments, 1972). Each probe's removal is a downdate of M; every
   candidate is tried at once through the matrix determinant lemma / Woodbury identity on its
   rank-a information (a = axes per meter), so no determinant is recomputed from scratch.
4. **Convex relaxation bound** for ``d`` with the ``mean`` aggregate (Joshi & Boyd, "Sensor
   Selection via Convex Optimization", IEEE TSP 57(2), 2009): weights w ∈ [0, 1]^C with
   Σ w = count, f(w) = mean_s log det(J0_s + Σ_c w_c A_sc) is concave. Projected gradient ascent
   finds a good w; the Frank–Wolfe duality gap max_v ∇f(w)·(v − w) certifies
   f* ≤ f(w) + gap, so the stored bound is valid however early the solver stops. The
   spacing rule tightens it (``bound.spacing_steps``: weights of candidates closer than the
   spacing sum to at most 1, by Lagrangian relaxation; candidates too close to an installed
   meter get weight 0). Every product runs on chunks of candidate rows (``grid.WORK_BYTES``).
5. **Restarts**, only where the bound stays loose (D-efficiency under
   ``restarts.TIGHT_BOUND_EFFICIENCY``): ``[design] restarts`` further exchange searches, each
   from a greedy selection whose every pick is drawn among the best few candidates (GRASP:
   Feo & Resende 1995) with the seeded generator. The best layout of all is kept; the spread of
   their final values (``SearchInfo.restart_values``) is an empirical figure beside the bound —
   evidence that the search is consistent, not a proof of optimality.
6. **Bayesian refinement** (scikit-optimize ``Optimizer``, ask/tell) moves one probe at a time
   in the continuous coordinates of its mounting region, the others fixed — a 1–2-dimensional
   problem, the size at which a Gaussian-process optimiser converges in tens of calls. It
   keeps a move only if it improves the criterion; the summary reports what it added.
7. **Baselines**: a regular hand-drawn layout and the best of N random layouts, scored alike.

A stop request (``plan(stop=...)``) is polled between any two steps of any stage; the search
then ends with the best layout so far, or with none when the greedy stage had not yet placed
every probe (``PlanOutcome.has_layout``).
"""

from .bound import BOUND_GAP_PER_PARAM, Relaxation, relaxation_bound, relaxation_steps
from .grid import (
    GRID_FRACTION_OF_DISTANCE,
    PRIOR_FRACTION,
    GridObjective,
    exchange,
    exchange_steps,
    greedy,
    greedy_steps,
)
from .outcome import PlanOutcome, d_efficiency, make_outcome, plan
from .refine import BO_BATCH, REFINE_RADIUS_CELLS, RefineStep, refine_steps
from .stages import Layout, Step, search_steps

__all__ = [
    "BOUND_GAP_PER_PARAM",
    "BO_BATCH",
    "GRID_FRACTION_OF_DISTANCE",
    "PRIOR_FRACTION",
    "REFINE_RADIUS_CELLS",
    "GridObjective",
    "Layout",
    "PlanOutcome",
    "RefineStep",
    "Relaxation",
    "Step",
    "d_efficiency",
    "exchange",
    "exchange_steps",
    "greedy",
    "greedy_steps",
    "make_outcome",
    "plan",
    "refine_steps",
    "relaxation_bound",
    "relaxation_steps",
    "search_steps",
]
