"""Fit the charge from recorded readings, moment by moment, and check the meters and the network.

Once the meters are mounted the same model that planned them reads their record. For each time
step of a :class:`~probeplan.readings.Readings` table :func:`locate`

1. keeps the readings the step has, leaving out those at or beyond the meter's range (a
   saturated reading carries no information, as in the planner) and unused axes;
2. fits the estimated parameters by weighted nonlinear least squares on the stored noise model
   (:class:`~probeplan.fit.ReadingFit`: additive and proportional noise of each meter's grade,
   σ of the model reading, reweighted), starting from the previous step's estimate moved by
   one Gauss–Newton step on the new readings; when that start gives no acceptable fit (below),
   from the best few of a pool of points drawn from the scenario prior (the config's ranges,
   seeded), screened by their misfit in one batched pass. Tolerances stop a fit within about
   a hundredth of a sigma of the fully converged one;
3. judges the fit by χ² = Σ ((m_obs − h(θ̂))/σ)² with dof = readings − parameters, and by the
   largest studentised residual r/sqrt(1 − h) (h the reading's leverage, so that a bad reading
   cannot hide by pulling the fit towards itself): a fit is acceptable when χ² is below the
   1 − ``alpha`` quantile of χ²_dof and no studentised residual exceeds ``threshold``;
4. when it is not, runs the meter-health pass: a robust refit (soft-L1 loss on the whitened
   residuals, which lets a few gross errors pull far less than squares do) from which the
   readings beyond ``threshold`` sigmas are flagged, then a plain refit without them. At most
   half the redundancy (readings − parameters) may be flagged in one step: a fit that needs more
   is in the wrong basin, not surrounded by broken meters;
5. reports the 1-sigma uncertainty from the inverse Fisher information at the estimate, over
   the readings that entered the fit (Kay, Fundamentals of Statistical Signal Processing,
   vol. 1, §7.5: at high signal-to-noise the least-squares estimate is efficient).

Steps are fitted in chains of :data:`CHUNK_STEPS`, each starting from the prior pool, so that
chains can run side by side on worker processes with the same result as in one.

A meter flagged in more than ``suspect_fraction`` of the steps in which it gave a reading is
*suspect*: stuck, drifting, miscalibrated or mis-mounted.

With known truths (:class:`~probeplan.readings.Truth`, a calibration or a simulation) the
delivery check compares each estimate's error with the plan's Cramér–Rao bound at the true
parameters (all the planned meters, saturated readings out): if the network delivers, the
normalised errors e/σ_CRB have unit variance, so N·ratio² with ratio = sqrt(mean (e/σ_CRB)²)
is χ²_N (independent noise from step to step), and the ratio must not exceed that
distribution's upper two-sided band (level ``alpha`` shared among the compared parameters).
At low signal-to-noise the fit is nonlinear over the noise and misses its bound: the verdict
is then honestly "does not deliver".

The estimate is not a warning system and does not decide when to stop work outdoors.

Shapes: ``n_times`` steps, ``n_probes`` meters (installed first), ``n_axes`` readings per meter,
``n_params`` estimated parameters.
"""

from __future__ import annotations

import os
from collections.abc import Callable
from concurrent.futures import Executor, ProcessPoolExecutor, as_completed
from dataclasses import dataclass, replace
from typing import NamedTuple

import numpy as np
from scipy import stats

from .errors import InputError, helper_context, helper_process_init
from .fisher import covariance, fisher_from_rows
from .fit import ReadingFit, fit_bounds, inside
from .probes import Meters, readings, whitened_rows
from .problem import draw_scenarios

#: Studentised / standardised residual (sigmas) beyond which a reading is flagged.
THRESHOLD = 4.0

#: Test level of the χ² acceptance of a fit (restart or robust pass below it).
ALPHA = 1e-3

#: Prior points screened for cold starts, and how many of the best are fitted.
POOL = 64
STARTS = 4

#: A meter flagged in more than this fraction of its steps is suspect.
SUSPECT_FRACTION = 0.5

#: Steps fitted as one chain: the first from the prior pool, each next from the previous
#: estimate. Chains are the unit of parallel work; the result does not depend on how many
#: processes share them.
CHUNK_STEPS = 1000

#: Test level of the delivery check's sampling band.
DELIVERY_ALPHA = 0.01

#: The reweighting stops when no reading's noise changes by more than this fraction.
_SETTLE = 0.02

