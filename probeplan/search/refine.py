"""Bayesian refinement of a layout in the continuous coordinates of its mounting regions.

scikit-optimize's ``Optimizer`` (ask/tell) moves one probe at a time in the continuous
coordinates of its mounting region, the others fixed — a 1–2-dimensional problem, the size at
which a Gaussian-process optimiser converges in tens of calls. A move is kept only if it
improves the criterion. :func:`refine_steps` yields after every batch of evaluations, so the
search can stop between any two.
"""

from __future__ import annotations

from collections.abc import Iterator
from dataclasses import dataclass

import numpy as np

from ..problem import Problem

#: Half-width of each probe's refinement box, in candidate-grid spacings.
REFINE_RADIUS_CELLS = 1.5

#: Objective evaluations per Bayesian step: asked and told in small batches (constant liar).
BO_BATCH = 4


def _trust_box(region, position: np.ndarray, radius_m: float | None) -> list[tuple[float, float]]:
    """Unit-coordinate bounds of a box of half-width ``radius_m`` around ``position``."""
    dim = region.unit_dim
    if radius_m is None or region.kind == "points":
        return [(0.0, 1.0)] * dim
    u0 = np.asarray(region.to_unit(position), dtype=float).reshape(dim)
    # Metres per unit coordinate along each axis, from two nearby mapped points.
    box = []
    for k in range(dim):
        step = np.zeros(dim)
        step[k] = 1e-3
        a = region.from_unit(np.clip(u0 - step, 0, 1)[None])[0]
        b = region.from_unit(np.clip(u0 + step, 0, 1)[None])[0]
        du = abs(np.clip(u0 + step, 0, 1)[k] - np.clip(u0 - step, 0, 1)[k])
        metres_per_unit = np.linalg.norm(b - a) / du if du > 0 else 0.0
        half = radius_m / metres_per_unit if metres_per_unit > 0 else 1.0
        lo, hi = max(0.0, u0[k] - half), min(1.0, u0[k] + half)
        box.append((float(lo), float(hi)) if hi > lo else (0.0, 1.0))
    return box


def _make_gp(dim: int):
    from skopt.learning import GaussianProcessRegressor
    from skopt.learning.gaussian_process.kernels import ConstantKernel, Matern

    # No hyper-parameter restarts: the fit runs after every told batch, and on 1–2 unit
    # coordinates one start is enough (measured: 30 calls in ~2 s instead of ~10 s).
    kernel = ConstantKernel(1.0, (1e-3, 1e3)) * Matern(
        length_scale=[0.2] * dim, length_scale_bounds=(1e-3, 10.0), nu=2.5
    )
    return GaussianProcessRegressor(
        kernel=kernel, normalize_y=True, noise="gaussian", n_restarts_optimizer=0
    )


@dataclass(frozen=True, eq=False)
class RefineStep:
    """The state of the refinement after a batch of evaluations.

    Attributes
    ----------
    layout : (count, 3) float
        The best layout so far (the probe being searched at its best position yet).
    value : float
        Its criterion.
    used : int
        Evaluations spent so far.
    recorded : tuple of float
        Criterion of this batch's proposals that keep the mounting rules, in order.
    """

    layout: np.ndarray
    value: float
    used: int
    recorded: tuple[float, ...] = ()


