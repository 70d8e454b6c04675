"""Planning benchmark: how good the planned layout is, what each stage buys, and how long.

    python benchmarks/plan.py [--quick] [--json FILE]

The site is ``sites/plan10.toml`` (fictional): 10 new meters reading E_z around a test range,
one installed meter, mounting on open ground (a rectangle and a polygon), a fence (a segment,
raised meters with a gain) and rooftop points, three keep-outs; one storm charge (charge, x,
y, z) and the background's z component estimated: 5 parameters, 64 scenarios, criterion
``d``, mean aggregate, 1,000 random layouts for the random baseline.

Figures (D-ratio = exp(Δ value / n_params): information per parameter, 1 = equal)
-------------------------------------------------------------------------------
plan_d_efficiency_vs_bound
    exp((value − bound)/n_params) of the final plan against the certified relaxation bound on
    the candidate grid (≥ 0.98: within 2 % of the best grid layout, per parameter).
plan_grid_efficiency_vs_bound
    The same for the exchange layout (on the grid, where the bound strictly applies).
plan_d_ratio_vs_greedy, plan_d_ratio_vs_random, plan_d_ratio_vs_regular
    The plan over greedy alone, over the best of 1,000 random layouts, over the regular
    hand-drawn layout.
plan_bo_gain
    The plan over the exchange layout it started from: what Bayesian refinement added.
plan_seconds, plan_seconds_<stage>
    Wall time of the whole ``plan()`` (best of the repeats) and of each of its stages, from
    the progress callback ("final score" is the scoring of the chosen layout after the last
    stage).
plan_scaling_exponent_candidates
    Least-squares slope of log(time) against log(candidates) for GridObjective + greedy +
    exchange on candidate grids of about 500, 1,000, 2,000 and 4,000 points (the rows of the
    forward model are computed beforehand and not timed). The number of exchange passes
    depends on the grid, so ``plan_scaling_exponent_candidates_per_call`` gives the slope of the
    time per objective sweep (one rank-1 update over every candidate) as well.
"""

from __future__ import annotations

import time

import numpy as np
from _common import loglog_slope, site_problem, standalone

from probeplan.fisher import d_ratio
from probeplan.search import GridObjective, d_efficiency, exchange, greedy, plan

SITE = "plan10.toml"
CANDIDATE_TARGETS = (500, 1000, 2000, 4000)


def _timed_plan(problem) -> tuple[object, float, dict[str, float]]:
    """Run plan() once; return the outcome, its wall time and the seconds of every stage."""
    starts: dict[str, float] = {}
    last = [0.0]
    t0 = time.perf_counter()

    def progress(stage: str, done: int, total: int) -> None:
        last[0] = time.perf_counter() - t0
        starts.setdefault(stage, last[0])

    outcome = plan(problem, progress=progress)
    seconds = time.perf_counter() - t0
    # A stage runs from its first tick to the next stage's first tick; after the last tick
    # plan() scores the chosen layout.
    order = sorted(starts.items(), key=lambda kv: kv[1]) + [("final score", last[0])]
    ends = [t for _, t in order[1:]] + [seconds]
    stages = {name: end - start for (name, start), end in zip(order, ends, strict=True)}
    return outcome, seconds, stages


def _baseline(outcome, prefix: str) -> float:
    for b in outcome.info.baselines:
        if b.name.startswith(prefix):
            return float(b.value)
    return float("nan")


