"""What the benchmark scripts share: paths, targets, the table, the JSON files, timing.

``run.py``, ``forward.py``, ``score.py``, ``plan.py`` and ``regional.py`` import this module
by its plain name: Python puts the folder of the script it runs first on ``sys.path``, so ``python
benchmarks/run.py`` and ``python benchmarks/score.py`` both find it, with no path set by hand.
"""

from __future__ import annotations

import argparse
import datetime as dt
import json
import math
import os
import subprocess
import sys
import time
from collections.abc import Callable
from pathlib import Path

import numpy as np

HERE = Path(__file__).resolve().parent
RESULTS = HERE / "results"
SITES = HERE / "sites"

#: Target of each figure: (comparison, threshold, text). "report" figures have no pass/fail.
#: "band" passes when the value lies within [lo, hi].
TARGETS: dict[str, tuple] = {
    "forward_bandwidth_ratio": (">=", 0.8, "≥ 0.8"),
    "score_layouts_per_s": (">=", 5000.0, "≥ 5,000"),
    "score_reference_layouts_per_s": ("report", None, "reported"),
    "score_ratio_vs_reference": (">=", 1.0, "≥ 1 (issue 12)"),
    "score_max_rel_diff_vs_reference": ("<=", 1e-9, "≤ 1e-9"),
    "scaling_exponent_scenarios": ("band", (0.8, 1.2), "≈ 1 (0.8–1.2)"),
    "plan_d_efficiency_vs_bound": (">=", 0.98, "≥ 0.98"),
    "plan_grid_efficiency_vs_bound": ("report", None, "reported"),
    "plan_d_ratio_vs_greedy": (">=", 1.0, "≥ 1.0"),
    "plan_d_ratio_vs_random": (">=", 1.0, "≥ 1.0"),
    "plan_d_ratio_vs_regular": (">=", 1.0, "≥ 1.0"),
    "plan_bo_gain": ("report", None, "reported"),
    "plan_seconds": ("<=", 60.0, "≤ 60"),
    "plan_scaling_exponent_candidates": ("<=", 1.2, "report; ≤ 1.2"),
    "plan_scaling_exponent_candidates_per_call": ("report", None, "reported"),
    "plan_regional_seconds": ("<=", 60.0, "≤ 60"),
    "plan_regional_peak_gb": ("<=", 4.0, "≤ 4"),
    "scaling_exponent_candidates": ("<=", 1.1, "≤ 1.1"),
    "plan_regional_d_efficiency_vs_bound": ("report", None, "reported"),
    "locate_seconds_10k": ("<=", 30.0, "≤ 30"),
    "locate_steps_per_s": ("report", None, "reported"),
    "locate_cpu_seconds_10k": ("report", None, "reported"),
    "locate_speedup_vs_plain": ("report", None, "reported"),
    "locate_plain_agreement": ("report", None, "reported"),
    "locate_coverage_1sigma": ("band", (0.66, 0.70), "≈ 0.683"),
    "locate_chi2_per_dof": ("band", (0.95, 1.05), "≈ 1"),
    "bem_seconds_4000": ("<=", 30.0, "≤ 30"),
    "bem_offsurface_max_rel_err": ("<=", 1e-3, "≤ 1e-3"),
    "bem_mast_axis_max_rel_err": ("<=", 0.02, "≤ 0.02"),
    "structure_overhead_ratio": ("<=", 2.0, "≤ 2"),
}


def verdict(key: str, value) -> str:
    """ "pass", "FAIL", "—" (reported only) or "n/a" (not measured) for one figure."""
    if not isinstance(value, int | float) or isinstance(value, bool):
        return "n/a"
    if math.isnan(value):
        return "n/a"
    kind, threshold, _ = TARGETS.get(key, ("report", None, ""))
    if kind == ">=":
        return "pass" if value >= threshold else "FAIL"
    if kind == "<=":
        return "pass" if value <= threshold else "FAIL"
    if kind == "band":
        lo, hi = threshold
        return "pass" if lo <= value <= hi else "FAIL"
    return "—"


def _fmt(value) -> str:
    if isinstance(value, bool) or not isinstance(value, int | float):
        return str(value)
    if math.isnan(value):
        return "not available"
    if value != 0 and (abs(value) >= 1e5 or abs(value) < 1e-3):
        return f"{value:.3g}"
    if abs(value) >= 100:
        return f"{value:,.0f}"
    return f"{value:.4g}"


