"""The forward model: superposed fields of many sources over a grounded plane, batched.

Layers:

* :class:`Scene` — a fixed set of sources (their kinds and shapes), an optional grounded plane
  and an optional uniform background field. Its parameter vector θ lists every source's
  parameters (``s{i}.charge_c, s{i}.x_m, …``) then the background (``bg.x_v_per_m, …``).
  :meth:`Scene.evaluate` gives the field and ∂E/∂θ for many scenarios (rows of θ) at once.
* :func:`field` and :func:`field_jacobian` — the public one-shot functions of the contract.

The grounded plane z = g is the method of images (e.g. Jackson, Classical Electrodynamics,
§2.1): each source gets a mirror image of opposite charge, and the field above the plane is
the sum of both. The image's parameters are the real ones with charge and height mirrored
(q' = −q, z' = 2g − z), so by the chain rule its Jacobian enters with those two columns negated.
"""

from __future__ import annotations

from collections.abc import Sequence
from dataclasses import dataclass, field

import numpy as np

from .lowrank import small_products
from .sources import (
    FOLDS_IMAGES,
    KERNELS,
    DensityGrid,
    Source,
    _call_compiled,
    _jit,
    _SourceBase,
    grid_entries,
)
from .sources.potentials import potential_kernel

BACKGROUND_PARAMS: tuple[str, ...] = ("bg.x_v_per_m", "bg.y_v_per_m", "bg.z_v_per_m")

# Scenario rows of structure responses a Scene keeps (see Scene._responses).
_MEMO_ROWS = 4096
# Whole blocks of scenarios whose responses a Scene keeps on their shared basis.
_MEMO_BLOCKS = 4
# Largest (kernel columns × kept columns) mapped by a matrix product in Scene._assemble
# (measured crossover with the in-place path: between 300 and 800, 64 scenarios, 1 MB blocks).
_SMALL_MAP = 512


@dataclass(frozen=True)
class _KindGroup:
    """All sources of one kind: where their parameters sit in θ and their fixed geometry."""

    kind: str
    columns: np.ndarray  # (N, P) int: global θ column of each source parameter
    geometry: object  # line: (N, 3) half vectors; grid: grid_entries(...); else None
    pair_geometry: object  # the same for the sources followed by their mirror images
    contiguous: bool  # columns == arange: the Jacobian block is a reshape, no scatter


