"""``[[grade]]`` and ``[budget]``: the meter grades on offer and the counts to compare."""

from __future__ import annotations

from .model import BudgetSpec, DesignSpec, Grade, ProbeSpec
from .reader import Table, found, show

GRADE_KEYS = ("name", "noise_v_per_m", "relative_noise", "cost", "range_v_per_m")
BUDGET_KEYS = ("counts", "target", "evaluations")


def check_installed_grades(ck, installed, grades) -> None:
    """An installed meter's ``grade`` must name one of the ``[[grade]]`` tables."""
    names = [g.name for g in grades]
    for k, p in enumerate(installed):
        if p.grade is not None and p.grade not in names:
            listed = ", ".join(names) or "none: the config has no [[grade]] table"
            ck.fail(
                f"`probes.installed[{k}].grade` = {show(p.grade)} names no [[grade]]; the grades "
                f"are: {listed}."
            )


def parse_grades(root: Table, probes: ProbeSpec) -> tuple[Grade, ...]:
    out: list[Grade] = []
    seen: dict[str, int] = {}
    for i, t in enumerate(root.array_of_tables("grade")):
        t.check_keys(GRADE_KEYS)
        name = t.string("name", nonempty=True, what="a name for this meter grade")
        if name in seen:
            t.ck.fail(
                f"`{t.key('name')}` = {show(name)} is already the name of grade[{seen[name]}]; "
                "grade names must be unique."
            )
        seen[name] = i
        out.append(
            Grade(
                name=name,
                noise_v_per_m=t.number("noise_v_per_m", default=probes.noise_v_per_m, gt=0.0),
                relative_noise=t.number("relative_noise", default=probes.relative_noise, ge=0.0),
                cost=t.number("cost", ge=0.0, what="the cost per meter"),
                range_v_per_m=t.number(
                    "range_v_per_m", default=probes.range_v_per_m, gt=0.0, allow_inf=True
                ),
            )
        )
    return tuple(out)


def parse_budget(root: Table, grades: tuple[Grade, ...], design: DesignSpec) -> BudgetSpec | None:
    t = root.table("budget")
    if t is None:
        return None
    t.check_keys(BUDGET_KEYS)
    if not grades:
        t.ck.fail("[budget] needs at least one [[grade]] (name, noise_v_per_m, cost) to compare.")
    raw = t.get("counts")
    key = t.key("counts")
    if not isinstance(raw, list) or not raw:
        t.ck.fail(f"`{key}` must be a non-empty array of whole numbers >= 1; got {found(raw)}.")
    counts = [t.ck.integer(f"{key}[{j}]", v, ge=1) for j, v in enumerate(raw)]
    dupes = sorted({c for c in counts if counts.count(c) > 1})
    if dupes:
        t.ck.fail(
            f"`{key}` lists {', '.join(map(str, dupes))} more than once; list each count once."
        )
    target = t.number("target", default=None)
    if target is not None and design.criterion != "d" and not target > 0.0:
        t.ck.fail(
            f"`{t.key('target')}` must be > 0 for criterion {show(design.criterion)} (a bound "
            f"to stay under); got {target!r}."
        )
    evaluations = t.integer("evaluations", default=0, ge=0)
    return BudgetSpec(counts=tuple(sorted(counts)), target=target, evaluations=evaluations)