#: Readings of largest residual tried in each round of the health pass.
_SUSPECTS = 3

#: ``least_squares``' ftol and xtol: a relative change of χ² of 1e-6 is a move of about a
#: thousandth of a sigma, far inside the noise.
_TOL = 1e-6

#: ``least_squares``' gtol: the gradient of χ² scaled by 1-sigma steps; a fit whose remaining
#: step is about a thousandth of a sigma stops there (often at the Gauss–Newton prediction).
_GTOL = 1e-3

#: Time steps whose delivery bounds are computed together (memory of one batch ~ a few MB).
_BATCH = 2048


@dataclass(frozen=True, eq=False)
class Delivery:
    """Achieved scatter beside the plan's Cramér–Rao bounds, where the truth is known.

    Attributes
    ----------
    names : tuple of n_compared str
        The parameters the truth gives.
    steps : (n_compared,) int
        Converged steps with a known value of each parameter.
    rms_error : (n_compared,) float
        sqrt(mean((estimate − truth)²)), SI units.
    bound_rms : (n_compared,) float
        sqrt(mean(σ_CRB²)) of the planned network at the true parameters, same steps.
    ratio : (n_compared,) float
        sqrt(mean((error/σ_CRB)²)): 1 when the network delivers its bound.
    ratio_low, ratio_high : (n_compared,) float
        The sampling band of ``ratio`` for this many steps: two-sided, level
        ``alpha / n_compared`` per parameter, so that the verdict on the network as a whole
        errs with probability at most ``alpha`` when it delivers.
    delivers : (n_compared,) bool
        ``ratio <= ratio_high``.
    alpha : float
    """

    names: tuple[str, ...]
    steps: np.ndarray
    rms_error: np.ndarray
    bound_rms: np.ndarray
    ratio: np.ndarray
    ratio_low: np.ndarray
    ratio_high: np.ndarray
    delivers: np.ndarray
    alpha: float

    @property
    def all_deliver(self) -> bool:
        """Every compared parameter within its band."""
        return bool(np.all(self.delivers))


@dataclass(frozen=True, eq=False)
class Location:
    """The fitted parameters of every time step, their uncertainty and the meters' health.

    Attributes
    ----------
    time_s : (n_times,) float
        s (seconds since 1970-01-01T00:00:00Z when ``time_is_utc``).
    time_is_utc : bool
    names : tuple of n_params str
        Estimated parameter names (``s0.charge_c``, ``s0.x_m``, …).
    estimate : (n_times, n_params) float
        SI units. A step that could not be fitted keeps its starting point (the previous
        estimate, or the nominal config) and is marked in ``converged``.
    std : (n_times, n_params) float
        1-sigma from the inverse Fisher information at the estimate (+inf where the readings
        of the step cannot resolve the parameter or the fit failed).
    chi2 : (n_times,) float
        Σ of squared standardised residuals of the readings in the fit (0 where none).
    dof : (n_times,) int
        Readings in the fit minus parameters (0 where the step has too few).
    converged : (n_times,) bool
    outliers : (n_times, n_probes) bool
        Meters with a reading flagged by the health pass in the step.
    saturated : (n_times, n_probes) bool
        Meters with a reading at or beyond their range in the step (left out).
    reported : (n_times, n_probes) bool
        Meters with at least one usable reading in the step.
    meter_names : tuple of n_probes str
    flag_counts : (n_probes,) int
        Steps in which each meter was flagged.
    suspect : (n_probes,) bool
        Flagged in more than ``suspect_fraction`` of the steps it reported.
    threshold, alpha, suspect_fraction : float
        The settings used.
    delivery : Delivery or None
        With a truth table.
    """

    time_s: np.ndarray
    time_is_utc: bool
    names: tuple[str, ...]
    estimate: np.ndarray
    std: np.ndarray
    chi2: np.ndarray
    dof: np.ndarray
    converged: np.ndarray
    outliers: np.ndarray
    saturated: np.ndarray
    reported: np.ndarray
    meter_names: tuple[str, ...]
    flag_counts: np.ndarray
    suspect: np.ndarray
    threshold: float
    alpha: float
    suspect_fraction: float
    delivery: Delivery | None = None

    @property
    def n_times(self) -> int:
        return self.time_s.shape[0]


