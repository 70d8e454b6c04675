"""Limits checked at the config boundary: sizes the run could never hold, and text it cannot.

A config is refused here, in seconds and with the limit and its reason in the message, rather
than failing after minutes with a MemoryError, an integer overflow or a write error:

* sizes (`scenarios`, `random_layouts`, `evaluations`, probe counts) from the memory their
  largest arrays would need, against :data:`MEMORY_LIMIT_BYTES`;
* strings holding a NUL character (HDF5 stores text NUL-terminated, so the result could not
  keep them).

Lengths are capped where they are read (``reader.Checker.number``, :data:`LENGTH_LIMIT_M`).
"""

from __future__ import annotations

from typing import Any

from .model import Config
from .reader import Checker

#: The most memory a run's largest array may need. Common practice for a desktop tool: well
#: under a workstation's memory, so the refusal comes before the machine swaps.
MEMORY_LIMIT_BYTES = 4 * 2**30

#: Candidate positions a grid may have (as ``site.kinds`` caps one region's lattice).
LATTICE_LIMIT = 4_000_000

#: Candidate positions the search scores at once (the automatic lattice's target, see
#: ``site.layouts.candidate_grid``): the per-scenario Jacobian of the grid is its largest array.
_CANDIDATES = 1500


def check_text(ck: Checker, data: Any, key: str = "") -> None:
    """Refuse a string holding NUL anywhere in the parsed TOML ``data``, naming its key."""
    if isinstance(data, str):
        if "\x00" in data:
            ck.fail(
                f"`{key or 'a key'}` holds a NUL character (\\u0000); text may hold any "
                "character but that one (the result file stores text NUL-terminated)."
            )
    elif isinstance(data, dict):
        for k, v in data.items():
            check_text(ck, k, key)
            check_text(ck, v, f"{key}.{k}" if key else str(k))
    elif isinstance(data, list | tuple):
        for j, v in enumerate(data):
            check_text(ck, v, f"{key}[{j}]")


def _gib(n_bytes: float) -> str:
    return f"{n_bytes / 2**30:,.3g} GiB"


def _lattice_size(config: Config, spacing_m: float) -> float:
    """About how many candidate positions a lattice of ``spacing_m`` puts in the regions."""
    return sum(r.measure / spacing_m**r.dimension if r.dimension else 1.0 for r in config.regions)


def check_sizes(ck: Checker, config: Config) -> None:
    """Refuse sizes whose largest array would exceed :data:`MEMORY_LIMIT_BYTES`.

    The arrays (float64, 8 bytes a number), with S scenarios, P estimated parameters and n
    probes: the candidate grid's Jacobian S · c · 3 · P (c = 1500, or the lattice of
    ``grid_spacing_m`` in the regions) and the Fisher matrices S · P²
    (per scenario); a layout's Jacobian S · n · 3 · P (per probe); the random baselines'
    positions and gains 4 · n per layout; the refinement's Gaussian-process kernel, the square
    of the evaluations.
    """
    d = config.design
    n_params = sum(len(s.estimate) for s in config.sources)
    n_params = max(1, n_params + (3 if config.background and config.background.estimate else 0))
    counts = [config.probes.count, *(config.budget.counts if config.budget else ())]
    n_probes = max(counts) + len(config.installed)
    needs = []
    if d.grid_spacing_m is not None:
        n_cand = _lattice_size(config, d.grid_spacing_m)
        grid = 8.0 * d.scenarios * (n_cand * 3 * n_params + n_params**2)
        if n_cand > LATTICE_LIMIT:
            ck.fail(
                f"`design.grid_spacing_m` = {d.grid_spacing_m:g} m puts about {n_cand:,.0f} "
                f"candidate positions in the regions, more than the {LATTICE_LIMIT:,} limit a "
                "candidate grid may have; use a coarser spacing."
            )
        needs.append(("design.grid_spacing_m", d.grid_spacing_m, grid))
    per_scenario = 8.0 * (_CANDIDATES * 3 * n_params + n_params**2)
    needs += [
        ("design.scenarios", d.scenarios, d.scenarios * per_scenario),
        (
            "probes.count" if max(counts) == config.probes.count else "budget.counts",
            max(counts),
            8.0 * d.scenarios * n_probes * 3 * n_params,
        ),
        ("design.random_layouts", d.random_layouts, 8.0 * d.random_layouts * n_probes * 4),
        ("design.evaluations", d.evaluations, 8.0 * d.evaluations**2),
    ]
    for key, value, n_bytes in needs:
        if n_bytes > MEMORY_LIMIT_BYTES:
            ck.fail(
                f"`{key}` = {value:,}{' m' if key.endswith('_m') else ''}: its largest array "
                f"would need about {_gib(n_bytes)}, "
                f"more than the {_gib(MEMORY_LIMIT_BYTES)} limit a run may use "
                f"({d.scenarios:,} scenarios, {n_params} estimated parameters, {n_probes:,} "
                "probes); ask for fewer."
            )
