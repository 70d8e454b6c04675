"""What a summary must say beyond its tables, in plain words: warnings, limits, assumptions.

Pure functions of a :class:`~probeplan.result.Result` (fresh from a command or read back from
a file) that return sentences; :mod:`probeplan.report` prints them. They read only what the
result holds — the score, the search record, the simulation, and the config text as given —
so ``probeplan show`` says the same as the command that wrote the file.

* :func:`wide_bounds` — parameters whose 1-sigma bound exceeds the range the scenarios draw
  them from (or is infinite): the layout does not resolve them there.
* :func:`units_slip` — a config whose every reading saturates, or whose criterion is not
  finite, and its likely cause (a charge in C where µC was meant).
* :func:`assumptions` — what the scenarios take for granted: parameters that vary but are not
  estimated are known in each scenario; several sources are drawn independently.
* :func:`evaluation_account` — the evaluations asked for and spent, stage by stage.
* :func:`bound_words` — why the plan sits far below the relaxation bound, and the restarts'
  empirical figure beside it: what each does and does not promise.
* :func:`simulation_findings` — failed fits and achieved/bound ratios far from 1.
* :func:`scenario_where` — where a scenario's charges are, in words.

Every number goes through :func:`~probeplan.resulttypes.format_quantity`.
"""

from __future__ import annotations

import math
import tomllib

import numpy as np

from .resulttypes import format_number, format_quantity, param_unit

#: Achieved/bound ratios of a simulation outside [RATIO_LOW, RATIO_HIGH] are flagged.
RATIO_HIGH = 2.0
RATIO_LOW = 0.5

#: Fields this many times a meter's range (or this small a fraction of its noise) at the
#: nearest meter point to a charge in the wrong unit rather than to a layout problem: a slip
#: between C, mC, µC and nC is a factor of 1,000 or more.
SLIP_FACTOR = 1e3

_SIZE_WORDS = {"radius": "radius", "sigma": "spread (sigma)"}

#: D-efficiency against the relaxation bound below which the summary explains the gap.
LOOSE_BOUND_EFFICIENCY = 0.9

#: Searches whose D-value reaches this share of the best one's (exp(Δ/n_params)) "agree".
RESTARTS_AGREE = 0.99


# --------------------------------------------------------------------------------------------
# The config as given, and the sources' labels
# --------------------------------------------------------------------------------------------


def config_tables(result) -> dict:
    """The result's config text as TOML tables; ``{}`` when it cannot be read."""
    try:
        data = tomllib.loads(result.config_text or "")
    except (tomllib.TOMLDecodeError, TypeError, AttributeError):
        return {}
    return data if isinstance(data, dict) else {}


def _sources(result) -> list[dict]:
    sources = config_tables(result).get("source", [])
    return [s for s in sources if isinstance(s, dict)] if isinstance(sources, list) else []


def source_label(result, i: int) -> str:
    """How prose names source ``i``: ``"s0"``, or ``"storm (s0)"`` when it has a name (the
    ``s0`` ties it to the parameter names of the tables)."""
    names = getattr(result, "source_names", None)
    name = names[i] if names is not None and i < len(names) else None
    if name is None:
        sources = _sources(result)
        name = sources[i].get("name") if i < len(sources) else None
    if isinstance(name, str) and name and name != f"s{i}":
        return f"{name} (s{i})"
    return f"s{i}"


def param_label(result, name: str) -> str:
    """A parameter name as the summary shows it: ``s0.x_m``, or ``s0.x_m (storm)`` when
    source 0 has a name of its own."""
    head = name.split(".")[0]
    if not _is_source_param(name):
        return name
    label = source_label(result, int(head[1:]))
    return f"{name} ({label.rsplit(' (', 1)[0]})" if label != head else name


def _n_sources(result) -> int:
    from_names = [int(n[1:].split(".")[0]) for n in result.score.names if _is_source_param(n)]
    return max([len(_sources(result)), *(k + 1 for k in from_names)], default=0)


