"""Weighted nonlinear least squares of meter readings: the fit that ``simulate`` and ``locate``
share.

A reading m of a meter has Gaussian noise of variance σ² = σ_add² + (σ_rel·m)² (its grade; see
:mod:`probeplan.probes`). With that noise the maximum-likelihood estimate of the parameters θ
minimises Σ ((m_obs − h(θ))/σ)², the whitened residuals, where h(θ) are the model readings
(Kay, Fundamentals of Statistical Signal Processing, vol. 1, §7.5 and §8.9 — from memory).
:class:`ReadingFit` solves it with :func:`scipy.optimize.least_squares` (trust-region
reflective, box bounds) and the analytic Jacobian of the forward model; each point of θ costs one
forward evaluation shared by the residuals and the Jacobian.

σ is the noise of the *model* reading at the current estimate, reweighted until it settles
(iteratively reweighted least squares): weights from the noisy readings themselves would favour
readings that happened to fall low when the noise is proportional, and bias the fit.

Box bounds (:func:`fit_bounds`) keep each source above the grounded plane — below it a charge
(q, z) and the sign-flipped (−q, 2g − z) give the same field above the ground, a mirror solution
no user would accept — and sizes (sigma, radius) positive.

Shapes: ``n_probes`` meters (installed first), ``n_axes`` readings per meter, ``n_params``
estimated parameters, ``n_used`` readings that enter a fit.
"""

from __future__ import annotations

import numpy as np
from scipy.optimize import least_squares

from .probes import Meters, readings

#: Reweighting passes of the fit when the noise is proportional to the reading.
IRLS_PASSES = 3

#: ``method="auto"`` fits without bounds from a start this many ``x_scale`` inside them.
FAR_FROM_BOUNDS = 10.0


