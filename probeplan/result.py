"""Result objects of the commands: what ``store`` writes and ``report`` prints.

One :class:`Result` per command run, built by :func:`make_result` only, so its fields cannot
drift between the commands. Sections that a command does not produce are ``None``.
"""

from __future__ import annotations

import datetime as _dt
from dataclasses import dataclass, field

import numpy as np

# The sections live in the leaf module so that the stages that make them need not import
# this one; they are importable from here too.
from ._version import package_version
from .geo import Frame
from .resulttypes import Baseline as Baseline
from .resulttypes import BudgetTable, Changes, Score, SearchInfo, StructureSurfaces


def compare_structures(
    old: dict[str, np.ndarray], new: dict[str, np.ndarray], tol_m: float = 1e-3
) -> dict:
    """Match the conducting structures of two configs by name.

    Parameters
    ----------
    old, new : dict of str to (2, 3) float
        Each structure's bounding box (lowest and highest corner of its panels), m.
    tol_m : float
        A corner that moves by more than this counts as a change, m.

    Returns
    -------
    dict with the ``structures_*`` fields of :class:`Changes`: names added, removed and
    changed (in the new config's order), and each changed one's centre shift and sizes
    before and after ((n_changed, 3) float, m).
    """
    both = [n for n in new if n in old]
    changed = [n for n in both if np.abs(new[n] - old[n]).max() > tol_m]
    lo_hi = np.array([[old[n], new[n]] for n in changed]).reshape(-1, 2, 2, 3)
    return {
        "structures_added": tuple(n for n in new if n not in old),
        "structures_removed": tuple(n for n in old if n not in new),
        "structures_changed": tuple(changed),
        "structures_shift_m": lo_hi[:, 1].mean(axis=1) - lo_hi[:, 0].mean(axis=1),
        "structures_old_size_m": lo_hi[:, 0, 1] - lo_hi[:, 0, 0],
        "structures_new_size_m": lo_hi[:, 1, 1] - lo_hi[:, 1, 0],
    }


def stored_structure_boxes(surfaces: StructureSurfaces | None) -> dict[str, np.ndarray]:
    """Each stored structure's bounding box, ``{name: (2, 3) float}``, m ({} for None)."""
    if surfaces is None:
        return {}
    corners = np.asarray(surfaces.vertices_m)[np.asarray(surfaces.faces)]
    owner = np.asarray(surfaces.owner)
    return {
        name: np.stack([corners[owner == k].min(axis=(0, 1)), corners[owner == k].max(axis=(0, 1))])
        for k, name in enumerate(surfaces.names)
        if np.any(owner == k)
    }


def compare_layouts(
    old_m: np.ndarray, new_m: np.ndarray, move_radius_m: float, tol_m: float = 1e-6
) -> dict[str, np.ndarray]:
    """Match an old and a new layout probe by probe.

    Probes are paired by the assignment that minimises the total distance (Hungarian method,
    scipy.optimize.linear_sum_assignment). A pair closer than ``tol_m`` is kept, one closer
    than ``move_radius_m`` moved; the other old probes are removed, the other new ones added.

    Parameters
    ----------
    old_m : (n_old, 3) float
    new_m : (n_new, 3) float
    move_radius_m : float
    tol_m : float

    Returns
    -------
    dict with ``kept_m``, ``moved_from_m``, ``moved_to_m``, ``added_m``, ``removed_m``
    (each (k, 3) float).
    """
    from scipy.optimize import linear_sum_assignment

    old_m = np.asarray(old_m, dtype=float).reshape(-1, 3)
    new_m = np.asarray(new_m, dtype=float).reshape(-1, 3)
    dist = np.linalg.norm(old_m[:, None, :] - new_m[None, :, :], axis=-1)
    r, c = linear_sum_assignment(dist) if dist.size else (np.zeros(0, int), np.zeros(0, int))
    d = dist[r, c]
    kept = d <= tol_m
    moved = (d > tol_m) & (d <= move_radius_m)
    paired_old = set(r[kept | moved].tolist())
    paired_new = set(c[kept | moved].tolist())
    empty = np.zeros((0, 3))
    return {
        "kept_m": new_m[c[kept]] if kept.any() else empty,
        "moved_from_m": old_m[r[moved]] if moved.any() else empty,
        "moved_to_m": new_m[c[moved]] if moved.any() else empty,
        "added_m": new_m[[j for j in range(len(new_m)) if j not in paired_new]].reshape(-1, 3),
        "removed_m": old_m[[i for i in range(len(old_m)) if i not in paired_old]].reshape(-1, 3),
    }