def _is_source_param(name: str) -> bool:
    head = name.split(".")[0]
    return head.startswith("s") and head[1:].isdigit()


# --------------------------------------------------------------------------------------------
# Where a scenario's charges are
# --------------------------------------------------------------------------------------------


def scenario_where(result, k: int) -> str:
    """Where scenario ``k`` puts each source, from its estimated parameters.

    Returns
    -------
    str
        e.g. ``"s0 at x = 12.3 km, y = -4.10 km, z = 7.00 km, charge -20.0 C"``; sources with
        nothing estimated are left out; ``""`` when nothing is known.
    """
    s = result.score
    theta = np.asarray(s.theta, dtype=float)
    if theta.ndim != 2 or not 0 <= k < theta.shape[0]:
        return ""
    names = tuple(s.names)
    parts = []
    for i in range(_n_sources(result)):
        bits = [
            f"{axis} = {format_quantity(theta[k, names.index(f's{i}.{axis}_m')], 'm')}"
            for axis in "xyz"
            if f"s{i}.{axis}_m" in names
        ]
        if f"s{i}.charge_c" in names:
            bits.append(f"charge {format_quantity(theta[k, names.index(f's{i}.charge_c')], 'C')}")
        if bits:
            parts.append(f"{source_label(result, i)} at {', '.join(bits)}")
    return "; ".join(parts)


# --------------------------------------------------------------------------------------------
# Bounds wider than the scenarios
# --------------------------------------------------------------------------------------------


def wide_bounds(result) -> list[str]:
    """Parameters the layout does not resolve in some scenarios, one sentence each.

    A 1-sigma bound wider than the range the scenarios draw the parameter from says nothing
    the scenarios did not already say: the layout does not resolve it there. A parameter that
    is the same in every scenario is flagged only where its bound is infinite.
    """
    s = result.score
    crb = np.asarray(s.crb_std, dtype=float)
    theta = np.asarray(s.theta, dtype=float)
    if crb.ndim != 2 or crb.shape != theta.shape or crb.shape[0] == 0:
        return []
    n_s = crb.shape[0]
    lo, hi = theta.min(axis=0), theta.max(axis=0)
    out, described = [], set()
    for j, name in enumerate(s.names):
        unit = param_unit(name)
        col = np.where(np.isnan(crb[:, j]), np.inf, crb[:, j])
        span = float(hi[j] - lo[j])
        bad = ~np.isfinite(col) if span <= 0 else ~(col <= span)
        if not bad.any():
            continue
        k = int(np.argmax(col))
        where = scenario_where(result, k) if k not in described else ""
        described.add(k)
        worst = (
            f"worst {format_quantity(col[k], unit)} in scenario {k}"
            if np.isfinite(col[k])
            else f"not resolved at all in scenario {k}"
        )
        worst += f" ({where})" if where else ""
        scen = f"{int(bad.sum())} of {n_s} scenario{'s' if n_s != 1 else ''}"
        if span > 0:
            out.append(
                f"{param_label(result, name)}: in {scen} the 1-sigma bound exceeds the "
                f"{format_quantity(span, unit)} its scenarios span ({format_quantity(lo[j], unit)}"
                f" to {format_quantity(hi[j], unit)}), so the layout does not resolve it there; "
                f"{worst}."
            )
        else:
            out.append(
                f"{param_label(result, name)}: the layout cannot resolve it at all in {scen}; "
                f"{worst}."
            )
    return out


# --------------------------------------------------------------------------------------------
# Units slips: every reading saturated, or no scenario resolved
# --------------------------------------------------------------------------------------------