@dataclass(frozen=True, eq=False)
class Scene:
    """Sources, ground and background whose fields are evaluated together.

    Parameters
    ----------
    sources : sequence of source objects
        Their kinds and shapes are fixed; charge, centre, radius and sigma come from θ.
    ground_z_m : float or None
        Height of the infinite grounded conducting plane in metres; ``None`` is free space.
    background : bool
        Whether θ ends with a uniform background field (3 components, V/m).
    structures : probeplan.bem.Structures or None
        Conducting structures, meshed and factored over the same plane: :meth:`evaluate` then
        adds the field of their induced charge, and its Jacobian, to every scenario (no point
        checks there: check points once with ``structures.check_points``).
    """

    sources: tuple[Source, ...]
    ground_z_m: float | None = None
    background: bool = False
    structures: object = None
    _groups: tuple[_KindGroup, ...] = field(init=False, repr=False)
    _names: tuple[str, ...] = field(init=False, repr=False)
    _memo: dict = field(init=False, repr=False, default_factory=dict)
    _blocks: dict = field(init=False, repr=False, default_factory=dict)
    _direct: dict = field(init=False, repr=False, default_factory=dict)

    def __post_init__(self) -> None:
        srcs = _as_sources(self.sources)
        object.__setattr__(self, "sources", srcs)
        if self.ground_z_m is not None:
            # A non-number used to surface as float()'s own message, naming no argument.
            try:
                g = float(self.ground_z_m)
            except (TypeError, ValueError):
                raise ValueError(
                    f"`ground_z_m` must be a finite number or None; got {self.ground_z_m!r}."
                ) from None
            if not np.isfinite(g):
                raise ValueError(f"`ground_z_m` must be a finite number or None; got {g}.")
            object.__setattr__(self, "ground_z_m", g)
            for i, s in enumerate(srcs):
                if not s.lowest_z_m() > g:
                    raise ValueError(
                        f"source {i} ({s.kind}) reaches down to z = {s.lowest_z_m():g} m, not above"
                        f" the ground plane at z = {g:g} m; every source must lie above the ground."
                    )
        # (built once: every evaluate reads the parameter count)
        names = [f"s{i}.{n}" for i, s in enumerate(srcs) for n in s.param_names]
        names = tuple(names) + (BACKGROUND_PARAMS if self.background else ())
        object.__setattr__(self, "_names", names)
        object.__setattr__(self, "_groups", self._build_groups())
        if self.structures is not None:
            if self.structures.ground_z_m != self.ground_z_m:
                raise ValueError(
                    "`structures` were solved over another ground plane "
                    f"({self.structures.ground_z_m!r}) than the scene's ({self.ground_z_m!r})."
                )
            if srcs:
                centres = np.array([s.center_m for s in srcs], dtype=float)
                self.structures.check_points(centres, name="source centres")

    # -- parameter bookkeeping ---------------------------------------------------------------

    @property
    def param_names(self) -> tuple[str, ...]:
        """All parameter names of θ, in order."""
        return self._names

    @property
    def n_params(self) -> int:
        return len(self.param_names)

    def nominal(self, background_v_per_m: Sequence[float] = (0.0, 0.0, 0.0)) -> np.ndarray:
        """θ of the sources as given, ``(n_params,) float``."""
        parts = [s.param_vector() for s in self.sources]
        if self.background:
            parts.append(np.asarray(background_v_per_m, dtype=float))
        return np.concatenate(parts) if parts else np.zeros(0)

    def _build_groups(self) -> tuple[_KindGroup, ...]:
        offsets = np.cumsum([0] + [len(s.param_names) for s in self.sources])
        groups = []
        for kind in KERNELS:
            members = [i for i, s in enumerate(self.sources) if s.kind == kind]
            if not members:
                continue
            n_p = len(self.sources[members[0]].param_names)
            cols = np.array([np.arange(offsets[i], offsets[i] + n_p) for i in members])
            geom, pair = _geometry(kind, [self.sources[i] for i in members])
            contiguous = bool(np.array_equal(cols.ravel(), np.arange(cols.size)))
            groups.append(_KindGroup(kind, cols, geom, pair, contiguous))
        return tuple(groups)

    # -- evaluation ------------------------------------------------------------------------------

    def evaluate(
        self,
        theta: np.ndarray,
        points_m: np.ndarray,
        *,
        jacobian: bool = True,
        columns: np.ndarray | None = None,
        out: np.ndarray | None = None,
    ) -> tuple[np.ndarray, np.ndarray | None]:
        """Field and parameter Jacobian for many scenarios at once.

        Parameters
        ----------
        theta : (n_scenarios, n_params) float
            One parameter vector per scenario (SI units, names in :attr:`param_names`).
        points_m : (n_points, 3) float
            Observation points in metres, shared by all scenarios; on or above the ground.
        jacobian : bool
            Whether to compute ∂E/∂θ.
        columns : (n_cols,) int or None
            Which θ columns the Jacobian keeps (default: all).
        out : (n_scenarios, n_points, 3, n_cols) float or None
            Where to write the Jacobian, reused between calls (as numpy's ``out=``): a large
            fresh array costs page faults on its first write, about as long as writing it.

        Returns
        -------
        field_v_per_m : (n_scenarios, n_points, 3) float
        jacobian : (n_scenarios, n_points, 3, n_cols) float or None
            ∂E_i/∂θ_j in V/m per unit of θ_j.

        Notes
        -----
        No input checks: this is the hot path. Use :func:`field` for checked one-shot calls.
        """
        n_s = theta.shape[0]
        n_pts = points_m.shape[0]
        total = None
        blocks = []  # (group, the kernel's Jacobian (S, M, 3, N or 2N, P), images listed)
        g = self.ground_z_m
        if out is not None:
            n_cols = self.n_params if columns is None else len(columns)
            if out.shape != (n_s, n_pts, 3, n_cols):
                raise ValueError(
                    f"`out` must have shape {(n_s, n_pts, 3, n_cols)} "
                    f"(n_scenarios, n_points, 3, n_cols); got {out.shape}."
                )
        cols = np.arange(self.n_params) if columns is None else np.asarray(columns, dtype=int)
        # One kind whose kernel folds the images in (or free space), its parameters first and
        # whole, then background columns if any: the kernel writes ∂E/∂θ straight into the
        # output, and the background columns are constants.
        direct = jacobian and self._writes_directly(cols)
        if direct and out is None:
            out = np.empty((n_s, n_pts, 3, cols.size))
        for grp in self._groups:
            params = theta[:, grp.columns]  # (S, N, P)
            kernel = KERNELS[grp.kind]
            if g is None or grp.kind in FOLDS_IMAGES:
                # (the images, if any, folded into the sources' columns by the kernel)
                buf = None
                if direct:
                    wide = grp.kind in FOLDS_IMAGES
                    buf = out if wide else out.reshape(n_s, n_pts, 3, *grp.columns.shape)
                fold = {} if g is None else {"ground_z": g}
                e, jac = kernel(params, points_m, grp.geometry, jacobian, buf, **fold)
                blocks.append((grp, jac, False))
            else:
                # Real sources and their images in one kernel call: N real then N images.
                mirrored = params.copy()
                mirrored[..., 0] *= -1.0
                mirrored[..., 3] = 2.0 * g - mirrored[..., 3]
                both = np.concatenate([params, mirrored], axis=1)
                e, jac = kernel(both, points_m, grp.pair_geometry, jacobian)
                blocks.append((grp, jac, True))
            total = e if total is None else np.add(total, e, out=total)  # (e: a fresh array)
        if total is None:
            total = np.zeros((n_s, n_pts, 3))
        if self.background:
            # (numpy's broadcast over the short last axis took as long as the sources' own
            # compiled loop on a scoring chunk)
            _call_compiled(_add_background, total, np.ascontiguousarray(theta[:, -3:], dtype=float))
        if not jacobian:
            if self.structures is not None:
                total += self.structures.field_of(points_m, self._responses(theta, None))[0]
            return total, None
        if direct:
            full = out
            if not np.shares_memory(blocks[0][1], out):  # (a reshape of a strided `out` copies)
                out[...] = blocks[0][1].reshape(out.shape)
            n_own = blocks[0][0].columns.size
            if cols.size > n_own:  # the background's columns ∂E_i/∂bg_k = δ_ik
                _call_compiled(_background_columns, full, n_own, cols[n_own:] - (self.n_params - 3))
        else:
            full = self._assemble(blocks, cols, n_s, n_pts)
            if out is not None:
                out[...] = full
                full = out
        if self.structures is not None:
            e_ind, j_ind = self.structures.field_of(points_m, self._responses(theta, cols))
            total += e_ind
            full += j_ind
        return total, full

    def _writes_directly(self, cols: np.ndarray) -> bool:
        """Whether one kernel call writes the Jacobian of the kept ``cols`` in place: one kind,
        no structures, the images (if any) folded in by the kernel, the kind's columns first,
        all kept and in order, then (for a kernel that writes into wider rows) only background
        columns, in order. Remembered per column set (a scene is asked for a few, often)."""
        key = cols.tobytes()
        found = self._direct.get(key)
        if found is None:
            found = self._direct[key] = self._direct_for(cols)
        return found

    def _direct_for(self, cols: np.ndarray) -> bool:
        if self.structures is not None or len(self._groups) != 1:
            return False
        grp = self._groups[0]
        if not grp.contiguous or (self.ground_z_m is not None and grp.kind not in FOLDS_IMAGES):
            return False
        n_own = grp.columns.size
        rest = cols[n_own:]
        return bool(
            (cols.size >= n_own if grp.kind in FOLDS_IMAGES else cols.size == n_own)
            and np.array_equal(cols[:n_own], np.arange(n_own))
            and np.all(rest >= self.n_params - 3 * self.background)
            and np.all(np.diff(rest) > 0)
            and np.all(rest < self.n_params)
        )

    def prime(self, theta: np.ndarray, columns: np.ndarray) -> None:
        """Solve the structures' responses to every scenario of ``theta`` ``(n_scenarios,
        n_params)`` at once, as a first :meth:`evaluate` with these Jacobian ``columns`` would,
        and keep them. A copy of the scene sent elsewhere (a cluster's workers) then evaluates
        any block of these scenarios with the same numbers, to the bit, as here: a multithreaded
        BLAS may round a block's own solve otherwise. Nothing without structures."""
        if self.structures is not None:
            found = self._responses(theta, np.asarray(columns, dtype=int))
            found.reduced(self.structures.skeleton)  # the far form too, sent with the scene

    def _responses(self, theta: np.ndarray, cols: np.ndarray | None):
        """The structures' responses to ``theta`` (:class:`probeplan.lowrank.Responses`).

        A plan evaluates the same scenarios at many point sets: the last blocks of scenarios
        are kept whole (with what the far field makes of them), and rows one by one, so that
        a block made of rows seen before is not solved for again.
        """
        ckey = None if cols is None else np.asarray(cols).tobytes()
        block_key = (ckey, theta.shape, theta.tobytes())
        found = self._blocks.get(block_key)
        if found is not None:
            return found[0]
        rows = [row.tobytes() for row in theta]
        for (key, _, _), (whole, where) in list(self._blocks.items()):
            if key == ckey and all(r in where for r in rows):
                # a block of scenarios kept whole (a shard of a primed scene): its numbers, to
                # the bit, whatever BLAS would round for this block on its own
                found = whole.subset(np.array([where[r] for r in rows]))
                break
        else:
            found = self.structures.responses_of(*self._response_rows(theta, cols, ckey))
        if len(self._blocks) >= _MEMO_BLOCKS:
            self._blocks.clear()
        self._blocks[block_key] = (found, {r: i for i, r in enumerate(rows)})
        return found

    def _response_rows(self, theta: np.ndarray, cols: np.ndarray | None, ckey):
        """σ ``(n_panels, S)`` and ∂σ/∂θ ``(n_panels, S * n_cols)`` (or None), kept per
        scenario row: only rows not seen before are solved for."""
        keys = [(ckey, row.tobytes()) for row in theta]
        missing = [i for i, k in enumerate(keys) if k not in self._memo]
        if missing:
            sub = theta[missing]
            sigma, d_sigma = self.structures.responses(self, sub, cols, cols is not None)
            n_cols = 0 if d_sigma is None else d_sigma.shape[1] // len(missing)
            if len(self._memo) + len(missing) > _MEMO_ROWS:
                self._memo.clear()
            for j, i in enumerate(missing):
                d = None if d_sigma is None else d_sigma[:, j * n_cols : (j + 1) * n_cols]
                self._memo[keys[i]] = (sigma[:, j], d)
        # (read once per row: safe when threads share the scene)
        rows = [self._memo.get(k) or self._solve_row(theta[i], cols) for i, k in enumerate(keys)]
        sigma = np.stack([r[0] for r in rows], axis=1)
        if cols is None:
            return sigma, None
        return sigma, np.concatenate([r[1] for r in rows], axis=1)

    def _solve_row(self, row: np.ndarray, cols):
        sigma, d_sigma = self.structures.responses(self, row[None], cols, cols is not None)
        return sigma[:, 0], d_sigma

    def potential(
        self, theta: np.ndarray, points_m: np.ndarray, *, jacobian: bool = True
    ) -> tuple[np.ndarray, np.ndarray | None]:
        """Potential of the sources (with their images) and the background, and ∂φ/∂θ.

        Parameters
        ----------
        theta : (n_scenarios, n_params) float
        points_m : (n_points, 3) float
            Points in metres (the boundary-element solve's collocation points).
        jacobian : bool

        Returns
        -------
        potential_v : (n_scenarios, n_points) float
            Volts, zero on the grounded plane (and at infinity in free space). The background
            field's potential is −E_bg·(x − x_g), x_g the origin's foot on the plane (the origin
            in free space), so it is zero there too.
        jacobian : (n_scenarios, n_points, n_params) float or None
            ∂φ/∂θ in V per unit of θ, columns as :attr:`param_names`.
        """
        n_s, n_pts = theta.shape[0], points_m.shape[0]
        total = np.zeros((n_s, n_pts))
        full = np.zeros((n_s, n_pts, self.n_params)) if jacobian else None
        g = self.ground_z_m
        for grp in self._groups:
            params = theta[:, grp.columns]
            n_src = grp.columns.shape[0]
            if g is None:
                phi, jac = potential_kernel(grp.kind, params, points_m, grp.geometry, jacobian)
            else:
                mirrored = params.copy()
                mirrored[..., 0] *= -1.0
                mirrored[..., 3] = 2.0 * g - mirrored[..., 3]
                both = np.concatenate([params, mirrored], axis=1)
                phi, jac = potential_kernel(grp.kind, both, points_m, grp.pair_geometry, jacobian)
                if jacobian:
                    img = jac[:, :, n_src:]
                    img[..., 0] *= -1.0  # chain rule through q' = −q, z' = 2g − z
                    img[..., 3] *= -1.0
                    jac = jac[:, :, :n_src] + img
            total += phi
            if jacobian:
                full[:, :, grp.columns.ravel()] += jac.reshape(n_s, n_pts, -1)
        if self.background:
            rel = points_m - np.array([0.0, 0.0, 0.0 if g is None else g])
            total -= theta[:, -3:] @ rel.T
            if jacobian:
                full[:, :, -3:] -= rel[None]
        return total, full

    def _assemble(self, blocks, cols: np.ndarray, n_s: int, n_pts: int) -> np.ndarray:
        """∂E/∂θ of the kept columns from the kernels' blocks, ``(S, M, 3, n_cols)``.

        ``blocks``: (group, its kernel's Jacobian, whether it lists the images as sources).
        Image columns enter with charge and height negated (chain rule through q' = −q,
        z' = 2g − z). A kind with few parameters is mapped onto the kept θ columns by one
        small matrix product with a 0/±1 matrix, which replaces strided adds, a scatter and a
        column gather (every entry is still real ± image rounded once, and the kernels return
        finite values, so the zeros of the matrix add exact zeros). With many sources that
        matrix would grow with the square of the parameter count, so there the images are
        added in place and the kept columns copied.
        """
        n_rows = n_s * n_pts * 3
        shape = (n_s, n_pts, 3, cols.size)
        full = None
        for grp, jac, ground in blocks:
            n_src, n_par = grp.columns.shape
            kept = grp.columns.reshape(-1, 1) == cols[None, :]  # (N*P, n_cols)
            n_in = jac.shape[3] * n_par
            if n_in * cols.size <= _SMALL_MAP:
                m = kept.astype(float)
                if ground:
                    sign = np.where(np.isin(np.arange(n_par), (0, 3)), -1.0, 1.0)
                    m = np.concatenate([m, m * np.tile(sign, n_src)[:, None]])
                block = jac.reshape(n_rows, n_in)
                if full is None:
                    full = np.empty(shape)
                    small_products(block, m, full.reshape(n_rows, cols.size))
                else:
                    full.reshape(n_rows, cols.size)[...] += small_products(
                        block, m, np.empty((n_rows, cols.size))
                    )
                continue
            if full is None:
                full = np.zeros(shape)
            if ground:
                img = jac[:, :, :, n_src:]
                img[..., 0] *= -1.0
                img[..., 3] *= -1.0
                jac = jac[:, :, :, :n_src]
                jac += img
            src = jac.reshape(n_s, n_pts, 3, n_src * n_par)
            j_out = np.flatnonzero(kept.any(axis=0))
            f_src = kept.argmax(axis=0)[j_out]
            full[..., j_out] = src[..., f_src]
        if full is None:
            full = np.zeros(shape)
        if self.background:
            first = self.n_params - 3
            j = np.flatnonzero(cols >= first)
            full[:, :, cols[j] - first, j] += 1.0
        return full