@dataclass(frozen=True, eq=False)
class Result:
    """Everything a command produced, with its provenance.

    Attributes
    ----------
    command : {"plan", "score", "budget"}
    config_text, config_path, title : str
    seed : int
    version, created_utc : str
    caution : {"lightning", "esd", "high-voltage", "none"}
    ground_z_m : float or None
    score : Score
        The layout's score (the plan, the given layout, or the budget's cheapest option).
    search : SearchInfo or None
    budget : BudgetTable or None
    complete : bool
        False when the run was interrupted and holds the best layout found so far.
    extra : dict
        Named figures worth keeping (e.g. the D-efficiency), str -> float.
    changes : Changes or None
        What changed against an earlier result (``--from``).
    simulation : probeplan.simulate.Simulation or None
        Achieved errors of simulated fits beside the bounds (``simulate``).
    location : probeplan.locate.Location or None
        Fits of recorded readings, meter health and the delivery check (``locate``).
    probe_names : tuple of n_probes str or None
        Names of all probes, installed first (None: the installed names of the config, then
        ``new-k``).
    notes : tuple of str
        Things the user must know about this result (rule violations of a scored layout, which
        budget option the layout is), printed with the summary.
    frame : Frame or None
        The config's ``[frame]``: the WGS84 origin of the local metres (maps, lon/lat out).
    structures : StructureSurfaces or None
        The conducting structures' panels and induced charge (``[[structure]]``), or None.
    source_names : tuple of n_sources str or None
        The ``[[source]] name`` of every source (``s{i}`` by default); None in results stored
        before sources had names.
    """

    command: str
    config_text: str
    config_path: str
    title: str
    seed: int
    version: str
    created_utc: str
    caution: str
    ground_z_m: float | None
    score: Score
    search: SearchInfo | None = None
    budget: BudgetTable | None = None
    complete: bool = True
    extra: dict = field(default_factory=dict)
    changes: Changes | None = None
    simulation: object | None = None
    probe_names: tuple[str, ...] | None = None
    notes: tuple[str, ...] = ()
    frame: Frame | None = None
    location: object | None = None
    structures: StructureSurfaces | None = None
    source_names: tuple[str, ...] | None = None


def make_result(
    command: str,
    config,
    score: Score,
    *,
    search: SearchInfo | None = None,
    budget: BudgetTable | None = None,
    complete: bool = True,
    extra: dict | None = None,
    changes: Changes | None = None,
    simulation: object | None = None,
    probe_names: tuple[str, ...] | None = None,
    notes: tuple[str, ...] = (),
) -> Result:
    """Build the one :class:`Result` of a command from its config and outputs."""
    return Result(
        command=command,
        config_text=config.text,
        config_path=str(config.path),
        title=config.title,
        seed=int(config.seed),
        version=package_version(),
        created_utc=_dt.datetime.now(_dt.UTC).strftime("%Y-%m-%dT%H:%M:%SZ"),
        caution=getattr(config, "caution", "none"),
        ground_z_m=config.ground_z_m,
        frame=getattr(config, "frame", None),
        score=score,
        search=search,
        budget=budget,
        complete=complete,
        extra=dict(extra or {}),
        changes=changes,
        simulation=simulation,
        probe_names=None if probe_names is None else tuple(probe_names),
        notes=tuple(notes),
        source_names=tuple(
            getattr(spec, "name", "") or f"s{i}" for i, spec in enumerate(config.sources)
        ),
        structures=structure_surfaces(config),
    )


def structure_surfaces(config) -> StructureSurfaces | None:
    """The panels of the config's structures and their induced charge in the nominal scenario
    (the sources and background as the config gives them); None without structures."""
    if not getattr(config, "structures", ()):
        return None
    from .bem import Structures
    from .forward import Scene

    structures = Structures.build(
        config.structures, config.ground_z_m, meters_m=config.structure_meters_m
    )
    bg = config.background
    scene = Scene(
        tuple(s.source for s in config.sources),
        config.ground_z_m,
        background=bg is not None,
        structures=structures,
    )
    theta = scene.nominal(() if bg is None else bg.field_v_per_m)[None, :]
    sigma = structures.charge_density(scene, theta)[0]
    panels = structures.factor.panels
    n = panels.n_panels
    charge = np.bincount(panels.owner, sigma * panels.areas_m2, len(config.structures))
    return StructureSurfaces(
        names=tuple(c.name for c in config.structures),
        vertices_m=panels.triangles_m.reshape(3 * n, 3),
        faces=np.arange(3 * n, dtype=np.int64).reshape(n, 3),
        owner=panels.owner.astype(np.int64),
        charge_density_c_per_m2=sigma,
        charge_c=charge,
    )