def print_table(figures: dict, title: str, notes: dict | None = None) -> None:
    """Print figures as a rich table: figure, value, target, pass/fail (and a note)."""
    from rich.console import Console
    from rich.table import Table

    notes = notes or {}
    table = Table(title=title, title_justify="left")
    table.add_column("figure")
    table.add_column("value", justify="right")
    table.add_column("target", justify="right")
    table.add_column("result", justify="center")
    table.add_column("note", overflow="fold")
    styles = {"pass": "green", "FAIL": "bold red", "n/a": "yellow"}
    for key, value in figures.items():
        if key.startswith("run_"):
            continue
        v = verdict(key, value)
        target = TARGETS.get(key, ("report", None, "reported"))[2]
        table.add_row(
            key,
            _fmt(value),
            target,
            f"[{styles.get(v, '')}]{v}[/]" if v in styles else v,
            notes.get(key, ""),
        )
    # Wide enough for the notes when the output goes to a file or a pipe.
    Console(width=None if sys.stdout.isatty() else 150).print(table)


def run_meta(quick: bool) -> dict:
    """Provenance of a run: UTC time, mode, commit, CPU count and load (figures are noisy)."""
    try:
        commit = subprocess.run(
            # "-dirty" when the measured code had uncommitted changes
            ["git", "describe", "--always", "--dirty"],
            cwd=HERE,
            capture_output=True,
            text=True,
            check=False,
        ).stdout.strip()
    except OSError:
        commit = ""
    try:
        load = os.getloadavg()[0]
    except OSError:
        load = float("nan")
    return {
        "run_utc": dt.datetime.now(dt.UTC).strftime("%Y-%m-%dT%H:%M:%SZ"),
        "run_mode": "quick" if quick else "full",
        "run_commit": commit,
        "run_cpus": os.cpu_count(),
        "run_load_1min": round(load, 2),
    }


def write_json(figures: dict, path: Path) -> None:
    """Write a flat JSON object (NaN written as null), creating the folder."""
    path.parent.mkdir(parents=True, exist_ok=True)
    clean = {
        k: (None if isinstance(v, float) and not math.isfinite(v) else v)
        for k, v in figures.items()
    }
    tmp = path.with_suffix(path.suffix + ".tmp")
    tmp.write_text(json.dumps(clean, indent=2) + "\n")
    tmp.replace(path)


def standalone(name: str, runner: Callable[[bool], dict], argv: list[str] | None = None) -> dict:
    """Command line of one benchmark script: run, print its table, write results/<name>.json."""
    parser = argparse.ArgumentParser(description=f"probeplan {name} benchmark")
    parser.add_argument("--quick", action="store_true", help="fewer repeats")
    parser.add_argument("--json", type=Path, default=RESULTS / f"{name}.json")
    args = parser.parse_args(argv)
    t0 = time.perf_counter()
    figures = runner(args.quick)
    notes = figures.pop("_notes", {})
    figures = {**run_meta(args.quick), **figures}
    print_table(figures, f"probeplan {name} benchmark ({time.perf_counter() - t0:.0f} s)", notes)
    write_json(figures, args.json)
    print(f"wrote {args.json}")
    return figures


# --------------------------------------------------------------------------------------------
# Timing (the machines are shared: time alternately, keep the best of the repeats)
# --------------------------------------------------------------------------------------------


def elapsed(fn: Callable[[], object]) -> float:
    """Seconds to produce ``fn()``'s result; freeing the result is not counted (it happens
    after the clock stops, and for a large array that returns its pages to the system)."""
    t0 = time.perf_counter()
    result = fn()
    seconds = time.perf_counter() - t0
    del result
    return seconds


def interleaved(fns: dict, repeats: int) -> dict:
    """Time every function once per repeat, in turn, so that all see the same machine load.

    Parameters
    ----------
    fns : dict
        Key → function of no argument.
    repeats : int

    Returns
    -------
    dict
        Key → list of ``repeats`` times in seconds.
    """
    times: dict = {key: [] for key in fns}
    for _ in range(repeats):
        for key, fn in fns.items():
            times[key].append(elapsed(fn))
    return times


def loglog_slope(sizes, seconds) -> float:
    """Least-squares slope of log(seconds) against log(sizes): the scaling exponent."""
    return float(np.polyfit(np.log(sizes), np.log(seconds), 1)[0])


def site_problem(name: str, *, scenarios: int | None = None, expect: tuple | None = None):
    """The planning problem of a benchmark site in ``sites/``.

    Parameters
    ----------
    name : str
        The site file, e.g. ``"plan10.toml"``.
    scenarios : int or None
        Replaces the site's ``[design] scenarios``.
    expect : (n_params, n_scenarios, count) or None
        What the site must give, so that the figures measure what their notes say.
    """
    import dataclasses

    from probeplan.config import load_config
    from probeplan.problem import build_problem

    config = load_config(SITES / name)
    if scenarios is not None:
        design = dataclasses.replace(config.design, scenarios=scenarios)
        config = dataclasses.replace(config, design=design)
    problem = build_problem(config)
    got = (problem.n_params, problem.n_scenarios, problem.count)
    if expect is not None and got != tuple(expect):
        raise RuntimeError(
            f"{name} must give {expect[0]} parameters, {expect[1]} scenarios and {expect[2]} "
            f"probes; got {got[0]}, {got[1]}, {got[2]}."
        )
    return problem