def units_slip(result) -> list[str]:
    """Loud warnings for a config that cannot mean what it says, with the likely cause.

    Triggers: every meter saturates in every scenario, the criterion is not finite, or an
    estimated charge's nominal bound exceeds a thousand times the charge. The likely cause is
    read from the nominal charges of the config text: the point-charge field k|q|/d² at the
    nearest meter beside the meters' range and noise (a slip between C and µC is a factor of
    a million).
    """
    s = result.score
    sat = np.asarray(s.saturated, dtype=float)
    all_saturated = bool(sat.size) and bool(np.all(sat >= 1.0))
    finite = math.isfinite(float(s.value))
    faint = _faint_charges(s)
    if not all_saturated and finite and not faint:
        return []
    what = []
    if all_saturated:
        what.append("every meter saturates in every scenario, so no reading carries information")
    if not finite:
        n_sing = int(np.sum(s.singular))
        what.append(
            f"the criterion is {format_number(float(s.value))}: the layout resolves the "
            f"estimated parameters in {len(s.singular) - n_sing} of {len(s.singular)} scenarios"
        )
    if faint and not all_saturated:
        what.append(
            "the charge is not resolved to within a thousand times its own size even in the "
            "nominal scenario: its field at the meters is far below the meters' noise"
        )
    probes = config_tables(result).get("probes", {})
    probes = probes if isinstance(probes, dict) else {}
    field, who = _nearest_field(result)
    cause = _likely_cause(field, who, probes, all_saturated)
    return [f"{'; '.join(what)}. {cause}"]


def _faint_charges(score) -> bool:
    """Whether an estimated charge's nominal 1-sigma bound exceeds :data:`SLIP_FACTOR` times
    the charge itself (a field a thousandth of the noise or less)."""
    theta = np.asarray(score.theta, dtype=float)
    crb = np.asarray(score.crb_std, dtype=float)
    if theta.ndim != 2 or theta.shape[0] == 0 or crb.shape != theta.shape:
        return False
    cols = [j for j, n in enumerate(score.names) if n.endswith(".charge_c")]
    q, sd = np.abs(theta[0, cols]), crb[0, cols]
    return bool(np.any((q > 0) & np.isfinite(sd) & (sd > SLIP_FACTOR * q)))


def _nearest_field(result) -> tuple[float, str]:
    """The largest nominal point-charge field k|q|/d² at a meter, V/m, and which source."""
    # Imported here, only for a warning: scipy.constants costs ~0.7 s, every start would pay.
    from scipy.constants import epsilon_0

    k_coulomb = 1.0 / (4.0 * math.pi * epsilon_0)  # from scipy.constants (CODATA)
    pos = np.asarray(result.score.positions_m, dtype=float).reshape(-1, 3)
    best, who = 0.0, ""
    for i, src in enumerate(_sources(result)):
        q = src.get("charge_c")
        centre = src.get("center_m")
        if centre is None and "start_m" in src and "end_m" in src:
            centre = 0.5 * (np.asarray(src["start_m"], float) + np.asarray(src["end_m"], float))
        try:
            q, centre = float(q), np.asarray(centre, dtype=float).reshape(3)
        except (TypeError, ValueError):
            continue
        if not pos.size:
            continue
        d = float(np.min(np.linalg.norm(pos - centre, axis=1)))
        field = k_coulomb * abs(q) / max(d, 1e-9) ** 2
        if field > best:
            best = field
            who = (
                f"{source_label(result, i)} holds {format_quantity(q, 'C')} "
                f"{format_quantity(d, 'm')} from the nearest meter, a field of about "
                f"{format_quantity(field, 'V/m')} there"
            )
    return best, who


