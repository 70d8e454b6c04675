"""Simulated fits: the evidence that a planned layout delivers its Cramér–Rao bounds.

The Fisher information of a layout promises a precision: no unbiased estimator of the charge
parameters does better than the Cramér–Rao bound J⁻¹. This module checks the promise the way a
user would meet it in the field. For each simulated scenario it

1. computes the noise-free readings of every meter of the layout (installed ones first), and
   draws ``trials`` noisy copies in one array operation (additive and proportional Gaussian
   noise of each meter's own grade, readings clipped at the meter's range);
2. drops the readings that came back at the end of the range (saturated: they carry no
   information, and a user would discard them), and unused axes;
3. fits the estimated parameters to each trial's readings by nonlinear least squares
   (:class:`probeplan.fit.ReadingFit`: whitened residuals (m_obs − h(θ))/σ, the analytic
   Jacobian of the forward model, σ of the *model* reading reweighted until it settles);
4. reports the achieved RMS errors beside the bounds at the same scenario.

The fit starts from the truth plus a draw from the Cramér–Rao covariance: this models a user
with a reasonable first guess, about as good as the data themselves (a previous fit, a forecast,
the plant drawing). It does not test whether a fit from a poor first guess finds the global
minimum (:mod:`probeplan.locate` does, for recorded readings). Box bounds keep each source above
the grounded plane and sizes positive (:func:`probeplan.fit.fit_bounds`).

At high signal-to-noise the least-squares estimate is efficient: its covariance reaches J⁻¹
(Kay, Fundamentals of Statistical Signal Processing, vol. 1, §7.5: the maximum-likelihood
estimate is asymptotically unbiased, Gaussian and efficient; with Gaussian noise of known
covariance the weighted least-squares fit *is* the maximum-likelihood estimate). At low SNR the
model is nonlinear over the spread of the noise and the achieved error exceeds the bound.

Shapes: ``n_sim`` simulated scenarios, ``trials`` draws each, ``n_params`` estimated
parameters, ``n_probes`` meters (installed first), ``n_axes`` readings per meter.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from .fisher import covariance
from .fit import ReadingFit, fit_bounds, inside
from .probes import readings

#: Scenarios simulated by default: scenario 0 (nominal) and up to this many in all.
DEFAULT_SCENARIOS = 8

#: Least trials per scenario (an RMS from fewer means nothing).
MIN_TRIALS = 2


@dataclass(frozen=True, eq=False)
class Simulation:
    """Achieved errors of simulated fits beside the Cramér–Rao bounds.

    Attributes
    ----------
    trials : int
        Noisy draws per scenario.
    scenarios : (n_sim,) int
        Which rows of the scenario table were simulated.
    names : tuple of n_params str
        Estimated parameter names.
    truth : (n_sim, n_params) float
        The true parameters of each simulated scenario (SI units).
    fitted : (n_sim, trials, n_params) float
        Fitted parameters. A failed fit (solver gave up, too few unsaturated readings, singular
        information) keeps its starting point here and is marked in ``converged``.
    converged : (n_sim, trials) bool
        The solver reported success on a finite result.
    rms_error : (n_sim, n_params) float
        sqrt(mean((fitted − truth)²)) over converged trials; +inf where none converged.
    crb_std : (n_sim, n_params) float
        1-sigma Cramér–Rao bound at the same scenarios (+inf where the layout cannot resolve).
    has_location : bool
        Whether x and y of source 0 are estimated (else the location fields hold −1).
    location_rms_m : (n_sim,) float
        sqrt(mean(dx² + dy²)) of source 0 over converged trials, m.
    location_crb_m : (n_sim,) float
        sqrt(C_xx + C_yy) of source 0, m.
    has_charge : bool
        Whether the charge of source 0 is estimated (else the charge fields hold −1).
    charge_rms_rel : (n_sim,) float
        sqrt(mean(dq²))/|q| of source 0 (fraction).
    charge_crb_rel : (n_sim,) float
        sqrt(C_qq)/|q| of source 0 (fraction).
    saturated : (n_sim, n_probes) float
        Fraction of trials in which each meter returned at least one saturated reading.
    """

    trials: int
    scenarios: np.ndarray
    names: tuple[str, ...]
    truth: np.ndarray
    fitted: np.ndarray
    converged: np.ndarray
    rms_error: np.ndarray
    crb_std: np.ndarray
    has_location: bool
    location_rms_m: np.ndarray
    location_crb_m: np.ndarray
    has_charge: bool
    charge_rms_rel: np.ndarray
    charge_crb_rel: np.ndarray
    saturated: np.ndarray

    @property
    def n_converged(self) -> np.ndarray:
        """(n_sim,) int: converged trials per scenario."""
        return self.converged.sum(axis=1)


def default_scenarios(n_scenarios: int, count: int = DEFAULT_SCENARIOS) -> np.ndarray:
    """Scenario 0 and up to ``count − 1`` more, evenly spread over the table, ``(k,) int``."""
    k = min(int(n_scenarios), int(count))
    return np.unique(np.round(np.linspace(0, n_scenarios - 1, k)).astype(int))


def simulate(
    problem,
    positions_m,
    gain=None,
    *,
    axes=None,
    grades=None,
    trials: int = 200,
    scenarios=None,
    rng,
    progress=None,
) -> Simulation:
    """Fit noisy readings of a layout many times and compare the errors with the bounds.

    Parameters
    ----------
    problem : probeplan.problem.Problem
        Its installed probes are added in front of ``positions_m``.
    positions_m : (n_new, 3) float
        The new probes of the layout, m.
    gain : (n_new,) float or None
        Their calibration factors (default: ``problem.gain_at(positions_m)``).
    axes : (n_new, n_axes, 3) float or None
    grades : sequence of n_new str or None
        Each new meter's own axes and grade (see :meth:`Problem.meters`).
    trials : int
        Noisy draws (and fits) per scenario, >= 2.
    scenarios : sequence of int or None
        Rows of ``problem.theta`` to simulate (default: :func:`default_scenarios`).
    rng : numpy.random.Generator or int
        Source of every random draw (an int seeds a new generator).
    progress : callable(stage: str, done: int, total: int) or None
        Called with ``("simulate", fits done, fits in all)`` as the fits go (a fit takes tens
        of milliseconds, so a few hundred take long enough to want a progress bar);
        :func:`probeplan.report.progress_bar` draws it.

    Returns
    -------
    Simulation

    Notes
    -----
    See the module docstring for the fit and its first guess. Cost: one least-squares fit per
    trial (a few forward evaluations each); the draws and the bounds are batched.
    """
    rng = rng if isinstance(rng, np.random.Generator) else np.random.default_rng(rng)
    if isinstance(trials, bool) or not isinstance(trials, int | np.integer) or trials < MIN_TRIALS:
        raise ValueError(f"`trials` must be an integer >= {MIN_TRIALS}; got {trials!r}.")
    trials = int(trials)
    sel = _check_scenarios(scenarios, problem.n_scenarios)
    meters = problem.meters(positions_m, gain, axes, grades)
    new = ~meters.installed
    score = problem.score(meters.positions_m[new], meters.gain[new], meters.axes[new], grades)
    cov, singular = covariance(score.fisher[sel])
    crb = score.crb_std[sel]
    names = problem.names
    p = len(names)
    theta_all = problem.theta[sel]  # (n_sim, n_params_all)
    truth = theta_all[:, problem.est_cols]
    n_sim = sel.size

    # Readings of every trial in one draw: (n_sim, trials, n_probes, n_axes).
    field_clean, _ = problem.scene.evaluate(theta_all, meters.positions_m, jacobian=False)
    clean = readings(field_clean, meters.axes, meters.gain)
    shape = (n_sim, trials, *clean.shape[1:])
    clean = np.broadcast_to(clean[:, None], shape)
    noisy = clean + rng.standard_normal(shape) * meters.sigma(clean)
    sat = np.abs(noisy) >= meters.range_v_per_m  # the meter reports its full scale
    noisy = np.clip(noisy, -meters.range_v_per_m, meters.range_v_per_m)
    usable = meters.used & ~sat
    saturated = np.any(sat & meters.used, axis=-1).mean(axis=1)
    # First guesses: truth + a draw from N(0, C), C the bound's covariance, all at once.
    z = rng.standard_normal((n_sim, trials, p))
    start = truth[:, None, :] + np.einsum("spq,stq->stp", _sqrt_cov(cov, singular), z)

    lower, upper = fit_bounds(problem, theta_all)
    fitted = np.array(start)
    converged = np.zeros((n_sim, trials), dtype=bool)
    tick = progress or (lambda *_: None)
    for k in range(n_sim):
        tick("simulate", k * trials, n_sim * trials)
        if singular[k] or not np.all(np.isfinite(crb[k]) & (crb[k] > 0)):
            fitted[k] = truth[k]  # nothing to fit: the layout cannot resolve this scenario
            continue
        fit = ReadingFit.of_problem(problem, theta_all[k], meters)
        lo, hi = lower[k], upper[k]
        for t in range(trials):
            keep = usable[k, t]
            if keep.sum() < p:
                continue  # fewer readings than unknowns: counted as a failed fit
            x0 = inside(start[k, t], lo, hi)
            fitted[k, t], converged[k, t] = fit.solve(x0, noisy[k, t][keep], keep, crb[k], lo, hi)
            tick("simulate", k * trials + t + 1, n_sim * trials)
    tick("simulate", n_sim * trials, n_sim * trials)

    err = fitted - truth[:, None, :]
    w = converged[..., None]
    n_ok = converged.sum(axis=1)
    with np.errstate(invalid="ignore", divide="ignore"):
        ms = np.where(w, err**2, 0.0).sum(axis=1) / n_ok[:, None]
    rms = np.where(n_ok[:, None] > 0, np.sqrt(ms), np.inf)

    loc_rms, loc_crb, q_rms, q_crb = _source0_figures(names, truth, rms, crb, cov)
    return Simulation(
        trials=trials,
        scenarios=sel,
        names=names,
        truth=truth,
        fitted=fitted,
        converged=converged,
        rms_error=rms,
        crb_std=crb,
        has_location="s0.x_m" in names and "s0.y_m" in names,
        location_rms_m=loc_rms,
        location_crb_m=loc_crb,
        has_charge="s0.charge_c" in names,
        charge_rms_rel=q_rms,
        charge_crb_rel=q_crb,
        saturated=saturated,
    )


def summary_rows(sim: Simulation) -> list[dict]:
    """Achieved error beside the bound, one row per simulated scenario and quantity.

    Quantities: the horizontal location of source 0 (when estimated), its relative charge
    (when estimated), then every estimated parameter.

    Returns
    -------
    list of dict
        Keys: ``scenario`` (int, row of the scenario table), ``quantity`` (str), ``unit``
        (str), ``achieved`` (float, RMS over converged fits), ``bound`` (float, Cramér–Rao),
        ``ratio`` (achieved/bound; about 1 means the layout delivers its bound),
        ``sampling_rel`` (float, the relative standard error of an RMS from this many fits,
        1/sqrt(2 n); a ratio within about 2–3 of these of 1 agrees with the bound),
        ``converged`` (int), ``trials`` (int).
    """
    rows = []
    for k, s in enumerate(sim.scenarios):
        n_ok = int(sim.converged[k].sum())
        common = {
            "scenario": int(s),
            "converged": n_ok,
            "trials": sim.trials,
            "sampling_rel": float(1.0 / np.sqrt(2.0 * n_ok)) if n_ok else float("inf"),
        }
        items = []
        if sim.has_location:
            items.append(("location of s0", "m", sim.location_rms_m[k], sim.location_crb_m[k]))
        if sim.has_charge:
            items.append(
                (
                    "charge of s0 (relative)",
                    "fraction",
                    sim.charge_rms_rel[k],
                    sim.charge_crb_rel[k],
                )
            )
        for j, name in enumerate(sim.names):
            items.append((name, _unit(name), sim.rms_error[k, j], sim.crb_std[k, j]))
        for quantity, unit, achieved, bound in items:
            achieved, bound = float(achieved), float(bound)
            ratio = achieved / bound if np.isfinite(bound) and bound > 0 else float("inf")
            rows.append(
                {
                    "scenario": int(s),
                    "quantity": quantity,
                    "unit": unit,
                    "achieved": achieved,
                    "bound": bound,
                    "ratio": ratio,
                    **{k2: v for k2, v in common.items() if k2 != "scenario"},
                }
            )
    return rows


# --------------------------------------------------------------------------------------------
# Private helpers
# --------------------------------------------------------------------------------------------


def _source0_figures(names, truth, rms, crb, cov) -> tuple[np.ndarray, ...]:
    """Location (m) and relative charge figures of source 0, achieved and bound, ``(n_sim,)``
    each; −1 where the parameters are not estimated."""
    n_sim = truth.shape[0]
    ix, iy, iq = (names.index(n) if n in names else -1 for n in ("s0.x_m", "s0.y_m", "s0.charge_c"))
    minus = np.full(n_sim, -1.0)
    if ix >= 0 and iy >= 0:
        loc_rms = np.sqrt(rms[:, ix] ** 2 + rms[:, iy] ** 2)
        loc_crb = np.sqrt(cov[:, ix, ix] + cov[:, iy, iy])
    else:
        loc_rms, loc_crb = minus, minus.copy()
    if iq >= 0:
        q = np.abs(truth[:, iq])
        with np.errstate(divide="ignore", invalid="ignore"):
            q_rms = np.where(q > 0, rms[:, iq] / q, np.inf)
            q_crb = np.where(q > 0, crb[:, iq] / q, np.inf)
    else:
        q_rms, q_crb = minus.copy(), minus.copy()
    return loc_rms, loc_crb, q_rms, q_crb


def _check_scenarios(scenarios, n_scenarios: int) -> np.ndarray:
    if scenarios is None:
        return default_scenarios(n_scenarios)
    sel = np.asarray(scenarios)
    bad = (
        sel.ndim != 1
        or sel.size == 0
        or not np.issubdtype(sel.dtype, np.integer)
        or np.any((sel < 0) | (sel >= n_scenarios))
        or np.unique(sel).size != sel.size
    )
    if bad:
        raise ValueError(
            f"`scenarios` must be distinct integer rows of the scenario table, 0 to "
            f"{n_scenarios - 1}; got {np.asarray(scenarios).tolist()}."
        )
    return sel.astype(int)


def _sqrt_cov(cov: np.ndarray, singular: np.ndarray) -> np.ndarray:
    """A square root L with L Lᵀ = C per scenario (zero for singular ones), ``(n_sim, p, p)``.

    Eigen-decomposition of the correlation-scaled matrix: robust where C is near singular.
    """
    safe = np.where(singular[:, None, None], np.eye(cov.shape[-1]), cov)
    d = np.sqrt(np.clip(np.diagonal(safe, axis1=-2, axis2=-1), 0.0, None))
    d = np.where(d > 0, d, 1.0)
    corr = safe / d[:, :, None] / d[:, None, :]
    val, vec = np.linalg.eigh(corr)
    root = d[:, :, None] * vec * np.sqrt(np.clip(val, 0.0, None))[:, None, :]
    return np.where(singular[:, None, None], 0.0, root)


def _unit(name: str) -> str:
    for suffix, unit in (("_c", "C"), ("_v_per_m", "V/m"), ("_m", "m")):
        if name.endswith(suffix):
            return unit
    return ""
