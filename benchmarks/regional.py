"""Regional benchmark: a storm-watch network over tens of thousands of candidates.

    python benchmarks/regional.py [--quick] [--json FILE]

The site is ``sites/regional.toml`` (fictional): 40 ground meters reading E_z over a 200 km ×
200 km basin, two charge centres (charge and centre of each) and the background's z
component: 9 parameters, 128 scenarios, candidates on a 1 km grid (40,000), no refinement.
Each plan runs in a child process of its own, so that its peak memory is its own.

Figures
-------
plan_regional_seconds
    Wall time of ``build_problem`` + ``plan()`` on the 40,000-candidate grid (imports not
    counted). ``--quick`` plans a 10,000-candidate grid (2 km) with 64 scenarios instead.
plan_regional_peak_gb
    Peak resident memory of that child process (``resource.getrusage``, ``ru_maxrss``),
    imports included.
scaling_exponent_candidates
    Least-squares slope of log(time) against log(candidates) of the same plan on grids of
    about 1,000, 4,000, 10,000 and 40,000 candidates (quick: 1,000 to 10,000, 64
    scenarios); 1 = linear in the grid.
plan_regional_d_efficiency_vs_bound
    exp((value − bound)/n_params) of the plan against the relaxation bound (reported: on such
    a grid the relaxation is loose, see the README).

The machine's load (``os.getloadavg``) is noted beside the timings: on a shared machine they
are only comparable at similar loads.
"""

from __future__ import annotations

import json
import os
import subprocess
import sys
import time

from _common import HERE, loglog_slope, standalone

SITE = "regional.toml"
#: Grid spacings (m) of the scaling runs: about 1,000, 4,000, 10,000 and 40,000 candidates.
SPACINGS_M = (6300.0, 3150.0, 2000.0, 1000.0)


def _child(spacing_m: float, scenarios: int) -> dict:
    """Plan the regional site at one grid spacing (in this process); the figures of the run."""
    import dataclasses
    import resource

    from _common import SITES

    from probeplan.config import load_config
    from probeplan.problem import build_problem
    from probeplan.search import d_efficiency, plan

    config = load_config(SITES / SITE)
    design = dataclasses.replace(config.design, grid_spacing_m=spacing_m, scenarios=scenarios)
    config = dataclasses.replace(config, design=design)
    t0 = time.perf_counter()
    problem = build_problem(config)
    starts: dict[str, float] = {}

    def progress(stage: str, done: int, total: int) -> None:
        starts.setdefault(stage, time.perf_counter() - t0)

    outcome = plan(problem, progress=progress)
    seconds = time.perf_counter() - t0
    info = outcome.info
    eff = d_efficiency(float(outcome.score.value), info.bound, problem.n_params)
    return {
        "seconds": seconds,
        "stages": starts,
        "n_candidates": info.n_candidates,
        "peak_gb": resource.getrusage(resource.RUSAGE_SELF).ru_maxrss * 1024 / 1e9,
        "efficiency": float("nan") if eff is None else eff,
        "load": os.getloadavg()[0],
    }


def _run_child(spacing_m: float, scenarios: int) -> dict:
    out = subprocess.run(
        [sys.executable, str(HERE / "regional.py"), "--child", str(spacing_m), str(scenarios)],
        capture_output=True,
        text=True,
        check=True,
    )
    return json.loads(out.stdout.strip().splitlines()[-1])


def run(quick: bool = False) -> dict:
    """Measure the regional figures (see the module docstring).

    Parameters
    ----------
    quick : bool
        Grids of 1,000 to 10,000 candidates and 64 scenarios instead of 1,000 to 40,000 and 128.

    Returns
    -------
    dict
        Flat figures, plus ``_notes`` (figure → short text) for the table.
    """
    scenarios = 64 if quick else 128
    spacings = SPACINGS_M[:-1] if quick else SPACINGS_M
    runs = [_run_child(s, scenarios) for s in spacings]
    main = runs[-1]
    sizes = [r["n_candidates"] for r in runs]
    slope = loglog_slope(sizes, [r["seconds"] for r in runs])
    detail = "; ".join(
        f"{r['n_candidates']}: {r['seconds']:.0f} s (load {r['load']:.1f})" for r in runs
    )
    stages = sorted(main["stages"].items(), key=lambda kv: kv[1])
    ends = [t for _, t in stages[1:]] + [main["seconds"]]
    per_stage = ", ".join(f"{n} {e - t:.0f} s" for (n, t), e in zip(stages, ends, strict=True))
    return {
        "plan_regional_seconds": round(main["seconds"], 1),
        "plan_regional_peak_gb": round(main["peak_gb"], 3),
        "scaling_exponent_candidates": round(slope, 3),
        "plan_regional_d_efficiency_vs_bound": round(main["efficiency"], 4),
        "_notes": {
            "plan_regional_seconds": (
                f"{main['n_candidates']} candidates × {scenarios} scenarios, 40 probes, "
                f"9 params; load {main['load']:.1f} on {os.cpu_count()} cpus; {per_stage}"
            ),
            "plan_regional_peak_gb": "max RSS of the planning process, imports included",
            "scaling_exponent_candidates": detail,
        },
    }


if __name__ == "__main__":
    if len(sys.argv) == 4 and sys.argv[1] == "--child":
        print(json.dumps(_child(float(sys.argv[2]), int(sys.argv[3]))))
    else:
        standalone("regional", run)
