"""The assembled planning problem, and the score of a layout.

A :class:`Problem` ties the stages together for one config: the :class:`~probeplan.forward.Scene`,
the scenario table θ (scenario 0 nominal, the rest drawn from the config's ranges with its seed),
which parameters are estimated, the meters (axes, gain, noise) of the installed and the new
probes, the mounting site and the design criterion. Its methods turn probe positions into Fisher
information and criterion values, batched over many layouts at once; :meth:`Problem.score`
builds the one :class:`Score` result for a single layout.
"""

from __future__ import annotations

from dataclasses import dataclass, replace

import numpy as np

from .errors import InputError
from .fisher import (
    Criterion,
    aggregate,
    covariance,
    fisher_from_rows,
    layout_information,
    unresolved_directions,
)
from .forward import BACKGROUND_PARAMS, Scene
from .probes import (
    Meters,
    Noise,
    axes_table,
    component_axes,
    reading_weights,
    stack_meters,
    whitened_rows,
)
from .resulttypes import Score

#: Jacobian bytes per chunk of layouts scored together: a chunk's arrays stay in cache from
#: the forward model to the criterion, and each chunk costs ~0.25 ms of Python calls. Measured
#: on benchmarks/score.py (8 probes, 64 scenarios, 5 parameters; the whitened rows no longer
#: stored): 15,600 layouts/s at 1 MB, 19,300-20,000 from 1.5 to 3 MB, 17,900 at 4 MB.
_CHUNK_BYTES = 2 << 20


def draw_scenarios(config, scene: Scene, rng: np.random.Generator) -> np.ndarray:
    """Scenario parameter table: row 0 nominal, the others uniform within the config's ranges.

    Parameters
    ----------
    config : probeplan.config.Config
    scene : Scene
        Built from the same config (its parameter names order the columns).
    rng : numpy Generator
        The only source of randomness; draws are made range by range in config order.

    Returns
    -------
    (n_scenarios, n_params_all) float
        θ of every scenario, SI units, columns named by ``scene.param_names``.
    """
    bg = config.background.field_v_per_m if config.background else (0.0, 0.0, 0.0)
    nominal = scene.nominal(bg)
    n_s = config.design.scenarios
    theta = np.tile(nominal, (n_s, 1))
    index = {n: k for k, n in enumerate(scene.param_names)}
    ranges = [(f"s{i}.{n}", lo, hi) for i, s in enumerate(config.sources) for n, lo, hi in s.ranges]
    if config.background:
        ranges += [(f"bg.{n}", lo, hi) for n, lo, hi in config.background.ranges]
    for name, lo, hi in ranges:
        theta[1:, index[name]] = rng.uniform(lo, hi, size=n_s - 1)
    return theta


