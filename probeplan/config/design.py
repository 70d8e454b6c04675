"""``[design]``: how layouts are scored and searched, and what the score needs estimated."""

from __future__ import annotations

import math
import re

from .model import RESTARTS_LIMIT, BackgroundSpec, DesignSpec, SourceSpec
from .reader import Checker, Table, show
from .vocab import AGGREGATES, CRITERIA, PARAM_TO_ESTIMATE

DESIGN_KEYS = (
    "criterion",
    "scenarios",
    "aggregate",
    "evaluations",
    "tolerate_failures",
    "grid_spacing_m",
    "random_layouts",
    "scheduler",
    "scheduler_timeout_s",
    "restarts",
)


def parse_design(root: Table) -> DesignSpec:
    t = root.table("design")
    if t is None:
        return DesignSpec()
    t.check_keys(DESIGN_KEYS)
    d = DesignSpec()
    return DesignSpec(
        criterion=t.choice("criterion", CRITERIA, default=d.criterion),
        scenarios=t.integer("scenarios", default=d.scenarios, ge=1),
        aggregate=_parse_aggregate(t, d.aggregate),
        evaluations=t.integer("evaluations", default=d.evaluations, ge=0),
        tolerate_failures=t.integer("tolerate_failures", default=0, choices=(0, 1)),
        grid_spacing_m=t.number("grid_spacing_m", default=None, gt=0.0),
        random_layouts=t.integer("random_layouts", default=d.random_layouts, ge=1),
        scheduler=t.string(
            "scheduler",
            default=None,
            nonempty=True,
            what='a dask scheduler address such as "tcp://host:8786"',
        ),
        scheduler_timeout_s=t.number("scheduler_timeout_s", default=d.scheduler_timeout_s, gt=0.0),
        restarts=_parse_restarts(t, d.restarts),
    )


def _parse_restarts(t: Table, default: int) -> int:
    n = t.integer("restarts", default=default, ge=0)
    if n > RESTARTS_LIMIT:
        t.ck.fail(
            f"`{t.key('restarts')}` must be a whole number from 0 to {RESTARTS_LIMIT}; got {n}. "
            "Each restart is one more greedy and exchange search over the whole grid; a few "
            "already show whether the search ends at the same quality from different starts."
        )
    return n


def _parse_aggregate(t: Table, default: str) -> str:
    raw = t.string("aggregate", default=default)
    allowed = '"mean", "worst" or "quantile:q" with 0 < q < 1 (e.g. "quantile:0.9")'
    if raw in AGGREGATES and ":" not in raw:  # the named ones; quantile:q is a pattern
        return raw
    m = re.fullmatch(r"quantile:\s*(\S+)", raw)
    if m:
        try:
            q = float(m.group(1))
        except ValueError:
            q = math.nan
        if 0.0 < q < 1.0:
            return f"quantile:{q!r}"
    t.ck.fail(f"`{t.key('aggregate')}` must be {allowed}; got {show(raw)}.")


def check_estimates(
    ck: Checker, sources: tuple[SourceSpec, ...], bg: BackgroundSpec | None, design: DesignSpec
) -> None:
    n = sum(len(s.estimate) for s in sources) + (3 if bg is not None and bg.estimate else 0)
    if n == 0:
        ck.fail(
            "nothing to estimate: no `source[i].estimate` lists a parameter and no [background] "
            'is estimated; add e.g. estimate = ["charge", "x", "y", "z"] to a [[source]].'
        )
    # The location and charge criteria read source 0's bound: its parameters must be unknowns.
    need = {"location": ("x_m", "y_m"), "charge": ("charge_c",)}.get(design.criterion, ())
    missing = [p for p in need if p not in sources[0].estimate]
    if missing:
        names = ", ".join(show(PARAM_TO_ESTIMATE[p]) for p in missing)
        ck.fail(
            f"`design.criterion` = {show(design.criterion)} scores source 0, but "
            f"`source[0].estimate` lacks {names}; add {'them' if len(missing) > 1 else 'it'} "
            'there or choose criterion "d".'
        )
    if design.criterion == "charge" and sources[0].source.neutral:
        ck.fail(
            '`design.criterion` = "charge" is the bound relative to |q|, and source 0 has '
            'q = 0 C; give source 0 a nonzero charge or choose criterion "d".'
        )
