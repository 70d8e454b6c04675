"""The screens a user reads: terminal safety, numbers for people, and what the summary must say.

Every check renders whole summaries with rich at the widths users have (80 and 60 columns,
and any width from 40 to 120 for the wrapping property) and reads the text as a user would.
The results are hand-built (tests/result_builders.py, no physics); the sites are fictional.
"""

from __future__ import annotations

import dataclasses
import io
import re

import numpy as np
import pytest
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st
from result_builders import NAMES, make_result, make_simulation
from rich.console import Console
from sites import point_source, rectangle, write_site

from probeplan import findings, report
from probeplan.resulttypes import Direction, format_number, format_quantity

# --------------------------------------------------------------------------------------------
# Rendering helpers
# --------------------------------------------------------------------------------------------


def render(result, width: int = 80) -> str:
    """The summary as printed on a console of ``width`` columns that is not a terminal (so
    rich adds no escape sequence of its own: any in the output came from the result)."""
    buf = io.StringIO()
    con = Console(file=buf, width=width, force_terminal=False, color_system=None)
    report.print_result(result, con)
    return buf.getvalue()


def flat(out: str) -> str:
    return " ".join(out.replace("│", " ").split())


UNITS = r"(?:km|mm|m|MV/m|kV/m|V/m|mC|µC|nC|pC|C|%)"
#: A line that ends in a number (or "x =") and a next line that starts with its unit (or the
#: number): a quantity split over two lines.
SPLIT_NUMBER = re.compile(rf"\d[ │]*\n[ │]*{UNITS}(?![\w/])|=[ │]*\n[ │]*[-+]?\d")
#: More significant digits than any figure of a summary supports (17-digit floats).
LONG_DIGITS = re.compile(r"\d\.?\d{7,}")


def split_quantities(out: str) -> list[str]:
    return [m.group(0) for m in SPLIT_NUMBER.finditer(out)]


def wide_result(**changes):
    """A hand-built result whose prose is full of quantities: bounds wider than the
    scenarios (km), a units slip (a saturating 3 C charge) and assumptions."""
    rng = np.random.default_rng(5)
    r = make_result(rng)
    s = r.score
    theta = np.array(s.theta)
    theta[:, 1] = [-7000.0, 8000.0, 500.0]  # s0.x_m spans 15 km
    crb = np.array(s.crb_std)
    crb[:, 1] = [120.0, 51234.5678, 13406.356024918538]
    score = dataclasses.replace(s, theta=theta, crb_std=crb, saturated=np.ones(3))
    text = r.config_text + TWO_SOURCES
    return dataclasses.replace(r, score=score, config_text=text, **changes)


TWO_SOURCES = """
[[source]]
kind = "point"
charge_c = 3.0
center_m = [0.0, 0.0, 2.5]
estimate = ["x", "y"]
charge_range_c = [1.0, 5.0]
center_range_m = [[-6000.0, 9000.0], [-3000.0, 4000.0], [2.0, 3.0]]

[[source]]
kind = "point"
charge_c = 1.0
center_m = [500.0, 0.0, 4000.0]
estimate = ["charge"]
center_range_m = [[-3000.0, 3000.0], [-3000.0, 3000.0], [3000.0, 5000.0]]
"""


# --------------------------------------------------------------------------------------------
# Item 6: terminal safety — every user string is escaped, none is read as markup
# --------------------------------------------------------------------------------------------

HOSTILE = (
    "\x1b[2J\x1b[1;1H",  # clear the screen, move the cursor
    "\x1b]0;owned\x07",  # set the window title (OSC)
    "\x9b31m",  # an 8-bit control sequence introducer
    "line\nbreak\rreturn\ttab\x08\x00",
    "\u202eevil\u202c",  # a right-to-left override
    "[bold red]markup[/bold red] [link=http://x]y[/link] :warning:",
)