def locate(
    problem,
    meters: Meters,
    readings_table,
    *,
    truth=None,
    warm: bool = True,
    starts: int = STARTS,
    pool: int = POOL,
    threshold: float = THRESHOLD,
    alpha: float = ALPHA,
    suspect_fraction: float = SUSPECT_FRACTION,
    seed: int | None = None,
    workers: int = 1,
    executor: Executor | None = None,
    progress: Callable[[int, int], None] | None = None,
) -> Location:
    """Fit every time step of a readings table (see the module docstring).

    Parameters
    ----------
    problem : probeplan.problem.Problem
        The model: scene, estimated parameters, nominal values of the known ones, the
        config's prior ranges.
    meters : Meters
        The meters that recorded the readings, installed first (``problem.meters(...)``).
    readings_table : probeplan.readings.Readings
        Values ``(n_times, n_probes, n_axes)`` matching ``meters``.
    truth : probeplan.readings.Truth or None
        Known parameters for the delivery check.
    warm : bool
        Start each step from the previous estimate (False: every step from the prior pool, the
        plain baseline).
    starts, pool : int
        Prior points fitted from, out of ``pool`` screened (>= 1 each).
    threshold : float
        Sigmas beyond which a reading is flagged (> 0).
    alpha : float
        Test level of the χ² acceptance (0 < alpha < 1).
    suspect_fraction : float
        Share of its steps a meter must be flagged in to be suspect (0 to 1).
    seed : int or None
        Seeds the prior pool (default: the config's seed).
    workers : int
        Processes that fit chunks of :data:`CHUNK_STEPS` steps side by side (1: here).
    executor : concurrent.futures.Executor or None
        Runs the chunks instead (e.g. a dask client); ``workers`` is then ignored.
    progress : callable(done, total) or None
        Called with the steps done: every half per cent of them in this process, after each
        chain on workers.

    Returns
    -------
    Location

    Raises
    ------
    InputError
        A truth table whose times match no step, or whose times are of another kind.
    """
    _check_settings(starts, pool, threshold, alpha, suspect_fraction, workers)
    vals = readings_table.values_v_per_m
    if vals.shape[1:] != meters.axes.shape[:2]:
        raise ValueError(
            f"the readings hold {vals.shape[1:]} (meters, axes) per step; the meters read "
            f"{meters.axes.shape[:2]}."
        )
    if vals.shape[0] == 0:
        raise ValueError("the readings hold no time step; give at least one.")
    seed = problem.config.seed if seed is None else seed
    settings = (bool(warm), int(starts), int(pool), float(threshold), float(alpha), int(seed))
    sat = readings_table.present & meters.used & (np.abs(vals) >= meters.range_v_per_m)
    usable = readings_table.present & meters.used & ~sat
    n_t = vals.shape[0]
    bounds = [(a, min(a + CHUNK_STEPS, n_t)) for a in range(0, n_t, CHUNK_STEPS)]
    tasks = [(problem, meters, vals[a:b], usable[a:b], settings) for a, b in bounds]
    parts = _run_chunks(tasks, workers, executor, progress, [b - a for a, b in bounds])
    est, std, chi2, dof, ok, flagged = (np.concatenate(x) for x in zip(*parts, strict=True))
    outliers = flagged.any(axis=-1)
    reported = usable.any(axis=-1)
    counts = outliers.sum(axis=0)
    n_rep = reported.sum(axis=0)
    location = Location(
        time_s=np.asarray(readings_table.time_s, dtype=float),
        time_is_utc=bool(readings_table.time_is_utc),
        names=tuple(problem.names),
        estimate=est,
        std=std,
        chi2=chi2,
        dof=dof,
        converged=ok,
        outliers=outliers,
        saturated=sat.any(axis=-1),
        reported=reported,
        meter_names=tuple(readings_table.meter_names),
        flag_counts=counts,
        suspect=(n_rep > 0) & (counts > suspect_fraction * n_rep),
        threshold=float(threshold),
        alpha=float(alpha),
        suspect_fraction=float(suspect_fraction),
    )
    if truth is None:
        return location
    return replace(location, delivery=check_delivery(problem, meters, location, truth))