def _likely_cause(field: float, who: str, probes: dict, saturated: bool) -> str:
    rng = _number(probes.get("range_v_per_m"))
    noise = _number(probes.get("noise_v_per_m"))
    if who and saturated and rng and field > SLIP_FACTOR * rng:
        return (
            f"Likely cause: a charge in the wrong unit: {who}, over "
            f"{format_number(field / rng, 2)} times the range (`range_v_per_m` = "
            f"{format_quantity(rng, 'V/m')}). `charge_c` is in coulombs: 3 µC is 3e-6, not 3."
        )
    if who and noise and field < noise / SLIP_FACTOR:
        return (
            f"Likely cause: a charge in the wrong unit: {who}, below "
            f"1/{format_number(noise / max(field, 1e-300), 2)} of the noise (`noise_v_per_m` ="
            f" {format_quantity(noise, 'V/m')}). `charge_c` is in coulombs."
        )
    if saturated:
        return (
            "Likely cause: a charge in the wrong unit (`charge_c` is in coulombs: 3 µC is "
            "3e-6), or a `range_v_per_m` too small for these fields. "
            + (f"Here {who}." if who else "")
        ).strip()
    return (
        "Likely causes: fewer readings than estimated parameters, meters that see nothing "
        "(saturated or too far), or a charge in the wrong unit (`charge_c` is in coulombs); "
        "see the unresolved directions below." + (f" Here {who}." if who else "")
    )


def _number(value) -> float | None:
    try:
        value = float(value)
    except (TypeError, ValueError):
        return None
    return value if math.isfinite(value) and value > 0 else None


# --------------------------------------------------------------------------------------------
# Assumptions the scenarios make
# --------------------------------------------------------------------------------------------


def assumptions(result) -> list[str]:
    """What the scenario table takes for granted, one sentence each.

    * A source parameter (or background component) drawn from a range but not estimated is
      set to its drawn value in each scenario and treated as known there: the bounds assume
      the user knows it exactly at every moment.
    * Several sources with ranges are drawn independently of one another: nothing ties an
      upper charge to the main one.
    """
    out = []
    drawn = []
    for i, src in enumerate(_sources(result)):
        est = src.get("estimate", [])
        est = set(est) if isinstance(est, list) else set()
        ranged = _ranged(src)
        if ranged:
            drawn.append(source_label(result, i))
        hidden = [w for w in ranged if w not in est]
        if hidden:
            words = [_SIZE_WORDS.get(w, "charge" if w == "charge" else w) for w in hidden]
            verb = "varies" if len(words) == 1 else "vary"
            out.append(
                f"{source_label(result, i)}: its {_and(words)} {verb} across the scenarios but "
                f"{'is' if len(words) == 1 else 'are'} not estimated, so each scenario treats "
                f"{'it' if len(words) == 1 else 'them'} as known: the bounds assume you know "
                f"{'it' if len(words) == 1 else 'them'} exactly."
            )
    bg = config_tables(result).get("background", {})
    if isinstance(bg, dict) and "field_range_v_per_m" in bg and not bg.get("estimate", False):
        out.append(
            "the background field varies across the scenarios but is not estimated, so each "
            "scenario treats it as known."
        )
    if len(drawn) > 1:
        out.append(
            f"the sources {_and(drawn)} are drawn independently in each scenario: each takes "
            "any value in its own ranges wherever the others are (nothing ties an upper charge"
            " to the main one)."
        )
    return out


def _ranged(src: dict) -> list[str]:
    """Parameters of a source config table drawn from a range of non-zero width, in order."""
    out = []

    def wide(pair) -> bool:
        try:
            lo, hi = (float(v) for v in pair)
        except (TypeError, ValueError):
            return False
        return hi != lo

    if wide(src.get("charge_range_c")):
        out.append("charge")
    centre = src.get("center_range_m")
    if isinstance(centre, list):
        out += [axis for axis, pair in zip("xyz", centre, strict=False) if wide(pair)]
    out += [size for size in ("radius", "sigma") if wide(src.get(f"{size}_range_m"))]
    return out


def _and(words: list[str]) -> str:
    return words[0] if len(words) == 1 else f"{', '.join(words[:-1])} and {words[-1]}"


# --------------------------------------------------------------------------------------------
# Evaluations asked for and spent
# --------------------------------------------------------------------------------------------