def hostile_result(bad: str):
    """Every user-visible string of a result carries ``bad``."""
    r = make_result(np.random.default_rng(9))
    s = r.score
    unresolved = [Direction(np.ones(len(NAMES)), 0.0, True, f"direction {bad}")]
    score = dataclasses.replace(
        s,
        unresolved=unresolved,
        grade=(f"grade {bad}",) * 3,
        axes=np.array([[[0, 0, 1.0]], [[1.0, 0, 0]], [[0, 0, 1.0]]]),
        aggregate=f"mean {bad}",
    )
    search = dataclasses.replace(
        r.search,
        stages=((f"stage {bad}", 1.0),),
        baselines=(dataclasses.replace(r.search.baselines[0], name=f"base {bad}"),),
        objective=f"obj {bad}",
    )
    budget = dataclasses.replace(r.budget, grade=np.array([bad, "a", "b"], dtype=object))
    changes = dataclasses.replace(r.changes, old_path=f"old{bad}.h5", rescore_note=bad)
    return dataclasses.replace(
        r,
        title=f"title {bad}",
        config_path=f"path/{bad}.toml",
        version=bad,
        created_utc=bad,
        command=f"plan{bad}",
        notes=(f"note {bad}",),
        probe_names=(f"p{bad}", "q", "r"),
        score=score,
        search=search,
        budget=budget,
        changes=changes,
        simulation=make_simulation(np.random.default_rng(2)),
    )


def assert_terminal_safe(out: str) -> None:
    bad = [c for c in out if not (c.isprintable() or c == "\n")]
    assert not bad, f"raw control characters reached the terminal: {bad!r}"


@pytest.mark.parametrize("bad", HOSTILE)
@pytest.mark.parametrize("width", [80, 60])
def test_user_text_reaches_the_terminal_escaped(bad, width):
    out = render(hostile_result(bad), width)
    assert_terminal_safe(out)
    if bad.isprintable():  # markup stays as typed, never interpreted
        assert "[bold red]markup[/bold red]" in flat(out)
        assert ":warning:" in out


@settings(max_examples=25, deadline=None, suppress_health_check=[HealthCheck.too_slow])
@given(st.text(min_size=1, max_size=12))
def test_any_title_or_name_is_printed_safely(bad):
    r = make_result(np.random.default_rng(3), budget=False)
    r = dataclasses.replace(r, title=bad, probe_names=(bad, "x", "y"), notes=(bad,))
    out = render(r)
    assert_terminal_safe(out)
    assert report.safe_text(bad) in out.replace("\n", "") or len(bad) > 1


@pytest.mark.parametrize("bad", HOSTILE)
def test_file_and_error_lines_are_escaped(bad, capsys):
    buf = io.StringIO()
    con = Console(file=buf, width=80, force_terminal=False)
    report.print_written(f"out{bad}.h5", complete=False, console=con)
    report.print_layout_written(f"lay{bad}.csv", console=con)
    report.print_plots([f"map{bad}.png"], console=con)
    report.print_error(f"bad value {bad}", console=con)
    report.print_error(f"bad value {bad}")  # the plain stderr path
    assert_terminal_safe(buf.getvalue())
    assert_terminal_safe(capsys.readouterr().err)
    if bad.isprintable():
        assert "[bold red]markup[/bold red]" in flat(buf.getvalue())


@pytest.mark.parametrize(
    ("text", "shown"),
    [
        ("plain", "plain"),
        ("bay\x1b[2J", "bay\\x1b[2J"),
        ("a\nb", "a\\nb"),
        ("\u202e", "\\u202e"),
        ("µC ✓ Ωmega", "µC ✓ Ωmega"),  # printable non-ASCII stays as it is
    ],
)
def test_safe_text_shows_escapes_as_repr_does(text, shown):
    assert report.safe_text(text) == shown


# --------------------------------------------------------------------------------------------
# Item 8: numbers for people
# --------------------------------------------------------------------------------------------


@pytest.mark.parametrize(
    ("value", "unit", "text"),
    [
        (16400.0, "m", "16.4 km"),  # "1.64e+04 m away" reads 16.4 km
        (7990.44, "m", "7.99 km"),  # "location = 7990.44 (m)"
        (13406.356024918538, "m", "13.4 km"),  # a 17-digit float
        (999.7, "m", "1.00 km"),  # rounding carries into the next prefix
        (0.05, "m", "50.0 mm"),
        (0.5, "m", "0.500 m"),
        (0.0, "m", "0 m"),
        (1.2e5, "V/m", "120 kV/m"),
        (-3.0, "C", "-3.00 C"),
        (3e-6, "C", "3.00 µC"),
        (0.123, "%", "12.3 %"),
        (float("inf"), "C", "unresolved"),
        (float("nan"), "m", "n/a"),
    ],
)
def test_quantities_read_as_people_write_them(value, unit, text):
    assert format_quantity(value, unit) == text