@dataclass(frozen=True, eq=False)
class Problem:
    """Everything needed to score layouts of one config (see module docstring).

    Use :func:`build_problem`; the fields are documented there.
    """

    config: object
    scene: Scene
    theta: np.ndarray  # (n_scenarios, n_params_all)
    est_cols: np.ndarray  # (n_params,) int
    names: tuple[str, ...]
    criterion: Criterion
    aggregate: str
    count: int
    new_axes: np.ndarray  # (n_axes, 3)
    new_gain: float
    installed_m: np.ndarray  # (n_installed, 3)
    installed_axes: np.ndarray  # (n_installed, n_axes_i, 3)
    installed_gain: np.ndarray  # (n_installed,)
    installed_grade: tuple[str, ...]  # each installed meter's grade, kept whatever is bought
    site: object
    fisher_installed: np.ndarray  # (n_scenarios, n_params, n_params)
    grades: dict  # grade name -> Noise; "" is [probes]' own
    new_grade: str  # the new meters' grade in ``grades`` ("" or a budget's grade)
    # Where large scenario-separable calls run: a ``shard.ScenarioShards`` (a dask cluster)
    # or None for this process; never sent to a worker.
    shards: object | None = None

    @property
    def noise(self) -> Noise:
        """The grade of the new meters (``[probes]``, or the budget's grade)."""
        return self.grades[self.new_grade]

    @property
    def n_params(self) -> int:
        return len(self.names)

    @property
    def n_scenarios(self) -> int:
        return self.theta.shape[0]

    @property
    def theta_est(self) -> np.ndarray:
        """(n_scenarios, n_params) float: the estimated parameters of each scenario."""
        return self.theta[:, self.est_cols]

    # -- rows and information -------------------------------------------------------------------

    def rows(
        self,
        positions_m: np.ndarray,
        gain: np.ndarray | None = None,
        axes: np.ndarray | None = None,
        noise: Noise | Meters | None = None,
    ) -> tuple[np.ndarray, np.ndarray]:
        """Whitened reading gradients of probes at many positions.

        Parameters
        ----------
        positions_m : (n_points, 3) float
        gain : (n_points,) float or None
            Calibration factors (default: the new probes' gain).
        axes : (n_points, n_axes, 3) float or None
            Measurement axes (default: the new probes' component).
        noise : Noise, Meters or None
            The meters' grade, or each one's (default: the new probes' grade).

        Returns
        -------
        rows : (n_scenarios, n_points, n_axes, n_params) float
        saturated : (n_scenarios, n_points, n_axes) bool
        """
        n = positions_m.shape[0]
        if axes is None:
            axes = np.broadcast_to(self.new_axes, (n, *self.new_axes.shape))
        if gain is None:
            gain = np.full(n, self.new_gain)
        if self.shards is not None and self.shards.wants(self.n_scenarios, n):
            return self.shards.rows(self, positions_m, gain, axes, noise)
        e, jac = self.scene.evaluate(self.theta, positions_m, columns=self.est_cols)
        return whitened_rows(e, jac, axes, gain, self.noise if noise is None else noise)

    def installed_rows(self) -> tuple[np.ndarray, np.ndarray]:
        """:meth:`rows` of the installed meters, with their own axes, gains and grades."""
        inst = self._installed_meters()
        return self.rows(inst.positions_m, inst.gain, inst.axes, inst)

    def _installed_meters(self) -> Meters:
        return stack_meters(
            self.installed_m,
            list(self.installed_axes),
            self.installed_gain,
            np.ones(self.installed_m.shape[0], dtype=bool),
            [(g, self.grades[g]) for g in self.installed_grade],
        )

    def point_information(
        self, positions_m: np.ndarray, gain: np.ndarray | None = None
    ) -> np.ndarray:
        """Fisher information that one new probe at each position adds.

        Returns
        -------
        (n_scenarios, n_points, n_params, n_params) float
        """
        rows, _ = self.rows(positions_m, gain)
        return fisher_from_rows(rows)

    def fisher(self, layouts_m: np.ndarray, gains: np.ndarray | None = None) -> np.ndarray:
        """Fisher information of many layouts of new probes (installed ones added).

        Parameters
        ----------
        layouts_m : (n_layouts, n_probes, 3) float
        gains : (n_layouts, n_probes) float or None

        Returns
        -------
        (n_layouts, n_scenarios, n_params, n_params) float
        """
        n_l = layouts_m.shape[0]
        out = np.empty((n_l, self.n_scenarios, self.n_params, self.n_params))
        for sl, info in self._fisher_chunks(layouts_m, gains):
            out[sl] = info
        return out

    def _fisher_chunks(self, layouts_m: np.ndarray, gains: np.ndarray | None):
        """Fisher information of chunks of layouts: yields (slice, (k, S, p, p) float).

        Chunks keep the Jacobian of a chunk near ``_CHUNK_BYTES``, so that it and the arrays
        derived from it stay in cache from the forward model to the criterion.
        """
        n_l, n_p, _ = layouts_m.shape
        gains = None if gains is None else np.broadcast_to(gains, (n_l, n_p))
        per_layout = self.n_scenarios * max(n_p, 1) * 3 * max(self.scene.n_params, 1) * 8
        step = max(1, _CHUNK_BYTES // per_layout)
        for start in range(0, n_l, step):
            sl = slice(start, min(start + step, n_l))
            yield sl, _chunk_information(self, layouts_m[sl], None if gains is None else gains[sl])

    def probe_information(
        self, positions_m: np.ndarray, gain: np.ndarray | None = None
    ) -> np.ndarray:
        """Information of every probe of a layout, installed ones first.

        Parameters
        ----------
        positions_m : (n_probes, 3) float
            New probes.
        gain : (n_probes,) float or None

        Returns
        -------
        (n_scenarios, n_installed + n_probes, n_params, n_params) float
        """
        pos = np.asarray(positions_m, dtype=float).reshape(-1, 3)
        rows, _ = self.rows(pos, gain)
        parts = [fisher_from_rows(rows)]
        if self.installed_m.shape[0]:
            rows_i, _ = self.installed_rows()
            parts.insert(0, fisher_from_rows(rows_i))
        return np.concatenate(parts, axis=1)

    def failure_values(
        self,
        positions_m: np.ndarray,
        gain: np.ndarray | None = None,
        meters: Meters | None = None,
    ) -> np.ndarray:
        """Criterion of the layout with each single probe lost.

        Parameters
        ----------
        positions_m : (n_probes, 3) float
            New probes (installed ones are counted and may fail too).
        gain : (n_probes,) float or None
        meters : Meters or None
            The new probes' own axes and grades (default: the new probes' component and grade).

        Returns
        -------
        (n_installed + n_probes,) float
            Entry i: the criterion with probe i (installed first) out of service.
        """
        pos = np.asarray(positions_m, dtype=float).reshape(1, -1, 3)
        g = None if gain is None else np.asarray(gain, dtype=float).reshape(1, -1)
        return self._loss_values(pos, g, meters)[0]

    def robust_layout_values(
        self, layouts_m: np.ndarray, gains: np.ndarray | None = None
    ) -> np.ndarray:
        """Worst criterion over the loss of any one probe, for many layouts.

        Parameters
        ----------
        layouts_m : (n_layouts, n_probes, 3) float
        gains : (n_layouts, n_probes) float or None

        Returns
        -------
        (n_layouts,) float
        """
        vals = self._loss_values(layouts_m, gains)  # (L, n_all)
        return vals.min(axis=1) if self.criterion.maximise else vals.max(axis=1)

    def _loss_values(
        self, layouts_m: np.ndarray, gains: np.ndarray | None, meters: Meters | None = None
    ) -> np.ndarray:
        """Criterion of each layout with each one probe lost, ``(n_layouts, n_all)``.

        Probes are numbered installed first; J without probe i is the total minus probe i's
        own information (Fisher information of independent readings adds). ``meters``: the
        new probes' own axes and grades, the same in every layout.
        """
        n_l, n_p, _ = layouts_m.shape
        g = None if gains is None else np.broadcast_to(gains, (n_l, n_p)).reshape(-1)
        axes = noise = None
        if meters is not None:
            noise = meters.take(np.tile(np.arange(n_p), n_l))
            axes = noise.axes
        rows, _ = self.rows(layouts_m.reshape(-1, 3), g, axes, noise)
        p = self.n_params  # explicit: with no new probe the size is 0 and -1 is undefined
        info = fisher_from_rows(rows).reshape(self.n_scenarios, n_l, n_p, p, p)
        if self.installed_m.shape[0]:
            inst = fisher_from_rows(self.installed_rows()[0])  # (S, k, p, p)
            inst = np.broadcast_to(inst[:, None], (self.n_scenarios, n_l, *inst.shape[1:]))
            info = np.concatenate([inst, info], axis=2)  # (S, L, n_all, p, p)
        lost = info.sum(axis=2, keepdims=True) - info
        return self.values(np.moveaxis(lost, 0, 2))  # (L, n_all, S, p, p) -> (L, n_all)

    def objective(self, layouts_m: np.ndarray, gains: np.ndarray | None = None) -> np.ndarray:
        """What the search optimises: the criterion, or its worst case over single losses
        when the config asks to tolerate a failure. ``(n_layouts, n_probes, 3)`` → ``(n_layouts,)``.
        """
        if getattr(self.config.design, "tolerate_failures", 0):
            return self.robust_layout_values(layouts_m, gains)
        return self.layout_values(layouts_m, gains)

    def values(self, fisher: np.ndarray) -> np.ndarray:
        """Aggregated criterion of many layouts.

        Parameters
        ----------
        fisher : (..., n_scenarios, n_params, n_params) float

        Returns
        -------
        (...,) float
        """
        per = self.criterion.per_scenario(fisher, self.theta_est)
        return aggregate(per, self.aggregate, self.criterion.maximise)

    def layout_values(self, layouts_m: np.ndarray, gains: np.ndarray | None = None) -> np.ndarray:
        """Criterion of many layouts: ``(n_layouts, n_probes, 3)`` → ``(n_layouts,)``."""
        n_points = layouts_m.shape[0] * layouts_m.shape[1]
        if self.shards is not None and self.shards.wants(self.n_scenarios, n_points):
            return self.shards.layout_values(self, layouts_m, gains)
        out = np.empty(layouts_m.shape[0])
        # Chunk by chunk: the information of a chunk is scored while it is still in cache.
        for sl, info in self._fisher_chunks(layouts_m, gains):
            out[sl] = self.values(info)
        return out

    def better(self, a: float, b: float) -> bool:
        """Whether criterion value a is strictly better than b."""
        return a > b if self.criterion.maximise else a < b

    def gain_at(self, positions_m: np.ndarray) -> np.ndarray:
        """Calibration factor of new probes at positions, ``(n, 3)`` → ``(n,)``.

        The probes' own gain times the gain of the mounting region they sit in (the nearest
        candidate point decides, so points on a region's edge are not ambiguous).
        """
        regions = self.site.regions
        if all(r.gain == 1.0 for r in regions):
            return np.full(positions_m.shape[0], self.new_gain)
        from scipy.spatial import cKDTree

        cand = self.site.candidate_grid(target=2000)
        _, idx = cKDTree(cand.positions_m).query(positions_m)
        return self.new_gain * cand.gain[idx]

    # -- one layout -----------------------------------------------------------------------------

    def meters(
        self,
        positions_m: np.ndarray,
        gain: np.ndarray | None = None,
        axes: np.ndarray | None = None,
        grades=None,
    ) -> Meters:
        """The installed meters followed by new ones at ``positions_m``.

        Parameters
        ----------
        positions_m : (n_new, 3) float
            New probes, m.
        gain : (n_new,) float or None
            Their calibration factors (default: :meth:`gain_at`).
        axes : (n_new, n_axes, 3) float or None
            Each new meter's axes, zero rows for unused ones (default: ``[probes] component``).
        grades : sequence of n_new str or None
            Each new meter's grade by name, "" for the noise of ``[probes]`` itself (default:
            the grade this problem plans with).

        Returns
        -------
        Meters
        """
        pos = np.asarray(positions_m, dtype=float)
        if pos.ndim != 2 or pos.shape[1] != 3 or not np.all(np.isfinite(pos)):
            raise ValueError(
                f"`positions_m` must be a finite array of shape (n_probes, 3) in metres; "
                f"got shape {pos.shape}."
            )
        n_new = pos.shape[0]
        g_new = self.gain_at(pos) if gain is None else np.asarray(gain, dtype=float).reshape(-1)
        if axes is None:
            axes = np.broadcast_to(self.new_axes, (n_new, *self.new_axes.shape))
        axes = np.asarray(axes, dtype=float)
        names = (self.new_grade,) * n_new if grades is None else tuple(grades)
        _check_new_meters(n_new, g_new, gain, axes, names, self.grades)
        n_inst = self.installed_m.shape[0]
        return stack_meters(
            np.concatenate([self.installed_m, pos]),
            [*self.installed_axes, *axes],
            np.concatenate([self.installed_gain, g_new]),
            np.arange(n_inst + n_new) < n_inst,
            [(g, self.grades[g]) for g in (*self.installed_grade, *names)],
        )

    def score(
        self,
        positions_m: np.ndarray,
        gain: np.ndarray | None = None,
        axes: np.ndarray | None = None,
        grades=None,
    ) -> Score:
        """Score one layout of new probes (installed probes are added in front).

        Parameters
        ----------
        positions_m : (n_probes, 3) float
            New probes only.
        gain : (n_probes,) float or None
            Default: :meth:`gain_at`.
        axes, grades
            Each new probe's own axes and grade, as in :meth:`meters` (default: those of
            ``[probes]`` and of the grade this problem plans with).

        Returns
        -------
        Score
        """
        pos = np.asarray(positions_m, dtype=float).reshape(-1, 3)
        gain = self.gain_at(pos) if gain is None else np.asarray(gain, dtype=float)
        meters = self.meters(pos, gain, axes, grades)
        new = meters.take(~meters.installed)
        rows_new, sat_new = self.rows(pos, gain, new.axes, new)
        n_inst = self.installed_m.shape[0]
        if n_inst:
            rows_inst, sat_inst = self.installed_rows()
            sat = np.concatenate([_any_axis(sat_inst), _any_axis(sat_new)], axis=1)
        else:
            sat = _any_axis(sat_new)
        info = self.fisher_installed + fisher_from_rows(
            rows_new.reshape(self.n_scenarios, -1, self.n_params)
        )
        per = self.criterion.per_scenario(info, self.theta_est)
        value = float(aggregate(per, self.aggregate, self.criterion.maximise))
        crb, singular, worst, unresolved = _bounds_and_worst(
            info, per, self.criterion, self.names, ground=self.scene.ground_z_m is not None
        )
        return Score(
            positions_m=np.concatenate([self.installed_m, pos]),
            installed=np.arange(n_inst + pos.shape[0]) < n_inst,
            gain=np.concatenate([self.installed_gain, gain]),
            names=self.names,
            theta=self.theta_est,
            fisher=info,
            crb_std=crb,
            per_scenario=per,
            value=value,
            criterion=self.criterion.name,
            aggregate=self.aggregate,
            singular=singular,
            saturated=sat.mean(axis=0),
            unresolved=unresolved,
            unresolved_scenario=worst,
            failure_values=(
                self.failure_values(pos, gain, new) if pos.shape[0] + n_inst > 1 else None
            ),
            axes=meters.axes,
            grade=meters.grade,
            enhancement=_enhancement(self, np.concatenate([self.installed_m, pos]), meters.axes),
        )


def _enhancement(problem, positions_m: np.ndarray, axes: np.ndarray) -> np.ndarray | None:
    """Each meter's reading with the structures over the undisturbed one, nominal scenario.

    Parameters
    ----------
    positions_m : (n_probes, 3) float
    axes : (n_probes, n_axes, 3) float

    Returns
    -------
    (n_probes,) float or None
        ‖axes · E‖ with the structures over the same without them (1 where that is 0);
        None without structures.
    """
    if problem.scene.structures is None:
        return None
    bare = replace(problem.scene, structures=None)
    theta = problem.theta[:1]
    with_s, _ = problem.scene.evaluate(theta, positions_m, jacobian=False)
    without, _ = bare.evaluate(theta, positions_m, jacobian=False)
    num = np.linalg.norm(np.einsum("pac,pc->pa", axes, with_s[0]), axis=1)
    den = np.linalg.norm(np.einsum("pac,pc->pa", axes, without[0]), axis=1)
    return np.divide(num, den, out=np.ones_like(num), where=den > 0)


def _any_axis(sat: np.ndarray) -> np.ndarray:
    return np.any(sat, axis=-1)


def _check_new_meters(
    n_new: int, gain_new: np.ndarray, gain, axes: np.ndarray, grades: tuple, known: dict
) -> None:
    """Raise ``ValueError`` unless the new meters' gains ``(n_new,)``, axes ``(n_new, n_axes,
    3)`` and grade names (keys of ``known``) fit ``n_new`` probes; ``gain`` is the argument as
    the caller gave it, for the message."""
    if gain_new.shape != (n_new,) or not np.all(np.isfinite(gain_new) & (gain_new > 0)):
        raise ValueError(
            f"`gain` must hold {n_new} finite numbers > 0 (one per new probe); got "
            f"{np.asarray(gain).tolist()}."
        )
    if axes.ndim != 3 or axes.shape[0] != n_new or axes.shape[2] != 3:
        raise ValueError(
            f"`axes` must have shape ({n_new}, n_axes, 3), one table per new probe; "
            f"got {axes.shape}."
        )
    unknown = [g for g in grades if g not in known]
    if len(grades) != n_new or unknown:
        listed = ", ".join(repr(g) for g in known if g) or "none"
        raise ValueError(
            f"`grades` must name {n_new} grades, one per new probe, each '' (the [probes] "
            f"table) or one of: {listed}; got {list(grades)}."
        )


def _bounds_and_worst(
    info: np.ndarray, per: np.ndarray, criterion: Criterion, names: tuple[str, ...], ground: bool
) -> tuple[np.ndarray, np.ndarray, int, list]:
    """Cramér–Rao bounds of one layout and what its worst scenario leaves unresolved.

    Parameters
    ----------
    info : (n_scenarios, n_params, n_params) float
        J of the layout in each scenario.
    per : (n_scenarios,) float
        The criterion of each scenario.

    Returns
    -------
    crb_std : (n_scenarios, n_params) float
    singular : (n_scenarios,) bool
    worst : int
        The scenario that scores worst; 0 (nominal) when none is worse than it.
    unresolved : list of Direction
        Of scenario ``worst``.
    """
    cov, singular = covariance(info)
    crb = np.sqrt(np.diagonal(cov, axis1=-2, axis2=-1))
    worst = int(np.argmin(per) if criterion.maximise else np.argmax(per))
    worst = worst if per[worst] != per[0] else 0
    return crb, singular, worst, unresolved_directions(info[worst], names, ground=ground)


def _chunk_information(problem: Problem, layouts_m: np.ndarray, gains: np.ndarray | None):
    """Fisher information ``(k, S, p, p)`` of a chunk of layouts ``(k, n_probes, 3)`` (m),
    installed meters included; ``gains (k, n_probes)`` or None for the new probes' gain."""
    k, n_p, _ = layouts_m.shape
    pos = layouts_m.reshape(-1, 3)
    g = np.full(k * n_p, problem.new_gain) if gains is None else gains.reshape(-1)
    if problem.shards is not None and problem.shards.wants(problem.n_scenarios, k * n_p):
        rows = problem.rows(pos, g)[0].reshape(problem.n_scenarios, k, -1, problem.n_params)
        return np.moveaxis(fisher_from_rows(rows), 0, 1) + problem.fisher_installed
    # Rows and their products in one compiled pass (the rows are never stored).
    e, jac = problem.scene.evaluate(problem.theta, pos, columns=problem.est_cols)
    axes = np.broadcast_to(problem.new_axes, (k * n_p, *problem.new_axes.shape))
    weights, _ = reading_weights(e, axes, g, problem.noise)
    return layout_information(jac, axes, weights, problem.fisher_installed, k)


def build_problem(
    config, *, count: int | None = None, grade=None, layout_axes: np.ndarray | None = None
) -> Problem:
    """Assemble the planning problem of a config.

    Parameters
    ----------
    config : probeplan.config.Config
    count : int or None
        Number of new probes (default ``config.probes.count``).
    grade : probeplan.config.Grade or None
        Meter grade whose noise and range replace those of ``[probes]`` for the new meters (for
        budgets); installed meters keep their own (``[[probes.installed]] grade``, by default
        that of ``[probes]``).
    layout_axes : (n_new, n_axes, 3) float or None
        The new meters' own axes, when a given layout says what each one reads (scoring): they
        decide, with the installed meters' axes, which background components are estimated.

    Returns
    -------
    Problem
    """
    pr = config.probes
    structures = None
    if config.structures:
        from .bem import Structures  # only a config with structures pays for the solver

        structures = Structures.build(
            config.structures, config.ground_z_m, meters_m=config.structure_meters_m
        )
    scene = Scene(
        tuple(s.source for s in config.sources),
        config.ground_z_m,
        background=config.background is not None,
        structures=structures,
    )
    rng = np.random.default_rng(config.seed)
    theta = draw_scenarios(config, scene, rng)
    names_all = scene.param_names
    est = [f"s{i}.{n}" for i, s in enumerate(config.sources) for n in s.estimate]
    inst = config.installed
    installed_axes = axes_table([p.component or pr.component for p in inst])
    if config.background is not None and config.background.estimate:
        new_axes = component_axes(pr.component) if layout_axes is None else layout_axes
        seen_axes = np.concatenate([new_axes.reshape(-1, 3), installed_axes.reshape(-1, 3)])
        seen = _seen_background(seen_axes)
        est += [n for n, k in zip(BACKGROUND_PARAMS, seen, strict=True) if k]
    est_cols = np.array([names_all.index(n) for n in est], dtype=int)
    criterion = _bind_criterion(config, tuple(est))
    grades = {"": Noise(pr.noise_v_per_m, pr.relative_noise, pr.range_v_per_m)}
    grades |= {
        g.name: Noise(g.noise_v_per_m, g.relative_noise, g.range_v_per_m) for g in config.grades
    }
    new_grade = grade.name if grade else ""
    installed_m = np.array([p.position_m for p in inst], dtype=float).reshape(-1, 3)
    installed_gain = np.array([p.gain for p in inst], dtype=float)
    problem = Problem(
        config=config,
        scene=scene,
        theta=theta,
        est_cols=est_cols,
        names=tuple(est),
        criterion=criterion,
        aggregate=config.design.aggregate,
        count=pr.count if count is None else int(count),
        new_axes=component_axes(pr.component),
        new_gain=float(pr.gain),
        installed_m=installed_m,
        installed_axes=installed_axes,
        installed_gain=installed_gain,
        installed_grade=tuple(p.grade or "" for p in inst),
        site=config.site(),
        fisher_installed=np.zeros((theta.shape[0], len(est), len(est))),
        grades=grades,
        new_grade=new_grade,
    )
    if installed_m.shape[0]:
        rows, _ = problem.installed_rows()
        info = fisher_from_rows(rows.reshape(theta.shape[0], -1, len(est)))
        problem = replace(problem, fisher_installed=info)
    return problem


def _seen_background(axes: np.ndarray) -> np.ndarray:
    """Which background components the meters can tell apart, ``(3,) bool`` for x, y, z.

    A uniform background adds axis · B to every reading, so the readings see B only through
    the span of the meters' axes: as many components as its rank (contract: "its components
    seen by the probes are estimated"). Components are taken in the order z, x, y while each
    adds to the rank; the others stay at their nominal values. For axis-aligned meters this is
    exactly the components some meter reads; a tilted axis [0, 0.6, 0.8] alone gives z only,
    since 0.6 B_y + 0.8 B_z cannot be split into its two terms.

    Parameters
    ----------
    axes : (n_axes, 3) float
        Every measurement axis of the new and installed meters (zero rows allowed).
    """
    rank = np.linalg.matrix_rank(axes, tol=1e-9) if axes.size else 0
    chosen: list[int] = []
    for k in (2, 0, 1):
        if len(chosen) == rank:
            break
        if np.linalg.matrix_rank(axes[:, chosen + [k]], tol=1e-9) == len(chosen) + 1:
            chosen.append(k)
    seen = np.zeros(3, dtype=bool)
    seen[chosen] = True
    return seen


def _bind_criterion(config, names: tuple[str, ...]) -> Criterion:
    name = config.design.criterion
    where = f"{config.path}: design.criterion"
    if name == "location":
        missing = [n for n in ("s0.x_m", "s0.y_m") if n not in names]
        if missing:
            raise InputError(
                f'{where} = "location" needs the horizontal position of source 0 estimated; '
                f'add "x" and "y" to source[0].estimate (missing: {", ".join(missing)}).'
            )
        return Criterion("location", x_index=names.index("s0.x_m"), y_index=names.index("s0.y_m"))
    if name == "charge":
        if "s0.charge_c" not in names:
            raise InputError(
                f'{where} = "charge" needs the charge of source 0 estimated; '
                'add "charge" to source[0].estimate.'
            )
        if config.sources[0].source.neutral:
            raise InputError(f'{where} = "charge" is relative to |q| and source 0 has q = 0.')
        return Criterion("charge", charge_index=names.index("s0.charge_c"))
    return Criterion(name)