def _geometry(kind: str, members: list) -> tuple[object, object]:
    """Fixed shape data of a kind group, and of the group followed by its mirror images."""
    if kind == "line":
        hv = np.array([m.half_vector_m for m in members])
        return hv, np.concatenate([hv, hv * np.array([1.0, 1.0, -1.0])])
    if kind == "grid":
        grids = grid_entries(members)
        # The image density is negated here, not only through the charge parameter: a neutral
        # grid has no charge to negate (its kernel keeps the density as given), and without the
        # sign its image doubled the tangential field on the plane instead of cancelling it.
        # Its total charge and neutrality are the real grid's, negated, not summed again: a
        # near-neutral sum in another order could flip between neutral and charged.
        images = tuple(
            (DensityGrid(-g.density_c_per_m3[:, :, ::-1], g.origin_m, g.spacing_m), -q, neutral)
            for g, q, neutral in grids
        )
        return grids, grids + images
    return None, None


def _as_sources(sources) -> tuple[Source, ...]:
    if isinstance(sources, _SourceBase):
        sources = (sources,)
    try:
        out = tuple(sources)
    except TypeError:
        raise ValueError(
            "`sources` must be a source object or a sequence of them; "
            f"got {type(sources).__name__}."
        ) from None
    for i, s in enumerate(out):
        if not isinstance(s, _SourceBase):
            raise ValueError(
                f"`sources[{i}]` must be a PointCharge, LineCharge, SphereCharge, GaussianCharge "
                f"or DensityGrid; got {type(s).__name__}."
            )
    return out