def check_delivery(
    problem, meters: Meters, location: Location, truth, *, alpha: float = DELIVERY_ALPHA
) -> Delivery:
    """Compare the achieved errors with the plan's Cramér–Rao bounds at the true parameters.

    Parameters
    ----------
    problem : probeplan.problem.Problem
    meters : Meters
        The planned network (every meter, whatever the readings missed).
    location : Location
    truth : probeplan.readings.Truth
        Rows are matched to steps by time (within 1 µs).
    alpha : float
        Test level of the sampling band.

    Returns
    -------
    Delivery
    """
    if bool(truth.time_is_utc) != location.time_is_utc:
        kinds = {True: "ISO 8601 times (`time`)", False: "seconds (`time_s`)"}
        raise InputError(
            f"{truth.path}: the truth gives {kinds[bool(truth.time_is_utc)]} and the readings "
            f"{kinds[location.time_is_utc]}; use the same time column in both."
        )
    t = location.time_s
    idx = np.clip(np.searchsorted(t, truth.time_s), 0, t.size - 1)
    near = np.where(
        (idx > 0) & (np.abs(t[idx - 1] - truth.time_s) < np.abs(t[idx] - truth.time_s)),
        idx - 1,
        idx,
    )
    match = np.abs(t[near] - truth.time_s) <= 1e-6
    if not match.any():
        raise InputError(
            f"{truth.path}: no time of the truth matches a time of the readings (within 1 µs); "
            "give the truth at the readings' times."
        )
    steps = near[match]
    tv, tp = truth.values[match], truth.present[match] & location.converged[steps][:, None]
    known = np.where(tp, tv, location.estimate[steps])
    bound = _planned_bounds(problem, meters, known)
    err = location.estimate[steps] - tv
    use = tp & np.isfinite(bound) & (bound > 0)
    cols = np.flatnonzero(use.any(axis=0))
    if cols.size == 0:
        raise InputError(
            f"{truth.path}: no converged step has a known parameter the plan can bound; "
            "nothing to compare."
        )
    use = use[:, cols]
    n = use.sum(axis=0)
    safe = np.where(use, bound[:, cols], 1.0)
    ratio = np.sqrt(np.where(use, (err[:, cols] / safe) ** 2, 0.0).sum(axis=0) / n)
    rms = np.sqrt(np.where(use, err[:, cols] ** 2, 0.0).sum(axis=0) / n)
    brms = np.sqrt(np.where(use, safe**2, 0.0).sum(axis=0) / n)
    # Each parameter at alpha / n_compared (Bonferroni): the verdict on the whole network is
    # wrong at most with probability alpha.
    each = alpha / cols.size
    lo = np.sqrt(stats.chi2.ppf(each / 2, n) / n)
    hi = np.sqrt(stats.chi2.ppf(1 - each / 2, n) / n)
    return Delivery(
        names=tuple(location.names[c] for c in cols),
        steps=n,
        rms_error=rms,
        bound_rms=brms,
        ratio=ratio,
        ratio_low=lo,
        ratio_high=hi,
        delivers=ratio <= hi,
        alpha=float(alpha),
    )


# --------------------------------------------------------------------------------------------
# Private helpers
# --------------------------------------------------------------------------------------------


def _check_settings(starts, pool, threshold, alpha, suspect_fraction, workers) -> None:
    for name, value in (("starts", starts), ("pool", pool), ("workers", workers)):
        if isinstance(value, bool) or not isinstance(value, int | np.integer) or value < 1:
            raise ValueError(f"`{name}` must be a whole number >= 1; got {value!r}.")
    if not (np.isfinite(threshold) and threshold > 0):
        raise ValueError(f"`threshold` must be a finite number of sigmas > 0; got {threshold}.")
    if not 0 < alpha < 1:
        raise ValueError(f"`alpha` must lie strictly between 0 and 1; got {alpha}.")
    if not 0 <= suspect_fraction <= 1:
        raise ValueError(f"`suspect_fraction` must lie in [0, 1]; got {suspect_fraction}.")