@given(
    st.floats(allow_nan=False, allow_infinity=False, min_value=-1e12, max_value=1e12),
    st.sampled_from(["m", "C", "V/m", "%", "1", "s"]),
)
def test_every_quantity_has_at_most_three_significant_digits(value, unit):
    text = format_quantity(value, unit)
    number = text.split(" ")[0]
    mantissa = number.lstrip("-").split("e")[0].replace(".", "").lstrip("0")
    assert len(mantissa) <= 3 or set(mantissa[3:]) == {"0"}, text
    # One number, one unit, one space between (the wrapping keeps them together).
    assert text.count(" ") <= 1


@pytest.mark.parametrize("width", [80, 60])
@pytest.mark.parametrize(
    "result",
    [
        pytest.param(lambda: make_result(np.random.default_rng(4)), id="every-section"),
        pytest.param(wide_result, id="wide-bounds-and-slip"),
        pytest.param(
            lambda: dataclasses.replace(
                wide_result(),
                score=dataclasses.replace(wide_result().score, criterion="location"),
            ),
            id="location-criterion",
        ),
    ],
)
def test_no_line_splits_a_number_from_its_unit(result, width):
    out = render(result(), width)
    assert max(len(line) for line in out.splitlines()) <= width
    assert not split_quantities(out), split_quantities(out)
    assert not LONG_DIGITS.search(out), LONG_DIGITS.search(out)
    assert "…" not in out  # no number cut short by a table that ran out of room


@settings(max_examples=20, deadline=None, suppress_health_check=[HealthCheck.too_slow])
@given(st.integers(min_value=40, max_value=120))
def test_prose_keeps_quantities_whole_at_any_width(width):
    out = render(wide_result(), width)
    assert not split_quantities(out), (width, split_quantities(out))


def test_split_detector_finds_a_split():
    # The detector itself must be able to fail: a quantity broken over two lines.
    assert split_quantities("ground plane at z = 0\nm")
    assert split_quantities("bound exceeds the 15.0\n  km its scenarios span")
    assert not split_quantities("ground plane at\nz = 0 m")


def test_location_criterion_reads_in_km():
    r = wide_result()
    score = dataclasses.replace(r.score, criterion="location", value=7990.44)
    out = flat(render(dataclasses.replace(r, score=score)))
    assert "Criterion location = 7.99 km" in out
    assert "7990.44" not in out


# --------------------------------------------------------------------------------------------
# Item 9: bounds wider than the scenarios
# --------------------------------------------------------------------------------------------


def test_a_bound_wider_than_the_scenarios_is_called_unresolved_there():
    out = flat(render(wide_result()))
    # s0.x_m spans 15 km (−7 km to 8 km); one bound of three exceeds it, 51.2 km in
    # scenario 1, and where that scenario's charge was is said.
    assert (
        "Not resolved there: s0.x_m: in 1 of 3 scenarios the 1-sigma bound exceeds the 15.0 km "
        "its scenarios span (-7.00 km to 8.00 km), so the layout does not resolve it there; "
        "worst 51.2 km in scenario 1" in out
    )
    assert "not resolved at all in scenario 1 (s0 at x = 8.00 km, y = " in out


@pytest.mark.parametrize(
    ("theta_col", "crb_col", "flagged"),
    [
        ([0.0, 10.0, 5.0], [1.0, 2.0, 9.9], 0),  # within the 10 m the scenarios span
        ([0.0, 10.0, 5.0], [1.0, 12.0, 9.9], 1),  # one wider
        ([0.0, 10.0, 5.0], [1.0, np.inf, np.nan], 2),  # unresolved counts too
        ([3.0, 3.0, 3.0], [1e6, 2.0, 9.9], 0),  # fixed parameter: only +inf is flagged
        ([3.0, 3.0, 3.0], [np.inf, 2.0, 9.9], 1),
    ],
)
def test_wide_bounds_table(theta_col, crb_col, flagged):
    r = make_result(np.random.default_rng(6), singular=False)
    theta = np.zeros_like(r.score.theta)
    crb = np.full_like(r.score.crb_std, 1e-3)
    theta[:, 3], crb[:, 3] = theta_col, crb_col
    score = dataclasses.replace(r.score, theta=theta, crb_std=crb)
    lines = findings.wide_bounds(dataclasses.replace(r, score=score))
    assert len(lines) == (1 if flagged else 0)
    if flagged:
        assert lines[0].startswith("s0.z_m:")
        assert f"{flagged} of 3 scenarios" in lines[0]