def evaluation_account(result) -> str | None:
    """The objective evaluations asked for and spent, with the breakdown per stage.

    From the search record where it holds the breakdown; in older files, counted from the
    history (the grid stages score one layout each, refinement proposals that broke the
    mounting rules are not in it).
    """
    info = result.search
    if info is None:
        return None
    asked = info.evaluations_asked
    if asked is None:
        design = config_tables(result).get("design", {})
        value = design.get("evaluations") if isinstance(design, dict) else None
        asked = value if isinstance(value, int) and not isinstance(value, bool) else None
    asked_text = (
        f"{asked} refinement evaluation{'s' if asked != 1 else ''} asked for"
        if asked is not None
        else "refinement evaluations: the default number asked for"
    )
    if info.evaluations_spent:
        spent = list(info.evaluations_spent)
        total = sum(n for _, n in spent)
        parts = ", ".join(f"{name} {n}" for name, n in spent)
        return f"evaluations: {asked_text}; {total} spent ({parts})."
    n_hist = len(info.history)
    grid = [name for name, _ in info.stages if name in ("greedy", "exchange")]
    rest = max(n_hist - len(grid), 0)
    parts = [f"{name} 1" for name in grid]
    if rest:
        parts.append(f"refinement {rest} that kept the mounting rules")
    return (
        f"evaluations: {asked_text}; {n_hist} layouts scored ({', '.join(parts) or 'none'}); "
        "proposals that broke the mounting rules are not counted."
    )


# --------------------------------------------------------------------------------------------
# The relaxation bound and the restarts
# --------------------------------------------------------------------------------------------


def bound_words(result) -> list[str]:
    """What the D-efficiency against the relaxation bound means here, in paragraphs.

    Over 100 %: refinement left the grid. Below :data:`LOOSE_BOUND_EFFICIENCY`: why the gap is
    wide (the bound is valid but loose) and the restarts' spread beside it
    (``SearchInfo.restart_values``), with what that figure does and does not promise. Empty
    for other criteria, without a bound, or when the bound is close.
    """
    s, info = result.score, result.search
    if info is None or info.bound is None or s.criterion != "d":
        return []
    if not (math.isfinite(info.bound) and math.isfinite(s.value)):
        return []
    n = max(len(s.names), 1)
    eff = math.exp((s.value - info.bound) / n)
    if eff > 1.0:
        return ["(over 100 %: refinement moved probes off the grid it covers)"]
    out = []
    if eff < LOOSE_BOUND_EFFICIENCY:
        out.append(
            "A wide gap here usually means a loose bound, not a poor plan: the bound lets "
            "fractions of meters spread over every candidate, so that together they see every "
            "scenario's charge, where whole meters cannot (the spacing rule and installed "
            "meters are taken into account). The bound is valid, no layout on the grid beats "
            "it, but it does not say how close the best layout on the grid comes to it."
        )
    runs = _finite_runs(info.restart_values)
    if runs.size >= 2:
        out += _restart_words(runs, n)
    elif eff < LOOSE_BOUND_EFFICIENCY:
        out.append(
            "No repeated searches to compare: `[design] restarts` (default 4) runs them when "
            "the bound is this loose."
        )
    return out


def _finite_runs(values) -> np.ndarray:
    if values is None:
        return np.zeros(0)
    runs = np.asarray(values, dtype=float).reshape(-1)
    return runs[np.isfinite(runs)]