def fit_chunk(
    problem, meters: Meters, values, usable, settings, on_step=None
) -> tuple[np.ndarray, ...]:
    """Fit consecutive steps, the first from the prior pool and each next from the previous
    estimate (the unit of work of :func:`locate`, run in a worker process when parallel).

    Parameters
    ----------
    problem, meters
        As :func:`locate` takes them.
    values : (n, n_probes, n_axes) float
    usable : (n, n_probes, n_axes) bool
    settings : tuple
        (warm, starts, pool, threshold, alpha, seed).
    on_step : callable(k) or None
        Called after step k (0-based) of the chain.

    Returns
    -------
    tuple
        estimate (n, n_params), std (n, n_params), chi2 (n,), dof (n,) int, converged (n,)
        bool, flagged (n, n_probes, n_axes) bool.
    """
    warm, starts, pool, threshold, alpha, seed = settings
    stepper = _Stepper(problem, meters, starts, pool, threshold, alpha, seed)
    n, p = values.shape[0], problem.n_params
    est = np.empty((n, p))
    std = np.full((n, p), np.inf)
    chi2 = np.zeros(n)
    dof = np.zeros(n, dtype=int)
    ok = np.zeros(n, dtype=bool)
    flagged = np.zeros(values.shape, dtype=bool)
    prev = None
    for t in range(n):
        s = stepper.step(values[t], usable[t], prev)
        est[t], std[t], chi2[t], dof[t], ok[t], flagged[t] = s
        if s.ok and warm:
            prev = s.x
        if on_step is not None:
            on_step(t)
    return est, std, chi2, dof, ok, flagged