def test_unresolved_directions_say_where_the_charge_was():
    r = make_result(np.random.default_rng(7))
    theta = np.array(r.score.theta)
    theta[1, :4] = [-20.0, 12300.0, -4100.0, 7000.0]
    r = dataclasses.replace(r, score=dataclasses.replace(r.score, theta=theta))
    out = flat(render(r))
    assert (
        "Unresolved directions (scenario 1: s0 at x = 12.3 km, y = -4.10 km, z = 7.00 km, "
        "charge -20.0 C):" in out
    )


# --------------------------------------------------------------------------------------------
# Item 10: honest simulation
# --------------------------------------------------------------------------------------------


def simulation_result(converged, location_rms, location_crb):
    r = make_result(np.random.default_rng(8), budget=False)
    sim = make_simulation(np.random.default_rng(8))
    sim = dataclasses.replace(
        sim,
        converged=np.asarray(converged, dtype=bool),
        location_rms_m=np.asarray(location_rms, dtype=float),
        location_crb_m=np.asarray(location_crb, dtype=float),
        rms_error=np.asarray(sim.crb_std) * 1.1,  # every parameter near its bound
    )
    return dataclasses.replace(r, simulation=sim)


def test_failed_fits_are_counted_and_said():
    conv = np.ones((2, 5), dtype=bool)
    conv[1, :3] = False
    out = flat(render(simulation_result(conv, [10.0, 12.0], [9.5, 11.0])))
    assert "3 of 10 fits failed" in out
    assert "scenario 3: 3 of 5" in out
    assert "understate the error" in out
    assert " 2/5 " in out  # the fits column of scenario 3


@pytest.mark.parametrize(
    ("rms", "crb", "flags"),
    [
        ([10.0, 12.0], [9.5, 11.0], 0),  # near 1: delivered
        ([180.0, 12.0], [10.0, 11.0], 1),  # 18x: the case of the issue
        ([1.0, 12.0], [10.0, 11.0], 1),  # 0.1x: better than an unbiased fit can
        ([25.0, 4.0], [10.0, 11.0], 2),
    ],
)
def test_ratios_far_from_one_are_flagged_and_explained(rms, crb, flags):
    out = flat(render(simulation_result(np.ones((2, 5)), rms, crb)))
    assert out.count(" ! ") == flags
    if flags:
        assert "far from 1 (marked !, outside 0.50 to 2.0)" in out
    if max(np.divide(rms, crb)) > 2:
        assert "the bound is optimistic there" in out
    if min(np.divide(rms, crb)) < 0.5:
        assert "better than an unbiased fit can" in out


def test_simulate_reports_progress():
    from test_simulate import RING, problem

    from probeplan.simulate import simulate

    calls = []
    simulate(
        problem(noise=5.0, scenarios=3),
        RING,
        trials=3,
        scenarios=[0, 2],
        rng=1,
        progress=lambda *a: calls.append(a),
    )
    assert calls[0] == ("simulate", 0, 6) and calls[-1] == ("simulate", 6, 6)
    done = [c[1] for c in calls]
    assert done == sorted(done) and {c[0] for c in calls} == {"simulate"}


# --------------------------------------------------------------------------------------------
# Item 12: evaluations asked for and spent
# --------------------------------------------------------------------------------------------


def test_evaluations_asked_and_spent_with_the_breakdown():
    r = make_result(np.random.default_rng(10), budget=False)
    text = r.config_text + "\n[design]\nevaluations = 40\n"
    search = dataclasses.replace(
        r.search, history=np.zeros(33), stages=(("greedy", 1.0), ("exchange", 1.1))
    )
    out = flat(render(dataclasses.replace(r, config_text=text, search=search)))
    assert "40 refinement evaluations asked for; 33 layouts scored (greedy 1, exchange 1, " in out
    assert "refinement 31 that kept the mounting rules)" in out
    spent = (("greedy", 1), ("exchange", 1), ("refine", 40), ("refine, broke the rules", 7))
    search = dataclasses.replace(search, evaluations_asked=40, evaluations_spent=spent)
    out = flat(render(dataclasses.replace(r, search=search)))
    assert (
        "40 refinement evaluations asked for; 49 spent (greedy 1, exchange 1, refine 40, "
        "refine, broke the rules 7)" in out
    )


# --------------------------------------------------------------------------------------------
# Item 14: units slips warn loudly with the likely cause
# --------------------------------------------------------------------------------------------

