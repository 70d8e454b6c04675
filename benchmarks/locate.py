"""Locate benchmark: time steps of recorded readings fitted per second, and how well.

    python benchmarks/locate.py [--quick] [--json FILE]

The site is ``sites/locate12.toml`` (fictional): 12 ground meters reading E_z, one storm charge
(charge, x, y, z estimated) over a grounded plane and the background's z component: 5
parameters. A storm drifts across the network for 10,000 steps of 10 s (the charge grows and
wanes through −15 … −35 C, the centre wanders over several km at 6–9 km); the readings are the
model's, with each meter's noise (20 V/m + 2 %), seeded.

Figures
-------
locate_seconds_10k
    Wall time of one ``locate`` call on all 10,000 steps × 12 meters with two worker processes
    (target ≤ 30 s on 2 cores), worker start-up included.
locate_steps_per_s
    10,000 / that time.
locate_cpu_seconds_10k
    CPU time of that call, this process and its workers together: on a busy shared machine
    the wall time says more about the neighbours than about the fit; on 2 idle cores the wall
    time is about half of this plus the workers' start-up.
locate_speedup_vs_plain
    Seconds per step of a plain per-step fit — one ``least_squares`` (trust-region reflective,
    bounded, the reweighting of ``simulate``) from the nominal config, no warm start — over
    those of ``locate``, both in this process, timed alternately on the same blocks of steps.
locate_plain_agreement
    Fraction of the plain fits that land within 0.1 sigma of ``locate``'s (the rest stopped in
    another minimum or failed: what the warm start and the prior pool buy besides speed).
locate_coverage_1sigma
    Fraction of estimates within their reported 1-sigma of the truth (0.683 if efficient).
locate_chi2_per_dof
    Mean χ² over mean dof (1 if the noise model holds).
"""

from __future__ import annotations

import resource
import time

import numpy as np
from _common import site_problem, standalone

from probeplan.fit import ReadingFit, fit_bounds, inside
from probeplan.locate import locate
from probeplan.probes import readings
from probeplan.readings import Readings

SITE = "locate12.toml"
N_STEPS = 10_000
WORKERS = 2


def _network(problem) -> np.ndarray:
    """12 ground meters: rings of 9 km (7) and 4 km (4) and one at the centre, ``(12, 3)``."""
    a = np.linspace(0.0, 2.0 * np.pi, 7, endpoint=False)
    b = np.linspace(0.0, 2.0 * np.pi, 4, endpoint=False) + 0.3
    return np.r_[
        np.c_[9000.0 * np.cos(a), 9000.0 * np.sin(a), np.zeros(7)],
        np.c_[4000.0 * np.cos(b), 4000.0 * np.sin(b), np.zeros(4)],
        [[0.0, 0.0, 0.0]],
    ]


def _storm(problem, n: int) -> tuple[np.ndarray, np.ndarray]:
    """Times (n,) s and true parameters (n, 5) of the drifting storm."""
    t = np.arange(n) * 10.0
    u = t / t[-1] if n > 1 else t
    truth = np.c_[
        -25.0 - 10.0 * np.sin(2 * np.pi * 3 * u),
        -6000.0 + 12000.0 * u,
        2500.0 * np.sin(2 * np.pi * u),
        7500.0 + 1500.0 * np.sin(2 * np.pi * 5 * u),
        np.full(n, -120.0),
    ]
    return t, truth


def _record(problem, meters, truth, rng) -> np.ndarray:
    theta = np.tile(problem.theta[0], (truth.shape[0], 1))
    theta[:, problem.est_cols] = truth
    e, _ = problem.scene.evaluate(theta, meters.positions_m, jacobian=False)
    clean = readings(e, meters.axes, meters.gain)
    return clean + meters.sigma(clean) * rng.standard_normal(clean.shape)


def _plain(problem, meters, table) -> np.ndarray:
    """The baseline: one bounded trust-region fit per step from the nominal config."""
    nominal = problem.theta[0]
    fit = ReadingFit.of_problem(problem, nominal, meters)
    lo, hi = fit_bounds(problem, nominal[None])
    x0 = inside(nominal[problem.est_cols], lo[0], hi[0])
    keep = meters.used
    out = np.empty((table.n_times, problem.n_params))
    for t in range(table.n_times):
        out[t], ok = fit.solve(x0, table.values_v_per_m[t][keep], keep, "jac", lo[0], hi[0])
        if not ok:
            out[t] = np.nan
    return out


