"""Scoring benchmark: layouts scored per second, forward model included, batched.

    python benchmarks/score.py [--quick] [--json FILE]

The site is ``sites/score8.toml`` (fictional): 8 ground meters reading E_z, one storm charge
(charge, x, y, z estimated) over a grounded plane and the fair-weather background's z
component as a nuisance: 5 parameters, 64 scenarios, criterion ``d`` with the mean aggregate.

Figures
-------
score_layouts_per_s
    ``Problem.layout_values`` on ``(n_layouts, 8, 3)`` random feasible layouts: field and
    Jacobian of every probe in every scenario, meter model, Fisher information, log det and the
    mean over scenarios. Best of the repeats.
score_reference_layouts_per_s
    A plain numpy reference measured alternately in the same run: ``einsum`` of precomputed
    whitened rows into J, ``slogdet``, mean over scenarios — the floor of the scoring step
    without the forward model. ``score_ratio_vs_reference`` = ours / reference.
score_max_rel_diff_vs_reference
    Largest relative difference between the two sets of values (both must agree).
scaling_exponent_scenarios
    Least-squares slope of log(time) against log(scenarios) for scoring the same layouts with
    16, 32, 64, 128 and 256 scenarios (1 = linear).
"""

from __future__ import annotations

import numpy as np
from _common import interleaved, loglog_slope, site_problem, standalone

SITE = "score8.toml"
SCENARIO_COUNTS = (16, 32, 64, 128, 256)


def _reference_values(rows: np.ndarray) -> np.ndarray:
    """Plain numpy: rows (n_layouts, S, n_readings, p) → mean_s log det J_s, (n_layouts,)."""
    info = np.einsum("lsrp,lsrq->lspq", rows, rows)
    sign, logdet = np.linalg.slogdet(info)
    return np.where(sign > 0, logdet, -np.inf).mean(axis=-1)


def run(quick: bool = False) -> dict:
    """Measure the scoring figures (see the module docstring).

    Parameters
    ----------
    quick : bool
        Fewer layouts and repeats; the same site and quantities.

    Returns
    -------
    dict
        Flat figures, plus ``_notes`` (figure → short text) for the table.
    """
    n_layouts = 2000 if quick else 4000
    repeats = 4 if quick else 9
    problem = site_problem(SITE, expect=(5, 64, 8))
    rng = np.random.default_rng(problem.config.seed)
    layouts = problem.site.random_layouts(n_layouts, problem.count, rng)  # (L, 8, 3)

    # Reference input: the same layouts' whitened rows, precomputed, (L, S, 8, p).
    rows, _ = problem.rows(layouts.reshape(-1, 3))  # (S, L*8, 1, p)
    rows = rows.reshape(problem.n_scenarios, n_layouts, -1, problem.n_params)
    rows = np.ascontiguousarray(np.moveaxis(rows, 1, 0))

    problem.layout_values(layouts[:50])  # warm-up
    times = interleaved(
        {"ours": lambda: problem.layout_values(layouts), "ref": lambda: _reference_values(rows)},
        repeats,
    )
    ours_t, ref_t = times["ours"], times["ref"]
    ours, ref = problem.layout_values(layouts), _reference_values(rows)
    finite = np.isfinite(ref) & np.isfinite(ours)
    diff = np.abs(ours[finite] - ref[finite]) / np.maximum(np.abs(ref[finite]), 1e-300)
    rate, ref_rate = n_layouts / min(ours_t), n_layouts / min(ref_t)

    # Scaling with the scenario count: the same layouts, interleaved repeats.
    n_scaling = 400 if quick else 1000
    problems = {s: site_problem(SITE, scenarios=s) for s in SCENARIO_COUNTS}
    sub = layouts[:n_scaling]
    for p in problems.values():
        p.layout_values(sub[:20])  # warm-up
    times = interleaved(
        {s: (lambda p=p: p.layout_values(sub)) for s, p in problems.items()}, 3 if quick else 5
    )
    best = np.array([min(times[s]) for s in SCENARIO_COUNTS])
    slope = loglog_slope(SCENARIO_COUNTS, best)
    per_s = ", ".join(
        f"{s}: {n_scaling / b:,.0f}/s" for s, b in zip(SCENARIO_COUNTS, best, strict=True)
    )
    return {
        "score_layouts_per_s": round(rate, 1),
        "score_reference_layouts_per_s": round(ref_rate, 1),
        "score_ratio_vs_reference": round(rate / ref_rate, 4),
        "score_max_rel_diff_vs_reference": float(diff.max()) if diff.size else float("nan"),
        "scaling_exponent_scenarios": round(slope, 3),
        "_notes": {
            "score_layouts_per_s": (
                f"best of {repeats} × {n_layouts} layouts, 8 probes × 64 scenarios × 5 params; "
                f"median {n_layouts / np.median(ours_t):,.0f}/s"
            ),
            "score_reference_layouts_per_s": (
                "einsum + slogdet on precomputed rows, alternated with ours; "
                f"median {n_layouts / np.median(ref_t):,.0f}/s"
            ),
            "score_max_rel_diff_vs_reference": f"{int(finite.sum())} finite layouts compared",
            "scaling_exponent_scenarios": f"{n_scaling} layouts; {per_s}",
        },
    }


if __name__ == "__main__":
    standalone("score", run)
