"""probeplan benchmarks: one entry point, one table, one flat JSON file.

    python benchmarks/run.py [--quick] [--json FILE]

Runs the forward-model, scoring, planning, structures and regional benchmarks (``forward.py``,
``score.py``, ``plan.py``, ``structures.py``, ``regional.py`` beside this file), prints one
table (figure, value, target, pass/fail) and writes the figures as one flat JSON object to
FILE (default ``benchmarks/results/latest.json``), plus a dated copy
``benchmarks/results/<UTC date-time>.json`` so that the trend can be followed.

The machines these run on are shared and noisy, so the speed figures that matter are ratios
measured side by side in the same run (probeplan against a plain numpy reference), and
throughputs are the best of several repeats. ``--quick`` measures the same quantities on the
same benchmark sites with fewer repeats (under 5 minutes on a 2-core machine).

The targets, the table, the JSON writer and the timing helpers are in ``_common.py``, shared
with the scripts (each runs standalone too, e.g. ``python benchmarks/score.py``).
"""

from __future__ import annotations

import argparse
import sys
import time
from pathlib import Path

import forward
import plan
import regional
import score
import structures
from _common import RESULTS, print_table, run_meta, write_json


def main(argv: list[str] | None = None) -> int:
    parser = argparse.ArgumentParser(description="probeplan benchmarks (see benchmarks/README.md)")
    parser.add_argument(
        "--quick", action="store_true", help="fewer repeats, no regional case; under 5 minutes"
    )
    parser.add_argument("--json", type=Path, default=RESULTS / "latest.json")
    args = parser.parse_args(argv)

    t0 = time.perf_counter()
    figures = run_meta(args.quick)
    notes: dict = {}
    timing: dict = {}
    failed: list[str] = []
    # (name, runner, its main figures, in --quick too); the regional case takes minutes even
    # scaled down, so the quick run leaves it to `python benchmarks/regional.py --quick`.
    benches = [
        ("forward", forward.run, ("forward_bandwidth_ratio",), True),
        ("score", score.run, ("score_layouts_per_s",), True),
        ("plan", plan.run, ("plan_d_efficiency_vs_bound", "plan_seconds"), True),
        ("structures", structures.run, ("bem_seconds_4000", "bem_offsurface_max_rel_err"), True),
        ("regional", regional.run, ("plan_regional_seconds", "plan_regional_peak_gb"), False),
    ]
    for name, runner, main_keys, in_quick in benches:
        if args.quick and not in_quick:
            notes[main_keys[0]] = f"not in --quick: python benchmarks/{name}.py --quick"
            continue
        t = time.perf_counter()
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
    sys.exit(main())
