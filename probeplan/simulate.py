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
   (:func:`scipy.optimize.least_squares`, trust-region reflective) on whitened residuals
   (m_obs − h(θ))/σ, with the analytic Jacobian of the forward model; σ is the noise of the
   *model* reading (additive floor and proportional part), reweighted until it settles —
   weights from the noisy readings would favour readings that fell low and bias the fit;
4. reports the achieved RMS errors beside the bounds at the same scenario.

The fit starts from the truth plus a draw from the Cramér–Rao covariance: this models a user
with a reasonable first guess, about as good as the data themselves (a previous fit, a forecast,
the plant drawing). It does not test whether a fit from a poor first guess finds the global
minimum. Box bounds keep each source above the grounded plane — below it, a charge (q, z) and
the sign-flipped (−q, 2g − z) give the same field above the ground, a mirror solution no user
would accept — and sizes (sigma, radius) positive.

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
from scipy.optimize import least_squares

from .fisher import covariance
from .probes import Meters, readings

#: Scenarios simulated by default: scenario 0 (nominal) and up to this many in all.
DEFAULT_SCENARIOS = 8

#: Least trials per scenario (an RMS from fewer means nothing).
MIN_TRIALS = 2

#: Reweighting passes of the fit when the noise is proportional to the reading.
IRLS_PASSES = 3


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

    lower, upper = _bounds(problem, theta_all)
    fitted = np.array(start)
    converged = np.zeros((n_sim, trials), dtype=bool)
    for k in range(n_sim):
        if singular[k] or not np.all(np.isfinite(crb[k]) & (crb[k] > 0)):
            fitted[k] = truth[k]  # nothing to fit: the layout cannot resolve this scenario
            continue
        fit = _Fit(problem, theta_all[k], meters)
        lo, hi = lower[k], upper[k]
        for t in range(trials):
            keep = usable[k, t]
            if keep.sum() < p:
                continue  # fewer readings than unknowns: counted as a failed fit
            x0 = _inside(start[k, t], lo, hi)
            fitted[k, t], converged[k, t] = fit.solve(x0, noisy[k, t][keep], keep, crb[k], lo, hi)

    err = fitted - truth[:, None, :]
    w = converged[..., None]
    n_ok = converged.sum(axis=1)
    with np.errstate(invalid="ignore", divide="ignore"):
        ms = np.where(w, err**2, 0.0).sum(axis=1) / n_ok[:, None]
    rms = np.where(n_ok[:, None] > 0, np.sqrt(ms), np.inf)

    ix, iy, iq = (names.index(n) if n in names else -1 for n in ("s0.x_m", "s0.y_m", "s0.charge_c"))
    has_loc = ix >= 0 and iy >= 0
    has_q = iq >= 0
    minus = np.full(n_sim, -1.0)
    if has_loc:
        loc_rms = np.sqrt(rms[:, ix] ** 2 + rms[:, iy] ** 2)
        loc_crb = np.sqrt(cov[:, ix, ix] + cov[:, iy, iy])
    else:
        loc_rms, loc_crb = minus, minus.copy()
    if has_q:
        q = np.abs(truth[:, iq])
        with np.errstate(divide="ignore", invalid="ignore"):
            q_rms = np.where(q > 0, rms[:, iq] / q, np.inf)
            q_crb = np.where(q > 0, crb[:, iq] / q, np.inf)
    else:
        q_rms, q_crb = minus.copy(), minus.copy()
    return Simulation(
        trials=trials,
        scenarios=sel,
        names=names,
        truth=truth,
        fitted=fitted,
        converged=converged,
        rms_error=rms,
        crb_std=crb,
        has_location=has_loc,
        location_rms_m=loc_rms,
        location_crb_m=loc_crb,
        has_charge=has_q,
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


class _Fit:
    """Residuals and Jacobian of one scenario's fit, sharing one forward evaluation per point."""

    def __init__(self, problem, theta_full: np.ndarray, meters: Meters) -> None:
        self.scene = problem.scene
        self.cols = problem.est_cols
        self.theta = np.array(theta_full, dtype=float)
        self.meters = meters
        self._x = None
        self._m = None
        self._dm = None

    def _eval(self, x: np.ndarray) -> None:
        if self._x is not None and np.array_equal(x, self._x):
            return
        theta = self.theta.copy()
        theta[self.cols] = x
        e, jac = self.scene.evaluate(theta[None], self.meters.positions_m, columns=self.cols)
        mt = self.meters
        self._m = readings(e, mt.axes, mt.gain)[0]  # (n_probes, n_axes)
        self._dm = np.einsum("nip,nai->nap", jac[0], mt.axes) * mt.gain[:, None, None]
        self._x = np.array(x)

    def solve(self, x0, observed, keep, x_scale, lo, hi) -> tuple[np.ndarray, bool]:
        """Fit one trial; returns (parameters (n_params,), converged).

        Iteratively reweighted least squares: the weights come from the noise of the *model*
        readings at the current estimate, refitted until they settle. Weights from the noisy
        readings themselves would favour readings that happened to fall low when the noise is
        proportional, and bias the fit.
        """
        x = np.asarray(x0, dtype=float)
        for _ in range(IRLS_PASSES):
            self._eval(x)
            sigma = self.meters.sigma(self._m)[keep]

            def fun(x, sigma=sigma):
                self._eval(x)
                return (observed - self._m[keep]) / sigma

            def jac(x, sigma=sigma):
                self._eval(x)
                return -self._dm[keep] / sigma[:, None]

            with np.errstate(all="ignore"):
                try:
                    res = least_squares(
                        fun, x, jac=jac, bounds=(lo, hi), x_scale=x_scale, method="trf"
                    )
                except (ValueError, np.linalg.LinAlgError):
                    return np.asarray(x0, dtype=float), False
            ok = bool(res.success) and bool(np.all(np.isfinite(res.x))) and np.isfinite(res.cost)
            if not ok:
                return np.asarray(x0, dtype=float), False
            x = res.x
            if not np.any(self.meters.relative_noise):
                break  # constant weights: one pass is the fit
        return x, True


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


def _bounds(problem, theta_all: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Box bounds on the estimated parameters of each simulated scenario, ``(n_sim, p)`` each.

    Sizes stay positive; with a ground plane every source stays above it (its lowest point,
    for the kinds whose extent below the centre is fixed during the fit).
    """
    scene = problem.scene
    names_all = scene.param_names
    n_sim = theta_all.shape[0]
    lo = np.full((n_sim, scene.n_params), -np.inf)
    hi = np.full((n_sim, scene.n_params), np.inf)
    est = set(problem.names)
    start = 0
    for i, src in enumerate(scene.sources):
        n_p = len(src.param_names)
        block = theta_all[:, start : start + n_p]
        for name in ("radius_m", "sigma_m"):
            col = names_all.index(f"s{i}.{name}") if f"s{i}.{name}" in names_all else -1
            if col >= 0:
                lo[:, col] = 1e-3 * np.abs(theta_all[:, col])
        if scene.ground_z_m is not None:
            zc = names_all.index(f"s{i}.z_m")
            size_free = src.kind == "sphere" and f"s{i}.radius_m" in est
            below = np.array(
                [0.0 if size_free else row[3] - src.with_params(row).lowest_z_m() for row in block]
            )
            floor = scene.ground_z_m + below
            # A truth at or under the floor (a sampled size) leaves the fit unbounded there.
            lo[:, zc] = np.where(theta_all[:, zc] > floor, floor, -np.inf)
        start += n_p
    cols = problem.est_cols
    return lo[:, cols], hi[:, cols]


def _inside(x: np.ndarray, lo: np.ndarray, hi: np.ndarray) -> np.ndarray:
    """x moved strictly inside [lo, hi] (least_squares needs a feasible start)."""
    span = np.where(np.isfinite(hi - lo), hi - lo, np.abs(x) + 1.0)
    margin = 1e-6 * span
    return np.clip(x, lo + margin, hi - margin)


def _unit(name: str) -> str:
    for suffix, unit in (("_c", "C"), ("_v_per_m", "V/m"), ("_m", "m")):
        if name.endswith(suffix):
            return unit
    return ""