def _run_chunks(tasks, workers: int, executor, progress, sizes) -> list:
    """:func:`fit_chunk` of every task, in order: here, or on ``executor``, or on a pool of
    ``workers`` processes."""
    total = sum(sizes)
    done = 0
    if executor is None and (workers <= 1 or len(tasks) <= 1):
        every = max(1, total // 200)
        out = []
        for task, size in zip(tasks, sizes, strict=True):

            def tick(k: int, before: int = done, size: int = size) -> None:
                if progress is not None and ((before + k + 1) % every == 0 or k + 1 == size):
                    progress(before + k + 1, total)

            out.append(fit_chunk(*task, on_step=tick))
            done += size
        return out
    own = executor is None
    if own:
        executor = ProcessPoolExecutor(
            max_workers=min(workers, len(tasks)),
            mp_context=helper_context(),
            initializer=helper_process_init,
            initargs=(os.getpid(),),
        )
    try:
        futures = [executor.submit(fit_chunk, *task) for task in tasks]
        size_of = dict(zip(futures, sizes, strict=True))
        for fut in as_completed(futures):
            done += size_of[fut]
            if progress is not None:
                progress(done, total)
        return [f.result() for f in futures]
    finally:
        if own:
            executor.shutdown(wait=True, cancel_futures=True)


def _planned_bounds(problem, meters: Meters, known: np.ndarray) -> np.ndarray:
    """1-sigma Cramér–Rao bounds of all meters at parameters ``(n, n_params)``, ``(n, n_params)``;
    saturated readings out, as the planner scores them."""
    theta = np.tile(problem.theta[0], (known.shape[0], 1))
    theta[:, problem.est_cols] = known
    out = np.empty(known.shape)
    for start in range(0, known.shape[0], _BATCH):  # batches of steps: bounded memory
        sl = slice(start, start + _BATCH)
        e, jac = problem.scene.evaluate(theta[sl], meters.positions_m, columns=problem.est_cols)
        rows, _ = whitened_rows(e, jac, meters.axes, meters.gain, meters)
        cov, _ = covariance(fisher_from_rows(rows.reshape(rows.shape[0], -1, rows.shape[-1])))
        out[sl] = np.sqrt(np.diagonal(cov, axis1=-2, axis2=-1))
    return out


def _covariance(rows: np.ndarray) -> tuple[np.ndarray, bool]:
    """J⁻¹ of whitened rows ``(n_used, n_params)`` and whether J is singular (the planner's
    test); batched as :func:`~probeplan.fisher.covariance` expects its input."""
    cov, singular = covariance((rows.T @ rows)[None])
    return cov[0], bool(singular[0])


class _Step(NamedTuple):
    """One step's outcome, in the order :func:`fit_chunk` stores it."""

    x: np.ndarray
    std: np.ndarray
    chi2: float
    dof: int
    ok: bool
    flagged: np.ndarray  # (n_probes, n_axes) bool


@dataclass(frozen=True)
class _Try:
    x: np.ndarray
    ok: bool
    keep: np.ndarray  # readings in the fit
    chi2: float
    worst: float  # largest |studentised residual| among them
    flagged: np.ndarray
    std: np.ndarray  # 1-sigma from the Fisher information at x, +inf where singular
    student: np.ndarray  # (n_probes, n_axes) studentised residuals of the kept readings, else 0


class _Stepper:
    """Fits one time step at a time; holds what every step shares."""

    def __init__(self, problem, meters: Meters, starts, pool, threshold, alpha, seed) -> None:
        nominal = problem.theta[0]
        self.fit = ReadingFit.of_problem(problem, nominal, meters)
        lo, hi = fit_bounds(problem, nominal[None])
        self.lo, self.hi = lo[0], hi[0]
        self.p = problem.n_params
        self.threshold = float(threshold)
        self.starts = int(starts)
        n_read = int(meters.used.sum())
        # With no redundancy (dof 0) the fit should pass through every reading; a nonlinear
        # model may not quite, so it is judged as with one degree of freedom.
        self.limit = stats.chi2.isf(alpha, np.maximum(np.arange(n_read + 1), 1))
        # The prior pool: its model readings and noise once, for every cold start's screening.
        cfg = problem.config
        cfg = replace(cfg, design=replace(cfg.design, scenarios=int(pool)))
        theta = draw_scenarios(cfg, problem.scene, np.random.default_rng(seed))
        pts = inside(theta[:, problem.est_cols], self.lo, self.hi)
        self.pool = np.unique(pts, axis=0)
        full = np.tile(nominal, (self.pool.shape[0], 1))
        full[:, problem.est_cols] = self.pool
        e, _ = problem.scene.evaluate(full, meters.positions_m, jacobian=False)
        self.pool_m = readings(e, meters.axes, meters.gain)
        self.pool_sigma = meters.sigma(self.pool_m)
        self._last_cov = None

    def step(self, obs: np.ndarray, keep: np.ndarray, prev: np.ndarray | None) -> _Step:
        n = int(keep.sum())
        x0 = self.pool[0] if prev is None else prev
        if n < self.p:  # fewer readings than unknowns
            return _Step(x0, np.full(self.p, np.inf), 0.0, 0, False, np.zeros_like(keep))
        best = None
        if prev is not None:
            best = self._plain(prev, obs, keep, predict=True)
            if best.ok and not self._acceptable(best):
                best = self._better(best, self._robust(best.x, obs, keep))
        if best is None or not self._acceptable(best):
            cold = None
            for start in self._cold_starts(obs, keep):
                cold = self._better(cold, self._plain(start, obs, keep))
            if cold.ok and not self._acceptable(cold):
                cold = self._better(cold, self._robust(cold.x, obs, keep))
            best = self._better(best, cold)
        if not best.ok:
            return _Step(x0, np.full(self.p, np.inf), 0.0, 0, False, np.zeros_like(keep))
        dof = int(best.keep.sum()) - self.p
        return _Step(best.x, best.std, best.chi2, dof, True, best.flagged)

    # -- pieces ---------------------------------------------------------------------------------

    def _plain(self, x0, obs, keep, flagged=None, loss="linear", predict=False) -> _Try:
        """Least squares from ``x0`` on the kept readings, judged at its end.

        ``predict``: first move ``x0`` by one Gauss–Newton step on this step's readings (from
        the previous estimate, whose model is in hand, this lands next to the answer and the
        weights start where they end).
        """
        x0 = inside(np.asarray(x0, dtype=float), self.lo, self.hi)
        r, rows = self.fit.whitened(x0, obs, keep)
        cov, singular = self._covariance(x0, keep, rows)
        scale = np.sqrt(np.diagonal(cov))
        if singular or not np.all(np.isfinite(scale) & (scale > 0)):
            scale = "jac"
        elif predict:
            x0 = inside(x0 + cov @ (rows.T @ r[keep]), self.lo, self.hi)
        x, ok = self.fit.solve(
            x0,
            obs[keep],
            keep,
            scale,
            self.lo,
            self.hi,
            loss=loss,
            settle=_SETTLE,
            tol=_TOL,
            gtol=_GTOL,
            method="auto",
        )
        r, rows = self.fit.whitened(x, obs, keep)
        cov, singular = self._covariance(x, keep, rows)
        rk = r[keep]
        # Studentised residuals r/sqrt(1 − h), h the leverage of each reading (the diagonal of
        # the hat matrix R J⁻¹ Rᵀ): a fit pulls towards a reading by its leverage, so a bad
        # reading on a meter that alone pins a parameter hides its error in the fit. With the
        # noise known this is also the residual of a fit without the reading (Cook & Weisberg,
        # Residuals and Influence in Regression, 1982 — from memory). A reading with h = 1
        # cannot be checked by the others and counts 0.
        room = np.ones(rk.shape) if singular else 1.0 - np.einsum("ip,pq,iq->i", rows, cov, rows)
        student = np.where(room > 1e-9, rk / np.sqrt(np.maximum(room, 1e-9)), 0.0)
        std = np.full(self.p, np.inf) if singular else np.sqrt(np.diagonal(cov))
        flagged = np.zeros_like(keep) if flagged is None else flagged
        full = np.zeros(keep.shape)
        full[keep] = student
        worst = float(np.abs(student).max())
        return _Try(x, ok, keep, float(rk @ rk), worst, flagged, std, full)

    def _covariance(self, x, keep, rows) -> tuple[np.ndarray, bool]:
        """:func:`_covariance`, remembered for the last (x, keep): a step's final fit is the
        next step's start."""
        key = (np.asarray(x).tobytes(), keep.tobytes())
        if self._last_cov is None or self._last_cov[0] != key:
            self._last_cov = (key, _covariance(rows))
        return self._last_cov[1]

    def _robust(self, x0, obs, keep) -> _Try | None:
        """The health pass: a robust refit, then the readings beyond the threshold left out and
        the rest refitted. When that is not acceptable (or flags too many), one reading at a
        time instead, while one is still beyond the threshold.

        Each round leaves out the reading of largest studentised residual (at the robust fit
        first, then at each refit); when the refit is still not acceptable, the next largest
        instead, up to :data:`_SUSPECTS`, keeping the refit that fits best: with little
        redundancy a bad reading also pushes up the residuals of good ones, so the largest is
        not always the culprit. (Not the best fit of all: leaving out a neighbour can make a
        bad reading the only one that pins a parameter, and so unverifiable.) At most half the
        redundancy is flagged (at least one reading): a fit that needs more is in the wrong
        basin, not surrounded by broken meters. None when nothing is flagged.
        """
        rob = self._plain(x0, obs, keep, loss="soft_l1")
        if not rob.ok:
            return None
        r, _ = self.fit.whitened(rob.x, obs, keep)
        budget = max(1, (int(keep.sum()) - self.p) // 2)
        beyond = keep & (np.abs(r) > self.threshold)
        best = None
        if 0 < beyond.sum() <= budget:  # every reading beyond the threshold at once
            best = self._plain(rob.x, obs, keep & ~beyond, beyond)
            if self._acceptable(best):
                return best
        score = np.where(keep, np.abs(rob.student), 0.0)
        flagged = np.zeros_like(keep)
        x = rob.x
        for _ in range(budget):
            order = np.argsort(-score, axis=None, kind="stable")[:_SUSPECTS]
            order = [k for k in order if score.flat[k] > self.threshold]
            if not order:
                break
            round_best = None
            for k in order:  # the largest residual first; the next only if its refit fails
                trial = flagged.copy()
                trial.flat[k] = True
                round_best = self._better(round_best, self._plain(x, obs, keep & ~trial, trial))
                if self._acceptable(round_best):
                    break
            best = self._better(best, round_best)
            if not round_best.ok or self._acceptable(round_best):
                break
            flagged = round_best.flagged
            x, score = round_best.x, np.where(keep & ~flagged, np.abs(round_best.student), 0.0)
        return best

    def _acceptable(self, t: _Try) -> bool:
        dof = int(t.keep.sum()) - self.p
        return t.ok and t.chi2 <= self.limit[dof] and t.worst <= self.threshold

    def _better(self, a: _Try | None, b: _Try | None) -> _Try | None:
        """The fit to keep: a converged one, then the smaller χ² relative to its acceptance."""
        if a is None or not a.ok:
            return b if b is not None else a
        if b is None or not b.ok:
            return a
        ka, kb = self._acceptable(a), self._acceptable(b)
        if ka != kb:
            return a if ka else b
        ra = a.chi2 / self.limit[int(a.keep.sum()) - self.p]
        rb = b.chi2 / self.limit[int(b.keep.sum()) - self.p]
        return a if ra <= rb else b

    def _cold_starts(self, obs, keep) -> np.ndarray:
        """The ``starts`` pool points of least misfit to this step's readings, ``(k, n_params)``."""
        z = np.where(keep, (obs - self.pool_m) / self.pool_sigma, 0.0)
        cost = (z * z).sum(axis=(1, 2))
        return self.pool[np.argsort(cost, kind="stable")[: self.starts]]