INDOOR = """title = "fictional hall"
[probes]
range_v_per_m = 50000.0
noise_v_per_m = 10.0
[[source]]
kind = "gaussian"
charge_c = {charge}
center_m = [0.0, 0.0, 3.0]
sigma_m = 1.0
"""


@pytest.mark.parametrize(
    ("charge", "saturated", "value", "cause"),
    [
        (-4e-6, 0.0, 1.0, None),  # a plausible µC cloud: nothing to say
        (3.0, 1.0, 1.0, "a charge in the wrong unit: s0 holds 3.00 C"),  # C for µC
        (3.0, 1.0, -np.inf, "a charge in the wrong unit"),
        (3e-18, 0.0, -np.inf, "below 1/"),  # far below the noise
        (-4e-6, 0.0, -np.inf, "fewer readings than estimated parameters"),
    ],
)
def test_units_slip_warns_with_the_likely_cause(charge, saturated, value, cause):
    r = make_result(np.random.default_rng(12), singular=False, budget=False)
    pos = np.array([[0.0, 2.0, 3.0], [5.0, 0.0, 3.0], [0.0, -5.0, 3.0]])
    score = dataclasses.replace(
        r.score,
        positions_m=pos,
        saturated=np.full(3, saturated),
        value=value,
        singular=np.full(len(r.score.singular), not np.isfinite(value)),
    )
    r = dataclasses.replace(r, score=score, config_text=INDOOR.format(charge=charge))
    out = flat(render(r))
    if cause is None:
        assert "WARNING" not in out
        return
    assert "WARNING:" in out and cause in out
    # Loud means first: the warning comes before the tables.
    assert out.index("WARNING:") < out.index("Layout:")


# --------------------------------------------------------------------------------------------
# Item 16: the assumptions the scenarios make
# --------------------------------------------------------------------------------------------


def test_assumptions_are_stated():
    out = flat(render(wide_result()))
    assert (
        "Assumed: s0: its charge and z vary across the scenarios but are not estimated, so "
        "each scenario treats them as known" in out
    )
    assert "s1: its x, y and z vary across the scenarios but are not estimated" in out
    assert "the sources s0 and s1 are drawn independently in each scenario" in out


def test_a_named_source_is_named():
    r = wide_result()
    text = r.config_text.replace("charge_c = 3.0\n", 'charge_c = 3.0\nname = "upper"\n')
    out = flat(render(dataclasses.replace(r, config_text=text)))
    assert "upper (s0): its charge and z vary" in out


def test_nothing_assumed_when_nothing_is_drawn():
    r = make_result(np.random.default_rng(13))
    assert findings.assumptions(r) == []
    assert "Assumed:" not in render(r)


def test_format_number_rounds_long_floats():
    assert format_number(13406.356024918538) == "13400"
    assert format_number(-0.000123456) == "-1.23e-04"


def test_an_unresolved_scenario_is_not_counted_as_failed_fits():
    conv = np.ones((2, 5), dtype=bool)
    conv[0] = False
    r = simulation_result(conv, [10.0, 12.0], [9.5, 11.0])
    crb = np.array(r.simulation.crb_std)
    crb[0, 2] = np.inf
    r = dataclasses.replace(r, simulation=dataclasses.replace(r.simulation, crb_std=crb))
    out = flat(render(r))
    assert "scenario 0: not fitted, the layout cannot resolve every parameter there" in out
    assert "fits failed" not in out


# The CLI end to end: a storm charge typed in µC where C was meant, and one typed in C where µC
# was meant for a small indoor case (both fictional).
@pytest.mark.parametrize(
    ("lo", "hi", "charge", "height", "phrase"),
    [
        (-15.0, 15.0, 3.0, 3.0, "every meter saturates in every scenario"),  # 3 C indoors
        (-5000.0, 5000.0, -20e-6, 7000.0, "far below the meters' noise"),  # µC in a storm
    ],
)
def test_a_units_slip_is_loud_on_the_command_line(tmp_path, capsys, lo, hi, charge, height, phrase):
    from probeplan.cli import main

    config = write_site(
        tmp_path / "slip.toml",
        probes={"noise_v_per_m": 10.0, "range_v_per_m": 50000.0},
        region=[rectangle(hi)],
        source=[point_source(charge, (0.0, 0.0, height))],
        design={"scenarios": 2},
    )
    layout = tmp_path / "layout.csv"
    layout.write_text(f"x_m,y_m,z_m\n{lo},{lo},0\n{hi},{lo},0\n{lo},{hi},0\n0,{hi},0\n")
    code = main(["score", str(config), "--layout", str(layout)])
    out = flat(capsys.readouterr().out)
    assert code == 0  # the summary is written; the warning says what is wrong (README)
    assert "WARNING:" in out and phrase in out
    assert "Likely cause: a charge in the wrong unit" in out
    assert "`charge_c` is in coulombs" in out