def check_points(points_m, ground_z_m: float | None = None, name: str = "points_m") -> np.ndarray:
    """Validate observation points: ``(n_points, 3)`` finite, none below the ground plane.

    Returns the points as a float array; raises ``ValueError`` naming the first bad row.
    """
    pts = np.asarray(points_m, dtype=float)
    if pts.ndim != 2 or pts.shape[1] != 3:
        raise ValueError(
            f"`{name}` must have shape (n_points, 3) in metres; got shape {pts.shape}."
        )
    bad = ~np.all(np.isfinite(pts), axis=1)
    if np.any(bad):
        i = int(np.argmax(bad))
        raise ValueError(f"`{name}` row {i} must be finite; got {pts[i].tolist()}.")
    if ground_z_m is not None:
        below = pts[:, 2] < ground_z_m
        if np.any(below):
            i = int(np.argmax(below))
            raise ValueError(
                f"`{name}` row {i} at z = {pts[i, 2]:g} m is below the ground plane at z = "
                f"{ground_z_m:g} m; the field inside the conductor is zero and not modelled."
            )
    return pts


def field(
    sources,
    points_m,
    ground_z_m: float | None = None,
    *,
    conductors=(),
    background_v_per_m=None,
) -> np.ndarray:
    """Superposed electric field of ``sources`` at ``points_m``.

    Parameters
    ----------
    sources : source object or sequence of them
        ``PointCharge``, ``LineCharge``, ``SphereCharge``, ``GaussianCharge``, ``DensityGrid``.
    points_m : (n_points, 3) float
        Observation points in metres.
    ground_z_m : float or None
        ``None`` for free space; a number places an infinite grounded conducting plane at that
        height (method of images). Every source must lie above it, every point on or above it.
    conductors : sequence of Conductor
        Conducting structures (:class:`probeplan.Conductor`); their induced surface charge is
        solved for (boundary elements, :mod:`probeplan.bem`) and its field added. A point
        inside a structure, or nearer its surface than the panel size there, is refused.
    background_v_per_m : (3,) float or None
        A uniform background field (the fair-weather field), V/m. Structures distort it too:
        its potential is −E_bg·(x − x_g), x_g on the plane below the origin (the origin in
        free space), so a grounded structure is at the plane's potential.

    Returns
    -------
    (n_points, 3) float
        The field in V/m, physics sign convention (pointing away from positive charge).

    Raises
    ------
    ValueError
        Bad shapes, non-finite values, a source below the plane, or a point on a point or line
        charge (the message names the point); ``InputError`` (a ``ValueError``) for a point or
        a source inside or too near a structure.
    """
    e, _ = field_jacobian(
        sources,
        points_m,
        ground_z_m,
        conductors=conductors,
        background_v_per_m=background_v_per_m,
        jacobian=False,
    )
    return e