class ReadingFit:
    """Model readings and their gradient as functions of the estimated parameters.

    Parameters
    ----------
    scene : probeplan.forward.Scene
    columns : (n_params,) int
        The estimated columns of the full parameter vector.
    theta_full : (n_params_all,) float
        Values of every parameter; the estimated ones are replaced by the fit's.
    meters : Meters
        The meters whose readings are fitted.
    """

    def __init__(self, scene, columns: np.ndarray, theta_full: np.ndarray, meters: Meters) -> None:
        self.scene = scene
        self.cols = np.asarray(columns, dtype=int)
        self.theta = np.array(theta_full, dtype=float)
        self.meters = meters
        self._x = None
        self._m = None
        self._dm = None

    @classmethod
    def of_problem(cls, problem, theta_full: np.ndarray, meters: Meters) -> ReadingFit:
        """The fit of ``problem``'s estimated parameters (its scene and columns)."""
        return cls(problem.scene, problem.est_cols, theta_full, meters)

    def evaluate(self, x: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
        """Model readings and their gradient at ``x``, cached for the last point.

        Parameters
        ----------
        x : (n_params,) float
            Estimated parameters, SI units.

        Returns
        -------
        readings : (n_probes, n_axes) float
            V/m.
        gradient : (n_probes, n_axes, n_params) float
            ∂m/∂θ, V/m per unit of θ.
        """
        key = np.asarray(x, dtype=float).tobytes()  # cheaper than array_equal, called often
        if key != self._x:
            theta = self.theta.copy()
            theta[self.cols] = x
            e, jac = self.scene.evaluate(theta[None], self.meters.positions_m, columns=self.cols)
            mt = self.meters
            self._m = readings(e, mt.axes, mt.gain)[0]
            self._dm = np.einsum("nip,nai->nap", jac[0], mt.axes) * mt.gain[:, None, None]
            self._x = key
        return self._m, self._dm

    def whitened(
        self, x: np.ndarray, observed: np.ndarray, keep: np.ndarray
    ) -> tuple[np.ndarray, np.ndarray]:
        """Standardised residuals of every reading and the whitened gradient of the kept ones.

        Parameters
        ----------
        x : (n_params,) float
        observed : (n_probes, n_axes) float
            Readings, V/m (any value where not kept).
        keep : (n_probes, n_axes) bool
            Readings that enter the fit.

        Returns
        -------
        residuals : (n_probes, n_axes) float
            (m_obs − h(x))/σ(h(x)) for every reading (kept or not).
        rows : (n_used, n_params) float
            (∂m/∂θ)/σ of the kept readings; the Fisher information is rowsᵀ rows.
        """
        m, dm = self.evaluate(x)
        sigma = self.meters.sigma(m)
        return (observed - m) / sigma, dm[keep] / sigma[keep][:, None]

    def solve(
        self,
        x0: np.ndarray,
        observed: np.ndarray,
        keep: np.ndarray,
        x_scale,
        lo: np.ndarray,
        hi: np.ndarray,
        *,
        loss: str = "linear",
        settle: float = 0.0,
        tol: float = 1e-8,
        gtol: float = 1e-8,
        method: str = "trf",
    ) -> tuple[np.ndarray, bool]:
        """Fit the kept readings; returns (parameters (n_params,), converged).

        Parameters
        ----------
        x0 : (n_params,) float
            First guess, strictly inside the bounds (see :func:`inside`).
        observed : (n_used,) float
            The kept readings, V/m, in the order of ``keep``'s True entries.
        keep : (n_probes, n_axes) bool
        x_scale : (n_params,) float or "jac"
            Typical size of a change of each parameter (``least_squares``' ``x_scale``).
        lo, hi : (n_params,) float
            Box bounds (±inf where free).
        loss : str
            ``least_squares``' loss on the whitened residuals ("linear": least squares;
            "soft_l1", "huber": robust, in units of one sigma).
        settle : float
            Stop reweighting once no reading's σ changes by more than this fraction between
            passes (0: always all :data:`IRLS_PASSES` passes). Weights off by a fraction ε
            move the estimate by about ε of its own 1-sigma.
        tol, gtol : float
            ``least_squares``' ``ftol`` and ``xtol``, and its ``gtol`` (its defaults 1e-8).
        method : {"trf", "auto"}
            "auto": Levenberg–Marquardt without bounds (MINPACK: its loop is compiled, about
            half the overhead of the trust-region loop, a quarter of its bounded form) when
            ``x0`` is more than :data:`FAR_FROM_BOUNDS` ``x_scale`` from every bound, the
            loss is linear and the fit stays inside the bounds; else "trf".

        A failed fit (the solver gives up, a non-finite result) returns ``x0`` and False.
        """
        x = np.asarray(x0, dtype=float)
        for _ in range(IRLS_PASSES):
            sigma = self.meters.sigma(self.evaluate(x)[0])[keep]

            def fun(x, sigma=sigma):
                return (observed - self.evaluate(x)[0][keep]) / sigma

            def jac(x, sigma=sigma):
                return -self.evaluate(x)[1][keep] / sigma[:, None]

            free = method == "auto" and loss == "linear" and self._far(x, x_scale, lo, hi)
            res = _least_squares(fun, jac, x, (lo, hi), x_scale, loss, (tol, gtol), free)
            if res is not None and free and not np.all((res.x >= lo) & (res.x <= hi)):
                res = _least_squares(fun, jac, x, (lo, hi), x_scale, loss, (tol, gtol), False)
            if res is None:
                return np.asarray(x0, dtype=float), False
            x = res.x
            if not np.any(self.meters.relative_noise):
                break  # constant weights: one pass is the fit
            if settle > 0:
                now = self.meters.sigma(self.evaluate(x)[0])[keep]
                if np.all(np.abs(now - sigma) <= settle * sigma):
                    break
        return x, True

    @staticmethod
    def _far(x, x_scale, lo, hi) -> bool:
        if isinstance(x_scale, str):
            return False
        room = np.minimum(x - lo, hi - x)
        return bool(np.all(room > FAR_FROM_BOUNDS * x_scale))


def _least_squares(fun, jac, x, bounds, x_scale, loss, tols, free: bool):
    """One ``least_squares`` run; None when it fails or ends on a non-finite point."""
    kwargs = {"method": "lm"} if free else {"method": "trf", "bounds": bounds, "loss": loss}
    with np.errstate(all="ignore"):
        try:
            tol, gtol = tols
            res = least_squares(
                fun, x, jac=jac, x_scale=x_scale, ftol=tol, xtol=tol, gtol=gtol, **kwargs
            )
        except (ValueError, np.linalg.LinAlgError):
            return None
    ok = bool(res.success) and bool(np.all(np.isfinite(res.x))) and np.isfinite(res.cost)
    return res if ok else None


def fit_bounds(problem, theta_all: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Box bounds on the estimated parameters of scenarios, ``(n_sim, n_params)`` each.

    Sizes stay positive; with a ground plane every source stays above it (its lowest point,
    for the kinds whose extent below the centre is fixed during the fit).

    Parameters
    ----------
    problem : probeplan.problem.Problem
    theta_all : (n_sim, n_params_all) float
        Every parameter of each scenario (the sizes and shapes the bounds depend on).
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


def inside(x: np.ndarray, lo: np.ndarray, hi: np.ndarray) -> np.ndarray:
    """``x`` moved strictly inside [lo, hi] (least_squares needs a feasible start), same shape."""
    span = np.where(np.isfinite(hi - lo), hi - lo, np.abs(x) + 1.0)
    margin = 1e-6 * span
    return np.clip(x, lo + margin, hi - margin)