def refine_steps(
    problem: Problem,
    layout: np.ndarray,
    gain: np.ndarray,
    regions: np.ndarray,
    budget: int,
    rng: np.random.Generator,
    radius_m: float | None = None,
) -> Iterator[RefineStep]:
    """Move one probe at a time in its region's continuous coordinates (scikit-optimize).

    Each probe is searched in a trust box of half-width ``radius_m`` around its position (in
    its region's unit coordinates): the grid stages have already found the right
    neighbourhood, and a dozen or two Gaussian-process calls can refine a small box but not
    rediscover a whole site. The first step is the starting layout (no evaluation spent);
    then one step per batch of :data:`BO_BATCH` evaluations.

    Parameters
    ----------
    problem : Problem
    layout : (count, 3) float
        Starting positions of the new probes.
    gain : (count,) float
    regions : (count,) int
        Mounting region index of each probe (its coordinates live there).
    budget : int
        Objective evaluations to spend.
    rng : numpy Generator
    radius_m : float or None
        Half-width of each probe's search box, m (None: the whole region).

    Yields
    ------
    RefineStep
    """
    site = problem.site
    layout = layout.copy()
    current = float(problem.objective(layout[None], gain[None])[0])
    yield RefineStep(layout.copy(), current, 0)
    movable = [i for i in range(layout.shape[0]) if site.regions[regions[i]].kind != "points"]
    if not movable or budget <= 0:
        return
    per_probe = max(BO_BATCH * 2, budget // len(movable))
    used = 0
    for i in rng.permutation(movable):
        if used >= budget:
            break
        region = site.regions[regions[i]]
        box = _trust_box(region, layout[i], radius_m)
        opt = _optimizer(region, box, per_probe, rng)
        best = _ProbeSearch(problem, region, box, opt, layout, gain, int(i), current)
        for k in _batches(min(per_probe, budget - used)):
            recorded = best.batch(k)
            used += k
            yield RefineStep(best.layout(), best.value, used, recorded)
        layout, current = best.layout(), best.value


def _batches(n: int) -> Iterator[int]:
    """Batch sizes of :data:`BO_BATCH` (the last one smaller) that add up to ``n``."""
    spent = 0
    while spent < n:
        k = min(BO_BATCH, n - spent)
        yield k
        spent += k


def _optimizer(region, box: list[tuple[float, float]], per_probe: int, rng: np.random.Generator):
    """A scikit-optimize ``Optimizer`` over ``box`` (the region's unit coordinates)."""
    from skopt import Optimizer

    return Optimizer(
        box,
        base_estimator=_make_gp(region.unit_dim),
        n_initial_points=min(BO_BATCH, per_probe),
        acq_optimizer="sampling",
        acq_optimizer_kwargs={"n_points": 500},
        random_state=int(rng.integers(2**31 - 1)),
    )


class _ProbeSearch:
    """The Bayesian search of one probe's position, the others fixed (ask/tell in batches)."""

    def __init__(self, problem: Problem, region, box, opt, layout, gain, i: int, current: float):
        self.problem, self.region, self.opt, self.gain, self.i = problem, region, opt, gain, i
        self.base = layout
        self.best_pos, self.best_val, self.current = layout[i].copy(), current, current
        self.worst_y = -np.inf
        maximise = problem.criterion.maximise
        # The incumbent position is the first point the optimiser knows (a GP needs finite y).
        if np.isfinite(current):
            u0 = np.clip(region.to_unit(layout[i]), *np.array(box).T)
            opt.tell([list(map(float, u0))], [-current if maximise else current])

    def batch(self, k: int) -> tuple[float, ...]:
        """Ask, evaluate and tell ``k`` positions; the recorded values of the legal ones."""
        problem, site = self.problem, self.problem.site
        maximise = problem.criterion.maximise
        dim = self.region.unit_dim
        us = np.array(self.opt.ask(n_points=k), dtype=float).reshape(k, dim)
        cand = self.region.from_unit(us)  # (k, 3)
        trial = np.repeat(self.base[None], k, axis=0)
        trial[:, self.i] = cand
        vals = problem.objective(trial, np.broadcast_to(self.gain, trial.shape[:2]))
        ok = site.allowed(cand) & site.spacing_ok(trial)
        # A proposal that breaks the rules is no layout: it is not recorded.
        recorded = tuple(float(v) for v, good in zip(vals, ok, strict=True) if good)
        # Infeasible or singular points get a finite penalty just worse than anything seen
        # (the GP needs finite values).
        y = -vals if maximise else vals
        bad = ~ok | ~np.isfinite(y)
        seen = np.concatenate([y[~bad], [-self.current if maximise else self.current]])
        seen = seen[np.isfinite(seen)]
        penalty = (seen.max() + 1.0) if seen.size else 1e6
        self.worst_y = max(self.worst_y, penalty)
        y = np.where(bad, self.worst_y, y)
        self.opt.tell([list(u) for u in us], [float(v) for v in y])
        for j in np.nonzero(~bad)[0]:
            if problem.better(vals[j], self.best_val):
                self.best_val, self.best_pos = float(vals[j]), cand[j].copy()
        return recorded

    def layout(self) -> np.ndarray:
        """The layout with this probe at its best position yet, if that improves it."""
        out = self.base.copy()
        if self.problem.better(self.best_val, self.current):
            out[self.i] = self.best_pos
        return out

    @property
    def value(self) -> float:
        return self.best_val if self.problem.better(self.best_val, self.current) else self.current