def _restart_words(runs: np.ndarray, n_params: int) -> list[str]:
    """The restarts' spread (final values of ``runs (n_runs,)``, the greedy start's first) in
    D-ratios to the best, and what it promises."""
    share = np.exp((runs - runs.max()) / n_params)  # each run's D-ratio to the best, <= 1
    k = int(np.sum(share >= RESTARTS_AGREE))
    total = runs.size
    worst = float(share.min())
    starts = (
        f"{total} searches from different starts (the greedy layout and {total - 1} "
        f"randomised greedy one{'s' if total > 2 else ''}, each followed by the exchange)"
    )
    if worst >= 0.9995:  # equal to the last digit shown
        spread = "all ended within 0.1 % of each other in D-value"
    else:
        spread = (
            f"ended between {100.0 * worst:.1f} % and 100 % of the best one's D-value "
            f"(D-ratio); {k} of {total} within {100.0 * (1 - RESTARTS_AGREE):.0f} % of the best"
        )
    words = [f"Empirical figure: {starts} {spread}. The plan keeps the best layout found."]
    if 2 * k <= total:
        words.append(
            "They disagree: the search depends on where it starts, and a better layout may "
            "exist; more restarts (`[design] restarts`) may find one."
        )
    words.append(
        "This is evidence that the search is consistent on this grid, not a proof that no "
        "better layout exists: every start may miss the same kind of layout, and the bound "
        "stays the only certified limit."
    )
    return words


# --------------------------------------------------------------------------------------------
# Simulated fits
# --------------------------------------------------------------------------------------------


def ratio_flag(ratio: float) -> bool:
    """True for an achieved/bound ratio far from 1 (outside [RATIO_LOW, RATIO_HIGH])."""
    return math.isfinite(ratio) and not RATIO_LOW <= ratio <= RATIO_HIGH


def simulation_findings(sim, rows: list[dict]) -> list[str]:
    """Failed fits and ratios far from 1, in words.

    Parameters
    ----------
    sim : probeplan.simulate.Simulation
    rows : list of dict
        :func:`probeplan.simulate.summary_rows` of it.
    """
    out = []
    conv = np.asarray(sim.converged, dtype=bool)
    crb = np.asarray(sim.crb_std, dtype=float)
    # A scenario the layout cannot resolve is not fitted at all: say so apart from failures.
    unfit = ~np.all(np.isfinite(crb) & (crb > 0), axis=1)
    if unfit.any():
        which = ", ".join(str(int(s)) for s in np.asarray(sim.scenarios)[unfit])
        out.append(
            f"scenario{'s' if unfit.sum() > 1 else ''} {which}: not fitted, the layout cannot "
            "resolve every parameter there (its bound is infinite)."
        )
    failed = ~conv & ~unfit[:, None]
    n_fail = int(failed.sum())
    if n_fail:
        per = [
            f"scenario {int(s)}: {int(failed[k].sum())} of {conv.shape[1]}"
            for k, s in enumerate(sim.scenarios)
            if failed[k].any()
        ]
        out.append(
            f"{n_fail} of {int((~unfit).sum()) * conv.shape[1]} fits failed (the solver did "
            "not converge, or fewer readings than unknowns were left unsaturated): "
            f"{'; '.join(per)}. The achieved errors are over the converged fits only and "
            "understate the error where many failed."
        )
    flagged = [r for r in rows if ratio_flag(r["ratio"])]
    if flagged:
        high = sum(r["ratio"] > RATIO_HIGH for r in flagged)
        low = len(flagged) - high
        text = (
            f"{len(flagged)} achieved/bound ratio{'s are' if len(flagged) != 1 else ' is'} "
            f"far from 1 (marked !, outside {format_number(RATIO_LOW, 2)} to "
            f"{format_number(RATIO_HIGH, 2)})."
        )
        if high:
            text += (
                f" Above {format_number(RATIO_HIGH, 2)} ({high}): the fits do worse than the "
                "bound promises; at this signal-to-noise the model is not linear over the "
                "spread of the noise, or fits stop in wrong minima, so the bound is optimistic"
                " there."
            )
        if low:
            text += (
                f" Below {format_number(RATIO_LOW, 2)} ({low}): the fits do better than an "
                "unbiased fit can; the box limits (sources above the ground, sizes positive) "
                "or the failed fits left out remove the worst trials."
            )
        out.append(text)
    return out