def field_jacobian(
    sources,
    points_m,
    ground_z_m: float | None = None,
    *,
    conductors=(),
    background_v_per_m=None,
    jacobian: bool = True,
) -> tuple[np.ndarray, np.ndarray | None]:
    """Field and its derivatives with respect to every source parameter.

    Parameters are as for :func:`field`.

    Returns
    -------
    field_v_per_m : (n_points, 3) float
    jacobian : (n_points, 3, n_params) float
        ∂E/∂θ with θ ordered ``s0.charge_c, s0.x_m, s0.y_m, s0.z_m, [s0.radius_m | s0.sigma_m],
        s1.charge_c, …`` (see :attr:`Scene.param_names`), then ``bg.x_v_per_m, bg.y_v_per_m,
        bg.z_v_per_m`` when ``background_v_per_m`` is given. With conductors, every column
        holds the induced charge's response too: ∂E/∂θ = ∂E_ext/∂θ − K A⁻¹ ∂φ_ext/∂θ.
    """
    return _field_jacobian(
        sources, points_m, ground_z_m, conductors, background_v_per_m, jacobian, None
    )


def _field_jacobian(sources, points_m, ground_z_m, conductors, background, jacobian, mounted):
    """:func:`field_jacobian` with ``mounted``: ``(n_points,) bool`` rows that are meters
    mounted on a structure, exempt from the too-near-a-surface rule."""
    bg = None
    if background is not None:
        bg = np.asarray(background, dtype=float)
        if bg.shape != (3,) or not np.all(np.isfinite(bg)):
            raise ValueError(
                f"`background_v_per_m` must be 3 finite numbers (V/m); got {background!r}."
            )
    srcs = _as_sources(sources)
    ground = Scene(srcs, ground_z_m).ground_z_m  # checks the plane and the sources over it
    pts = check_points(points_m, ground)
    meters = None if mounted is None else pts[np.asarray(mounted, dtype=bool)]
    structures = _structures(conductors, ground, meters)
    scene = Scene(srcs, ground, background=bg is not None, structures=structures)
    if structures is not None:
        structures.check_points(pts, mounted=mounted)
    theta = scene.nominal(() if bg is None else bg)[None, :]
    e, jac = scene.evaluate(theta, pts, jacobian=jacobian)
    return e[0], (jac[0] if jac is not None else None)


