"""probeplan benchmarks: one entry point, one table, one flat JSON file.

    python benchmarks/run.py [--quick] [--json FILE]

Runs the forward-model, scoring and planning benchmarks (``forward.py``, ``score.py``,
``plan.py`` beside this file), prints one table (figure, value, target, pass/fail) and writes
the figures as one flat JSON object to FILE (default ``benchmarks/results/latest.json``), plus a
dated copy ``benchmarks/results/<UTC date-time>.json`` so that the trend can be followed.

The machines these run on are shared and noisy, so the speed figures that matter are ratios
measured side by side in the same run (probeplan against a plain numpy reference), and
throughputs are the best of several repeats. ``--quick`` measures the same quantities on the
same benchmark sites with fewer repeats (under 5 minutes on a 2-core machine).

This module also holds the small helpers the benchmark scripts share: the targets, the table
and the JSON writer (each script runs standalone too, e.g. ``python benchmarks/score.py``).
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

HERE = Path(__file__).resolve().parent
RESULTS = HERE / "results"
SITES = HERE / "sites"

#: Target of each figure: (comparison, threshold, text). "report" figures have no pass/fail.
#: "band" passes when the value lies within [lo, hi].
TARGETS: dict[str, tuple] = {
    "forward_bandwidth_ratio": (">=", 0.25, "≥ 0.25"),
    "score_layouts_per_s": (">=", 5000.0, "≥ 5,000"),
    "score_reference_layouts_per_s": ("report", None, "reported"),
    "score_ratio_vs_reference": ("report", None, "reported"),
    "score_max_rel_diff_vs_reference": ("<=", 1e-9, "≤ 1e-9"),
    "scaling_exponent_scenarios": ("band", (0.8, 1.2), "≈ 1 (0.8–1.2)"),
    "plan_d_efficiency_vs_bound": (">=", 0.98, "≥ 0.98"),
    "plan_grid_efficiency_vs_bound": ("report", None, "reported"),
    "plan_d_ratio_vs_greedy": (">=", 1.0, "≥ 1.0"),
    "plan_d_ratio_vs_random": (">=", 1.0, "≥ 1.0"),
    "plan_d_ratio_vs_regular": (">=", 1.0, "≥ 1.0"),
    "plan_bo_gain": ("report", None, "reported"),
    "plan_seconds": ("<=", 60.0, "≤ 60"),
    "scaling_exponent_candidates": ("<=", 1.2, "report; ≤ 1.2"),
    "scaling_exponent_candidates_per_call": ("report", None, "reported"),
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


def _forward_runner() -> tuple[Callable[[bool], dict] | None, str]:
    """benchmarks/forward.py's ``run``, or None and the reason it is not available."""
    try:
        import forward  # benchmarks/forward.py, written beside this file
    except ModuleNotFoundError as exc:
        if exc.name != "forward":
            raise
        return None, "benchmarks/forward.py not available"
    runner = getattr(forward, "run", None)
    return runner, "" if runner else "benchmarks/forward.py has no run(quick)"


def main(argv: list[str] | None = None) -> int:
    parser = argparse.ArgumentParser(description="probeplan benchmarks (see benchmarks/README.md)")
    parser.add_argument("--quick", action="store_true", help="fewer repeats, under 5 minutes")
    parser.add_argument("--json", type=Path, default=RESULTS / "latest.json")
    args = parser.parse_args(argv)

    import plan
    import score

    t0 = time.perf_counter()
    figures = run_meta(args.quick)
    notes: dict = {}
    timing: dict = {}
    failed: list[str] = []
    fwd, why = _forward_runner()
    benches = [
        ("forward", fwd, ("forward_bandwidth_ratio",)),
        ("score", score.run, ("score_layouts_per_s",)),
        ("plan", plan.run, ("plan_d_efficiency_vs_bound", "plan_seconds")),
    ]
    for name, runner, main_keys in benches:
        t = time.perf_counter()
        if runner is None:
            for key in main_keys:
                figures[key] = float("nan")
                notes[key] = why
            continue
        print(f"running {name} benchmark …", file=sys.stderr, flush=True)
        try:
            got = runner(args.quick)
        except Exception as exc:  # one broken benchmark must not hide the others' figures
            for key in main_keys:
                figures[key] = float("nan")
                notes[key] = f"{name} benchmark failed: {type(exc).__name__}: {exc}"
            failed.append(name)
            continue
        notes.update(got.pop("_notes", {}))
        figures.update(got)
        timing[name] = time.perf_counter() - t
    figures["run_seconds"] = round(time.perf_counter() - t0, 1)
    spent = ", ".join(f"{k} {v:.0f} s" for k, v in timing.items())
    print_table(figures, f"probeplan benchmarks ({figures['run_mode']}; {spent})", notes)
    write_json(figures, args.json)
    stamp = figures["run_utc"].replace("-", "").replace(":", "")
    dated = RESULTS / f"{stamp}.json"
    write_json(figures, dated)
    print(f"wrote {args.json} and {dated}")
    return 1 if failed else 0


if __name__ == "__main__":
    sys.path.insert(0, str(HERE))
    sys.exit(main())