def test_warnings_alone_for_a_quiet_run():
    r = wide_result()
    buf = io.StringIO()
    assert report.print_warnings(r, Console(file=buf, width=80))
    assert flat(buf.getvalue()).startswith("WARNING: every meter saturates in every scenario")
    healthy = make_result(np.random.default_rng(4), singular=False)
    buf = io.StringIO()
    assert not report.print_warnings(healthy, Console(file=buf, width=80))
    assert buf.getvalue() == ""


# --------------------------------------------------------------------------------------------
# --quiet on every command: the files written only; warnings still on standard error
# --------------------------------------------------------------------------------------------


def test_every_command_takes_quiet(tmp_path, capsys):
    from probeplan.cli import build_parser, main

    commands = build_parser()._subparsers._group_actions[0].choices
    for name, parser in commands.items():
        assert "--quiet" in parser.format_help(), name
    config = write_site(
        tmp_path / "site.toml",
        probes={"noise_v_per_m": 10.0, "range_v_per_m": 50000.0},
        region=[rectangle(15.0)],
        source=[point_source(3.0, (0.0, 0.0, 3.0))],  # 3 C indoors: every meter saturates
        design={"scenarios": 2},
    )
    layout = tmp_path / "layout.csv"
    layout.write_text("x_m,y_m,z_m\n-15,-15,0\n15,-15,0\n-15,15,0\n0,15,0\n")
    out_file = tmp_path / "r.h5"
    runs = [
        (["score", config, "--layout", layout, "--out", out_file], "Result written to"),
        (["show", out_file], None),
        (["simulate", out_file, "--trials", "2"], "Result written to"),
        (["plot", out_file, "--folder", tmp_path / "p"], "Plot written to"),
    ]
    for argv, line in runs:
        code = main([str(a) for a in argv + ["--quiet"]])
        out, err = capsys.readouterr()
        assert code == 0, (argv, err)
        lines = out.splitlines()
        assert all(line and ln.startswith((line, "Not drawn")) for ln in lines), (argv, out)
        assert ("Result" in out) == (line == "Result written to")
        if argv[0] != "plot":  # the units slip is said on stderr even when quiet
            assert "WARNING: every meter saturates" in flat(err), (argv, err)


# --------------------------------------------------------------------------------------------
# Item 11: sources by their names — config, summary, result file, maps
# --------------------------------------------------------------------------------------------


@pytest.mark.parametrize(
    ("names", "message"),
    [
        ((None, None), None),  # defaults s0, s1
        (("storm", "upper"), None),
        (("storm", "storm"), "is already the name of source[0]; source names must be unique"),
        (("s1", None), "would read as another source's parameters"),
        (("", None), "must not be empty"),
    ],
)
def test_source_names_in_the_config(names, message):
    from sites import make_config

    from probeplan.errors import InputError

    sources = [
        point_source(**({"name": n} if n is not None else {}), center_m=(0.0, 0.0, z))
        for n, z in zip(names, (3000.0, 6000.0), strict=True)
    ]
    if message is None:
        cfg = make_config("names.toml", source=sources)
        want = [n if n is not None else f"s{i}" for i, n in enumerate(names)]
        assert [s.name for s in cfg.sources] == want
    else:
        with pytest.raises(InputError, match=re.escape(message)):
            make_config("names.toml", source=sources)