def _grid_scaling(problem, repeats: int) -> tuple[float, float, str]:
    """Slopes of log time vs log candidates: greedy + exchange, and per objective sweep."""
    site = problem.site
    cfg = problem.config
    sizes, totals, per_call = [], [], []
    detail = []
    for target in CANDIDATE_TARGETS:
        cand = site.candidate_grid(target=target)
        gains = problem.new_gain * cand.gain
        rows, _ = problem.rows(cand.positions_m, gains)
        best = np.inf
        calls = 0
        for _ in range(repeats):
            t = time.perf_counter()
            obj = GridObjective(problem, rows, prior=True)
            counter = [0]
            # A sweep: every candidate tried once, by the greedy (best_addition) or by the
            # exchange's pass over the whole grid (best_removal, a downdate).
            for name in ("best_addition", "best_removal"):
                sweep = getattr(obj, name)

                def counted(*a, _sweep=sweep, _counter=counter):
                    _counter[0] += 1
                    return _sweep(*a)

                setattr(obj, name, counted)
            chosen = greedy(
                obj, problem.count, cand.positions_m, cfg.probes.min_spacing_m, problem.installed_m
            )
            exchange(obj, chosen, cand.positions_m, cfg.probes.min_spacing_m, problem.installed_m)
            best = min(best, time.perf_counter() - t)
            calls = counter[0]
        n = cand.positions_m.shape[0]
        sizes.append(n)
        totals.append(best)
        per_call.append(best / max(calls, 1))
        detail.append(f"{n}: {best:.2f} s/{calls} sweeps")
    return loglog_slope(sizes, totals), loglog_slope(sizes, per_call), "; ".join(detail)


def run(quick: bool = False) -> dict:
    """Measure the planning figures (see the module docstring).

    Parameters
    ----------
    quick : bool
        One plan instead of three, one timing per grid size instead of two; the same site.

    Returns
    -------
    dict
        Flat figures, plus ``_notes`` (figure → short text) for the table.
    """
    problem = site_problem(SITE, expect=(5, 64, 10))
    config = problem.config
    n = problem.n_params
    runs = [_timed_plan(problem) for _ in range(1 if quick else 3)]
    outcome, _, stages = min(runs, key=lambda r: r[1])
    seconds = min(r[1] for r in runs)
    same = all(np.array_equal(r[0].positions_m, runs[0][0].positions_m) for r in runs)
    info = outcome.info
    value = float(outcome.score.value)
    greedy_v, exchange_v = _baseline(outcome, "greedy"), _baseline(outcome, "exchange")
    random_v, regular_v = _baseline(outcome, "best of"), _baseline(outcome, "regular")
    eff = d_efficiency(value, info.bound, n)
    grid_eff = d_efficiency(exchange_v, info.bound, n)
    slope, slope_call, grid_detail = _grid_scaling(problem, 1 if quick else 2)

    figures = {
        "plan_d_efficiency_vs_bound": round(eff, 5) if eff is not None else float("nan"),
        "plan_grid_efficiency_vs_bound": (
            round(grid_eff, 5) if grid_eff is not None else float("nan")
        ),
        "plan_d_ratio_vs_greedy": round(d_ratio(value, greedy_v, n), 5),
        "plan_d_ratio_vs_random": round(d_ratio(value, random_v, n), 5),
        "plan_d_ratio_vs_regular": round(d_ratio(value, regular_v, n), 5),
        "plan_bo_gain": round(d_ratio(value, exchange_v, n), 5),
        "plan_seconds": round(seconds, 2),
    }
    for stage, s in stages.items():
        figures[f"plan_seconds_{stage.replace(' ', '_')}"] = round(s, 2)
    figures["plan_scaling_exponent_candidates"] = round(slope, 3)
    figures["plan_scaling_exponent_candidates_per_call"] = round(slope_call, 3)
    repeat_text = "one run" if len(runs) == 1 else f"best of {len(runs)} runs"
    if len(runs) > 1 and same:
        repeat_text += ", the same layout every run"
    figures["_notes"] = {
        "plan_d_efficiency_vs_bound": (
            f"value {value:.4f}, bound {info.bound:.4f} (gap {info.bound_gap:.2g}), "
            f"{info.n_candidates} candidates at {info.grid_spacing_m:.0f} m"
            if info.bound is not None
            else "no bound computed"
        ),
        "plan_bo_gain": f"refinement: {config.design.evaluations} evaluations",
        "plan_seconds": f"{repeat_text}; 10 probes × 64 scenarios",
        "plan_scaling_exponent_candidates": grid_detail,
    }
    if not same:
        figures["_notes"]["plan_seconds"] += "; LAYOUTS DIFFER BETWEEN RUNS (not deterministic)"
    return figures


if __name__ == "__main__":
    standalone("plan", run)