def _structures(conductors, ground_z_m: float | None, meters_m=None):
    """The meshed, factored structures over the plane (the automatic mesh finer near
    ``meters_m``), or ``None`` without any."""
    from .bem import Structures
    from .conductors import Conductor

    if isinstance(conductors, Conductor):
        conductors = (conductors,)
    conductors = tuple(conductors)
    for i, c in enumerate(conductors):
        if not isinstance(c, Conductor):
            raise ValueError(f"`conductors[{i}]` must be a Conductor; got {type(c).__name__}.")
    if not conductors:
        return None
    return Structures.build(conductors, ground_z_m, meters_m=meters_m)


__all__ = ["BACKGROUND_PARAMS", "Scene", "check_points", "field", "field_jacobian"]


@_jit
def _add_background(total, bg):
    """Add the uniform background ``bg (S, 3)`` to the field ``total (S, M, 3)``, in place."""
    n_s, n_m = total.shape[0], total.shape[1]
    for s in range(n_s):
        b0, b1, b2 = bg[s, 0], bg[s, 1], bg[s, 2]
        for m in range(n_m):
            total[s, m, 0] += b0
            total[s, m, 1] += b1
            total[s, m, 2] += b2


@_jit
def _background_columns(jac, first, comps):
    """Write the background's kept Jacobian columns ``jac[..., first + j]`` (component
    ``comps[j]``): ∂E_i/∂bg_k = δ_ik, ``jac (S, M, 3, C)``. numpy's strided assignment of
    them took as long as the sources' own compiled loop on a scoring chunk."""
    n_s, n_m = jac.shape[0], jac.shape[1]
    for j in range(comps.size):
        col = first + j
        k = comps[j]
        v0, v1, v2 = 1.0 if k == 0 else 0.0, 1.0 if k == 1 else 0.0, 1.0 if k == 2 else 0.0
        for s in range(n_s):
            for m in range(n_m):
                jac[s, m, 0, col] = v0
                jac[s, m, 1, col] = v1
                jac[s, m, 2, col] = v2