def test_named_sources_in_the_summary_the_file_and_the_map(tmp_path, capsys, monkeypatch):
    from probeplan import plots
    from probeplan.cli import main
    from probeplan.store import read_result

    config = write_site(
        tmp_path / "named.toml",
        source=[
            point_source(name="main negative", center_range_m=[[-500, 500]] * 2 + [[2500, 3500]]),
            point_source(5.0, (800.0, 0.0, 6000.0), estimate=(), name="upper positive"),
        ],
    )
    layout = tmp_path / "layout.csv"
    layout.write_text("x_m,y_m,z_m\n100,1500,0\n1500,-200,0\n-200,-1600,0\n-1700,300,0\n")
    out_file = tmp_path / "named.h5"
    assert main(["score", str(config), "--layout", str(layout), "--out", str(out_file)]) == 0
    out = flat(capsys.readouterr().out)
    assert "s0.x_m (main negative)" in out
    assert main(["show", str(out_file)]) == 0
    assert flat(capsys.readouterr().out).count("(main negative)") == out.count("(main negative)")
    assert read_result(out_file).source_names == ("main negative", "upper positive")
    drawn = []
    monkeypatch.setattr(plots, "_save", lambda fig, path, fmt: drawn.append(fig) or path)
    assert main(["plot", str(out_file), "--folder", str(tmp_path / "p")]) == 0
    labels = [t.get_text() for t in drawn[0].axes[0].texts]
    assert "main negative" in labels and "upper positive" in labels


def test_a_plan_accounts_for_every_evaluation(tmp_path):
    from sites import make_config

    from probeplan.problem import build_problem
    from probeplan.result import make_result as result_of
    from probeplan.search import plan

    cfg = make_config(
        "evals.toml",
        design={"evaluations": 4, "random_layouts": 10, "grid_spacing_m": 1000.0},
    )
    outcome = plan(build_problem(cfg))
    info = outcome.info
    spent = dict(info.evaluations_spent)
    assert info.evaluations_asked == 4
    assert spent["greedy"] == 1 and spent["exchange"] == 1
    assert spent["baselines"] == 1 + 10  # the regular layout and ten random ones
    refinement = spent.get("refinement", 0)
    broke = spent.get("refinement proposals that broke the mounting rules", 0)
    assert refinement + broke <= 4
    restarts = spent.get("restarts", 0)  # one layout a restart, where the bound was loose
    assert restarts == (0 if info.restart_values is None else len(info.restart_values) - 1)
    # Every scored layout is in the history.
    assert len(info.history) == 2 + restarts + refinement
    out = flat(render(result_of("plan", cfg, outcome.score, search=info)))
    assert "evaluations: 4 refinement evaluations asked for; " in out
    assert f"{sum(spent.values())} spent (greedy 1, exchange 1, " in out


@pytest.mark.parametrize(
    ("header", "rows", "named"),
    [
        ("name,x_m,y_m,z_m", ["north,100,1500,0", "shed,10,10,0", "far,16430,0,0"], True),
        ("x_m,y_m,z_m", ["100,1500,0", "10,10,0", "16430,0,0"], False),
    ],
)
def test_rule_notes_name_probes_as_the_table_does(tmp_path, capsys, header, rows, named):
    from probeplan.cli import main

    config = write_site(
        tmp_path / "rules.toml",
        probes={"count": 3, "installed": [{"name": "gatehouse", "position_m": [-1500, -1000, 0]}]},
        keepout=[{"kind": "rectangle", "name": "shed", "min_m": [-50, -50], "max_m": [50, 50]}],
    )
    layout = tmp_path / "layout.csv"
    layout.write_text("\n".join([header, *rows]) + "\n")
    assert main(["score", str(config), "--layout", str(layout)]) == 0
    out = flat(capsys.readouterr().out)
    inside, outside = ("shed", "far") if named else ("new-1", "new-2")
    assert f"Note: {layout}: probe '{inside}' at (10, 10, 0) m lies in keep-out 0" in out
    assert f"probe '{outside}' at (16430, 0, 0) m lies outside every mounting region" in out
    assert "14.4 km away" in out  # 16.43 km from a region ending at 2 km: not 1.44e+04 m
    assert "counted from 0" not in out and "probe 1 " not in out


def test_heights_are_shown_to_their_own_scale_not_the_sites():
    # A meter 0.3 m above a 12 m mast tip on a site kilometres wide: the layout table keeps
    # its height (12.30 m), which horizontal rounding to whole metres would turn into "12".
    r = make_result(np.random.default_rng(5))
    pos = np.array(r.score.positions_m, dtype=float)
    pos[:, :2] = np.linspace(-6000.0, 6000.0, 2 * pos.shape[0]).reshape(-1, 2)
    pos[:, 2] = 0.0
    pos[0, 2] = 12.3
    out = render(dataclasses.replace(r, score=dataclasses.replace(r.score, positions_m=pos)))
    assert "12.30" in out and " 12 " not in out