def _cpu_seconds() -> float:
    """CPU seconds of this process and of its finished children (the worker processes)."""
    me = resource.getrusage(resource.RUSAGE_SELF)
    kids = resource.getrusage(resource.RUSAGE_CHILDREN)
    return me.ru_utime + me.ru_stime + kids.ru_utime + kids.ru_stime


def _block(table: Readings, sl: slice) -> Readings:
    return Readings(
        table.path,
        table.time_s[sl],
        False,
        table.values_v_per_m[sl],
        table.present[sl],
        table.meter_names,
        table.columns,
    )


def run(quick: bool = False) -> dict:
    """Measure the locate figures (see the module docstring).

    Parameters
    ----------
    quick : bool
        Fewer and shorter side-by-side blocks for the speed-up; the same 10,000-step fit.

    Returns
    -------
    dict
        Flat figures, plus ``_notes`` (figure → short text) for the table.
    """
    problem = site_problem(SITE, expect=(5, 64, 12))
    meters = problem.meters(_network(problem))
    t, truth = _storm(problem, N_STEPS)
    values = _record(problem, meters, truth, np.random.default_rng(5))
    names = tuple(f"m{k}" for k in range(12))
    table = Readings("<benchmark>", t, False, values, np.ones(values.shape, bool), names, ())

    locate(problem, meters, _block(table, slice(0, 20)))  # warm-up: imports, compiled kernels
    cpu0 = _cpu_seconds()
    t0 = time.perf_counter()
    loc = locate(problem, meters, table, workers=WORKERS)
    seconds = time.perf_counter() - t0
    cpu = _cpu_seconds() - cpu0

    rounds, size = (3, 100) if quick else (6, 200)
    ours, plain, agree = [], [], []
    starts = np.linspace(0, N_STEPS - size, rounds).astype(int)
    for s in starts:  # alternately, so that both see the same load
        block = _block(table, slice(s, s + size))
        t1 = time.perf_counter()
        mine = locate(problem, meters, block)
        ours.append((time.perf_counter() - t1) / size)
        t1 = time.perf_counter()
        base = _plain(problem, meters, block)
        plain.append((time.perf_counter() - t1) / size)
        with np.errstate(invalid="ignore"):
            agree.append(np.all(np.abs(base - mine.estimate) < 0.1 * mine.std, axis=1))
    speedup = float(np.median(plain) / np.median(ours))
    z = (loc.estimate - truth) / loc.std
    return {
        "locate_seconds_10k": round(seconds, 2),
        "locate_steps_per_s": round(N_STEPS / seconds, 1),
        "locate_cpu_seconds_10k": round(cpu, 2),
        "locate_speedup_vs_plain": round(speedup, 2),
        "locate_plain_agreement": round(float(np.mean(np.concatenate(agree))), 4),
        "locate_coverage_1sigma": round(float(np.mean(np.abs(z) < 1.0)), 4),
        "locate_chi2_per_dof": round(float(loc.chi2.mean() / loc.dof.mean()), 4),
        "_notes": {
            "locate_seconds_10k": (
                f"{N_STEPS:,} steps × 12 meters × 5 params, {WORKERS} worker processes; "
                f"{int(loc.converged.sum()):,} converged"
            ),
            "locate_speedup_vs_plain": (
                f"median of {rounds} alternating blocks of {size} steps: plain "
                f"{np.median(plain) * 1e3:.1f} ms/step, locate {np.median(ours) * 1e3:.1f} ms/step"
            ),
            "locate_plain_agreement": "plain fits within 0.1 sigma of locate's, same blocks",
            "locate_coverage_1sigma": "0.683 if the fit is efficient (Kay vol. 1 ch. 7)",
            "locate_chi2_per_dof": f"mean dof {loc.dof.mean():.1f}",
            "locate_cpu_seconds_10k": f"{cpu / N_STEPS * 1e3:.2f} ms of CPU per step",
        },
    }


if __name__ == "__main__":
    standalone("locate", run)
