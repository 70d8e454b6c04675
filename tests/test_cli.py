"""The command line end to end: exit status, one-line messages, files written or not.

Configs here are tiny fictional sites (4 scenarios, a handful of evaluations) so that every
`plan` runs in a second or two.
"""

from __future__ import annotations

import dataclasses
import errno
import io
import os
import re
import signal
import stat
import subprocess
import sys
import time

import h5py
import numpy as np
import pytest
from result_builders import make_result, make_simulation
from rich.console import Console
from sites import box, meter_grade, point_source, site_toml, write_site

import probeplan.store
from probeplan import commands, report, reruns
from probeplan.cli import main
from probeplan.errors import EXIT_INTERRUPTED
from probeplan.result import Result
from probeplan.store import read_result, write_result

# The tiny site: the shared test site with an installed meter, a charge range and two grades.
TINY = dict(
    title="Tiny test site (fictional)",
    probes={
        "relative_noise": 0.02,
        "installed": [{"name": "gatehouse", "position_m": [-1500.0, -1000.0, 0.0]}],
    },
    source=[point_source(charge_range_c=[-30.0, -10.0], center_range_m=box(500.0, 2500.0, 3500.0))],
    design={"random_layouts": 10, "grid_spacing_m": 1000.0},
    grade=[
        meter_grade("standard", 20.0, 1000.0, relative_noise=0.02),
        meter_grade("fine", 5.0, 3000.0, relative_noise=0.01),
    ],
)


LAYOUT = """name,x_m,y_m,z_m
north,100,1500,0
east,1500,-200,0
south,-200,-1600,0
west,-1700,300,0
"""

# The Bayesian refinement costs a Gaussian-process fit per step: only one test runs it.
REFINE = {"design": {"evaluations": 3}}

CRITERION = re.compile(r"Criterion (\w+) = (\S+)")


@pytest.fixture(autouse=True)
def _eighty_columns(monkeypatch):
    # rich sizes a console that is not a terminal from COLUMNS (default 80): pin it, so the
    # checks of an 80-column summary do not depend on the shell the tests run from.
    monkeypatch.setenv("COLUMNS", "80")


@pytest.fixture
def site(tmp_path):
    write_site(tmp_path / "tiny.toml", TINY)
    (tmp_path / "layout.csv").write_text(LAYOUT)
    return tmp_path


def run(capsys, *argv) -> tuple[int, str, str]:
    code = main([str(a) for a in argv])
    out, err = capsys.readouterr()
    return code, out, err


def one_error_line(err: str) -> str:
    """stderr holds exactly one line, `probeplan: error: ...`, and no traceback."""
    lines = err.strip().splitlines()
    assert len(lines) == 1, err
    assert lines[0].startswith("probeplan: error: ")
    assert "Traceback" not in err
    return lines[0]


def printed_value(out: str) -> float:
    match = CRITERION.search(out)
    assert match, out
    return float(match.group(2))


def flat(out: str) -> str:
    """Printed text without panel borders and line wrapping, for phrase checks."""
    return " ".join(out.replace("│", " ").split())


def summary_of(out: str) -> str:
    return "\n".join(line for line in out.splitlines() if not line.startswith("Result written"))


# --------------------------------------------------------------------------------------------
# score and show
# --------------------------------------------------------------------------------------------


def test_score_then_show_reproduces_the_summary(site, capsys):
    out_file = site / "s.h5"
    code, out, err = run(capsys, "score", site / "tiny.toml", "--layout", site / "layout.csv",
                         "--out", out_file)  # fmt: skip
    assert code == 0, err
    assert err == ""
    stored = read_result(out_file)
    assert stored.command == "score" and stored.complete
    # Installed probe first, then the CSV rows in order.
    assert np.array_equal(stored.score.installed, [True, False, False, False, False])
    new_xy = [[100, 1500], [1500, -200], [-200, -1600], [-1700, 300]]
    assert np.array_equal(stored.score.positions_m[1:, :2], new_xy)
    assert printed_value(out) == pytest.approx(stored.score.value, rel=1e-5)

    code, shown, err = run(capsys, "show", out_file)
    assert code == 0, err
    assert summary_of(shown) == summary_of(out)
    assert printed_value(shown) == pytest.approx(stored.score.value, rel=1e-5)
    assert "gatehouse" in shown
    assert "Fields: physics sign convention, E points away from positive charge; z up." in shown
    # A storm charge kilometres up: the lightning caution is printed (config heuristic).
    assert "does not make lightning-safety decisions" in flat(shown)
    assert max(len(line) for line in shown.splitlines()) <= 80


def test_score_without_out_writes_nothing(site, capsys):
    code, out, _ = run(capsys, "score", site / "tiny.toml", "--layout", site / "layout.csv")
    assert code == 0
    assert "Result written" not in out
    assert sorted(p.name for p in site.iterdir()) == ["layout.csv", "tiny.toml"]


def test_score_gain_and_grade_columns(site, capsys):
    (site / "g.csv").write_text(
        "x_m,y_m,z_m,gain,grade,component\n"
        "100,1500,0,2.5,fine,z\n1500,-200,0,,fine,\n-200,-1600,0,,fine,z\n"
    )
    code, _, err = run(capsys, "score", site / "tiny.toml", "--layout", site / "g.csv",
                       "--out", site / "g.h5")  # fmt: skip
    assert code == 0, err
    gain = read_result(site / "g.h5").score.gain
    assert gain.tolist() == [1.0, 2.5, 1.0, 1.0]


MIXED = """name,x_m,y_m,z_m,component,grade
north,100,1500,0,x,fine
east,1500,-200,0,vector,
south,-200,-1600,0,,standard
west,-1700,300,0,0.6 0 0.8,fine
"""


def test_score_mixed_meters_flow_to_the_file_show_and_simulate(site, capsys):
    # Each CSV row its own component and grade (contract: optional columns of a layout). The
    # stored file keeps them, `show` lists them, and `simulate` and `score --from` use them:
    # the bound a simulation quotes is the bound of the scored layout, the rescore the same.
    (site / "mixed.csv").write_text(MIXED)
    code, out, err = run(capsys, "score", site / "tiny.toml", "--layout", site / "mixed.csv",
                         "--out", site / "m.h5")  # fmt: skip
    assert code == 0, err
    stored = read_result(site / "m.h5").score
    assert stored.grade == ("", "fine", "", "standard", "fine")
    assert stored.axes.shape == (5, 3, 3)
    np.testing.assert_allclose(stored.axes[4, 0], [0.6, 0.0, 0.8])
    np.testing.assert_array_equal(stored.axes[2], np.eye(3))
    code, shown, _ = run(capsys, "show", site / "m.h5")
    assert code == 0
    assert re.search(r"north .* x .* fine", shown) and re.search(r"east .* vector", shown)
    assert re.search(r"gatehouse .* z .* as \[probes\]", shown)
    # Rescoring from the file: the same meters, the same value.
    code, out, err = run(capsys, "score", site / "tiny.toml", "--from", site / "m.h5")
    assert code == 0, err
    assert CRITERION.search(out).group(2) == f"{stored.value:.6g}"
    code, _, err = run(capsys, "simulate", site / "m.h5", "--trials", "3")
    assert code == 0, err
    sim = read_result(site / "m.h5").simulation
    s0 = int(np.flatnonzero(sim.scenarios == 0)[0])
    np.testing.assert_allclose(sim.crb_std[s0], stored.crb_std[0], rtol=1e-12)
    # Planning more meters around them: each old one stays installed with its axes and grade.
    code, _, err = run(capsys, "plan", site / "tiny.toml", "--from", site / "m.h5",
                       "--from-as", "installed", "--out", site / "p.h5", "--quiet")  # fmt: skip
    assert code == 0, err
    again = read_result(site / "p.h5").score
    assert again.grade[:5] == stored.grade
    np.testing.assert_allclose(again.axes[:5], stored.axes, atol=1e-15)
    np.testing.assert_array_equal(again.positions_m[:5], stored.positions_m)


def test_rerun_from_a_layout_that_estimated_other_parameters_says_so(site, capsys):
    # With a fair-weather background to estimate, the old layout's x and vector meters made
    # its horizontal components estimable; the new plan's vertical meters cannot see them. The
    # two log-determinants are over different parameter sets: the summary must not compare them.
    background = {"field_v_per_m": [0.0, 0.0, -120.0], "estimate": True}
    write_site(site / "bg.toml", TINY, background=background)
    (site / "mixed.csv").write_text(MIXED)
    code, _, err = run(capsys, "score", site / "bg.toml", "--layout", site / "mixed.csv",
                       "--out", site / "m.h5")  # fmt: skip
    assert code == 0, err
    assert "bg.x_v_per_m" in read_result(site / "m.h5").score.names
    code, out, err = run(capsys, "plan", site / "bg.toml", "--from", site / "m.h5",
                         "--out", site / "p.h5")  # fmt: skip
    assert code == 0, err
    flat = " ".join(out.split())
    assert "not rescored" in flat and "not comparable" in flat
    assert "new vs old" not in flat
    changes = read_result(site / "p.h5").changes
    assert np.isnan(changes.old_rescored) and "not comparable" in changes.rescore_note


@pytest.mark.parametrize(
    ("csv_text", "message"),
    [
        ("x_m,y_m,z_m\n1,2,0\n4,oops,0\n", r"layout\.csv: line 3, column y_m: expected a number"),
        ("x_m,z_m\n1,0\n", r"layout\.csv: line 1: missing column `y_m`"),
        ("x_m,y_m,z_m,grade\n1,2,0,gold\n", r"names grade 'gold'; the grades of .* standard, fine"),
        ("x_m,y_m,z_m,component\n1,2,0,w\n", r"line 2, column component: expected one of x, y"),
    ],
)
def test_score_bad_layout_exits_2(site, capsys, csv_text, message):
    (site / "layout.csv").write_text(csv_text)
    code, out, err = run(capsys, "score", site / "tiny.toml", "--layout", site / "layout.csv",
                         "--out", site / "s.h5")  # fmt: skip
    assert code == 2
    assert re.search(message, one_error_line(err)), err
    assert not (site / "s.h5").exists()
    assert out == ""


# --------------------------------------------------------------------------------------------
# Bad input of every kind: exit 2, one line, no file
# --------------------------------------------------------------------------------------------


def test_bad_config_key(site, capsys):
    write_site(site / "bad.toml", TINY, design={"evaluations": None, "evaluation": 0})
    code, _, err = run(capsys, "plan", site / "bad.toml", "--out", site / "p.h5")
    assert code == 2
    line = one_error_line(err)
    assert "bad.toml" in line and "evaluation" in line and "evaluations" in line
    assert not (site / "p.h5").exists()


def test_toml_syntax_error(site, capsys):
    (site / "bad.toml").write_text(site_toml(TINY).replace("seed = 3", "seed = = 3"))
    code, _, err = run(capsys, "score", site / "bad.toml", "--layout", site / "layout.csv")
    assert code == 2
    assert "bad.toml" in one_error_line(err)


@pytest.mark.parametrize(
    ("argv", "message"),
    [
        (["plan", "{d}/none.toml"], r"none\.toml: no such config file"),
        (["score", "{d}/none.toml", "--layout", "{d}/layout.csv"], r"none\.toml: no such config"),
        (["score", "{d}/tiny.toml", "--layout", "{d}/none.csv"], r"none\.csv: no such layout"),
        (["show", "{d}/none.h5"], r"none\.h5: no such result file"),
        (["show", "{d}/tiny.toml"], r"tiny\.toml: not an HDF5 file"),
        (["plan", "--resume", "{d}/none.h5"], r"none\.h5: no such result file"),
    ],
)
def test_missing_or_wrong_files(site, capsys, argv, message):
    code, _, err = run(capsys, *(a.format(d=site) for a in argv))
    assert code == 2
    assert re.search(message, one_error_line(err))


@pytest.mark.parametrize(
    ("argv", "message"),
    [
        ([], r"choose a command: plan, score, budget, show, simulate, plot or locate"),
        (["frobnicate"], r"invalid choice: 'frobnicate'"),
        (["score", "x.toml"], r"one of the arguments --layout --from is required"),
        (["plan", "--bogus"], r"unrecognized arguments: --bogus"),
        (["show"], r"the following arguments are required: FILE\.h5"),
    ],
)
def test_argument_errors_are_one_line(capsys, argv, message):
    code, out, err = run(capsys, *argv)
    assert code == 2
    assert re.search(message, one_error_line(err))
    assert out == ""


def test_existing_output_needs_force(site, capsys):
    target = site / "taken.h5"
    target.write_bytes(b"keep me")
    for argv in (
        ["plan", site / "tiny.toml", "--out", target],
        ["score", site / "tiny.toml", "--layout", site / "layout.csv", "--out", target],
    ):
        code, _, err = run(capsys, *argv)
        assert code == 2
        assert "taken.h5 exists; pass --force to overwrite it, or choose another --out." in (
            one_error_line(err)
        )
        assert target.read_bytes() == b"keep me"
    code, _, err = run(capsys, "score", site / "tiny.toml", "--layout", site / "layout.csv",
                       "--out", target, "--force")  # fmt: skip
    assert code == 0, err
    assert read_result(target).command == "score"


def test_help_exits_0(capsys):
    code, out, _ = run(capsys, "score", "--help")
    assert code == 0
    assert "x_m,y_m,z_m" in out and "installed" in out.lower()


# --------------------------------------------------------------------------------------------
# Internal errors: exit 1, no traceback unless asked
# --------------------------------------------------------------------------------------------


def test_internal_error(site, capsys, monkeypatch):
    def broken(path):
        raise RuntimeError("kaboom")

    monkeypatch.setattr(probeplan.store, "read_result", broken)
    monkeypatch.delenv("PROBEPLAN_DEBUG", raising=False)
    code, _, err = run(capsys, "show", site / "x.h5")
    assert code == 1
    assert len(err.strip().splitlines()) == 1, err
    assert err.startswith("probeplan show: internal error: RuntimeError: kaboom")
    assert "report it" in err and "PROBEPLAN_DEBUG=1" in err
    assert "Traceback" not in err

    monkeypatch.setenv("PROBEPLAN_DEBUG", "1")
    code, _, err = run(capsys, "show", site / "x.h5")
    assert code == 1
    assert "Traceback" in err and "kaboom" in err


# --------------------------------------------------------------------------------------------
# plan: default names, interruption, resume
# --------------------------------------------------------------------------------------------


def test_plan_writes_a_complete_result_under_the_config_name(site, capsys, monkeypatch):
    monkeypatch.chdir(site)
    write_site(site / "tiny.toml", TINY, REFINE)
    code, out, err = run(capsys, "plan", "tiny.toml")
    assert code == 0, err
    assert "Result written to tiny.h5" in out
    r = read_result(site / "tiny.h5")
    assert r.complete and r.command == "plan"
    assert r.score.positions_m.shape == (5, 3)
    assert r.search is not None and r.search.history.size >= 2
    assert [name for name, _ in r.search.stages] == ["greedy", "exchange", "refine"]
    assert printed_value(out) == pytest.approx(r.score.value, rel=1e-5)
    assert "D-efficiency" in out  # d with the mean aggregate: the relaxation bound is computed
    assert max(len(line) for line in out.splitlines()) <= 80
    with h5py.File(site / "tiny.h5") as f:
        assert bool(f.attrs["complete"])
        assert f["search/bound"].shape == ()
    # Signal handlers are put back after the search.
    assert signal.getsignal(signal.SIGINT) is signal.default_int_handler

    write_site(site / "tiny.toml", TINY)
    code, out, err = run(capsys, "plan", "tiny.toml", "--quiet")
    assert code == 0, err
    assert out.strip() == "Result written to tiny-2.h5"


def stop_after_the_greedy(monkeypatch) -> None:
    """Ctrl-C as soon as the greedy stage has placed every probe (the first layout exists)."""
    import probeplan.search.stages as stages

    placed = []
    picks = stages.greedy_steps

    def greedy_then_flag(*args, **kwargs):
        yield from picks(*args, **kwargs)
        placed.append(True)

    monkeypatch.setattr(stages, "greedy_steps", greedy_then_flag)
    monkeypatch.setattr(commands.StopFlag, "__call__", lambda self: bool(placed))


def test_interrupted_plan_exits_130_and_resume_completes(site, capsys, monkeypatch):
    out_file = site / "p.h5"
    stop_after_the_greedy(monkeypatch)
    code, out, err = run(capsys, "plan", site / "tiny.toml", "--out", out_file)
    assert code == 130, err
    assert "INTERRUPTED" in out and "--resume" in out
    stopped = read_result(out_file)
    assert not stopped.complete
    assert stopped.score.positions_m.shape == (5, 3)
    with h5py.File(out_file) as f:
        assert not bool(f.attrs["complete"])
    assert sorted(p.name for p in site.iterdir()) == ["layout.csv", "p.h5", "tiny.toml"]

    monkeypatch.undo()
    # No CONFIG: the config text stored in the file is used; the file itself is updated.
    code, out, err = run(capsys, "plan", "--resume", out_file)
    assert code == 0, err
    resumed = read_result(out_file)
    assert resumed.complete
    assert resumed.config_text == stopped.config_text
    k = stopped.search.history.size
    assert resumed.search.history.size > k
    assert np.array_equal(resumed.search.history[:k], stopped.search.history)
    # The warm start is the incumbent: the resumed plan is at least as good (d is maximised).
    assert resumed.score.value >= stopped.score.value - 1e-9


def test_plan_stopped_before_any_layout_exits_130_and_writes_nothing(site, capsys, monkeypatch):
    monkeypatch.setattr(commands.StopFlag, "__call__", lambda self: True)
    code, out, err = run(capsys, "plan", site / "tiny.toml", "--out", site / "p.h5", "--quiet")
    assert code == 130
    assert err.strip() == (
        "probeplan: interrupted before the search had a layout; no result file was written."
    )
    assert sorted(p.name for p in site.iterdir()) == ["layout.csv", "tiny.toml"]


def test_resume_with_a_different_count_is_bad_input(site, capsys, monkeypatch):
    out_file = site / "p.h5"
    stop_after_the_greedy(monkeypatch)
    assert run(capsys, "plan", site / "tiny.toml", "--out", out_file)[0] == 130
    write_site(site / "five.toml", TINY, probes={"count": 5})
    code, _, err = run(capsys, "plan", site / "five.toml", "--resume", out_file)
    assert code == 2
    assert "holds 4 new probes but the config asks for [probes] count = 5" in one_error_line(err)


def test_resume_of_a_score_result_is_bad_input(site, capsys):
    layout = site / "layout.csv"
    run(capsys, "score", site / "tiny.toml", "--layout", layout, "--out", site / "s.h5")
    code, _, err = run(capsys, "plan", "--resume", site / "s.h5")
    assert code == 2
    assert "holds a `score` result" in one_error_line(err)


def test_demo_config_is_bundled():
    config = reruns.demo_config()
    assert "fictional" in config.title.lower()


# --------------------------------------------------------------------------------------------
# Signals (delivered to this process, synchronously, in the main thread)
# --------------------------------------------------------------------------------------------


def test_signals_set_the_stop_flag_and_handlers_are_restored():
    before = (signal.getsignal(signal.SIGINT), signal.getsignal(signal.SIGTERM))
    flag = commands.StopFlag()
    with commands.signals_to(flag.handle):
        assert not flag()
        signal.raise_signal(signal.SIGTERM)
        assert flag()
        # A second signal means "stop now": the run ends without writing.
        with pytest.raises(KeyboardInterrupt):
            signal.raise_signal(signal.SIGINT)
    assert (signal.getsignal(signal.SIGINT), signal.getsignal(signal.SIGTERM)) == before


def _loaded(pid: int, library: str) -> bool:
    """Whether process ``pid`` has mapped a shared library whose path contains ``library``."""
    try:
        with open(f"/proc/{pid}/maps") as maps:
            return library in maps.read()
    except OSError:
        return False


@pytest.mark.skipif(not os.path.exists("/proc/self/maps"), reason="needs Linux /proc")
@pytest.mark.parametrize("sig", [signal.SIGINT, signal.SIGTERM], ids=["SIGINT", "SIGTERM"])
@pytest.mark.parametrize("moment", ["loading", "running"])
def test_ctrl_c_or_sigterm_while_loading_or_running_gives_no_traceback(site, moment, sig):
    # Common practice for command-line tools: Ctrl-C ends the run with status 130 and one
    # line, whether it comes while the program is still loading its libraries or while it
    # works; SIGTERM (how service managers and batch schedulers stop a job) means the same,
    # not 143. "loading": the signal is sent as soon as numpy's core is mapped, i.e. in the
    # middle of the imports (numba, scipy … follow); "running": 0.6 s later, when the run is
    # under way or, on a fast machine, done.
    proc = subprocess.Popen(
        [sys.executable, "-m", "probeplan", "plan", "tiny.toml", "--out", "p.h5"],
        cwd=site,
        stdout=subprocess.PIPE,
        stderr=subprocess.PIPE,
        text=True,
        env={**os.environ, "PROBEPLAN_DEBUG": ""},
    )
    deadline = time.monotonic() + 60.0
    while not _loaded(proc.pid, "_multiarray_umath") and time.monotonic() < deadline:
        time.sleep(0.001)
    if moment == "running":
        time.sleep(0.6)
    proc.send_signal(sig)
    out, err = proc.communicate(timeout=120)
    assert "Traceback" not in err and "Exception ignored" not in err, err
    # 130; for Ctrl-C, or for a signal that came while Python was shutting down after the
    # run, the process may also end by the signal itself (a shell reports it as 128 + the
    # signal); 0 when the run was done before the signal came.
    allowed = [EXIT_INTERRUPTED]
    if sig == signal.SIGINT or moment == "running":
        allowed.append(-sig)
    if moment == "running" and "Result written" in out:
        allowed.append(0)
    assert proc.returncode in allowed, (proc.returncode, err)
    if proc.returncode == EXIT_INTERRUPTED:
        assert "interrupted" in (out + err).lower()
    if "no result file was written" in err:
        assert not (site / "p.h5").exists()


def test_python_dash_m(site):
    env = {**os.environ, "PROBEPLAN_DEBUG": ""}
    done = subprocess.run(
        [sys.executable, "-m", "probeplan", "show", str(site / "none.h5")],
        capture_output=True,
        text=True,
        env=env,
        timeout=120,
    )
    assert done.returncode == 2
    assert done.stderr.strip() == f"probeplan: error: {site / 'none.h5'}: no such result file."


# --------------------------------------------------------------------------------------------
# The summary's wording and units (report)
# --------------------------------------------------------------------------------------------


@pytest.mark.parametrize(
    ("value", "unit", "text"),
    [
        (7000.0, "m", "7.00 km"),  # lengths switch to km at 1000 m
        (999.0, "m", "999 m"),
        (58.64, "m", "58.6 m"),
        (0.0042, "m", "4.20 mm"),
        (-20.0, "C", "-20.0 C"),
        (0.515, "C", "515 mC"),
        (3.2e-6, "C", "3.20 µC"),
        (4.7e-9, "C", "4.70 nC"),
        (-120.0, "V/m", "-120 V/m"),
        (float("inf"), "m", "unresolved"),
    ],
)
def test_readable_units(value, unit, text):
    assert report.format_quantity(value, unit) == text


@pytest.mark.parametrize(
    ("caution", "phrase"),
    [
        ("lightning", "it does not make lightning-safety decisions"),
        ("esd", "it does not make electrostatic-ignition or ESD-compliance decisions"),
        ("high-voltage", "it does not make high-voltage safety decisions"),
    ],
)
def test_caution_panels(site, capsys, caution, phrase):
    write_site(site / "c.toml", TINY, caution=caution)
    code, out, err = run(capsys, "score", site / "c.toml", "--layout", site / "layout.csv")
    assert code == 0, err
    text = flat(out)
    assert phrase in text
    assert "qualified, licensed practice" in text
    assert "Caution" in out


def test_no_caution_when_none(site, capsys):
    write_site(site / "c.toml", TINY, caution="none")
    code, out, _ = run(capsys, "score", site / "c.toml", "--layout", site / "layout.csv")
    assert code == 0
    assert "Caution" not in out


def test_unresolved_directions_in_words(site, capsys):
    # Three ground meters cannot resolve four parameters: the summary says which trade off.
    (site / "three.csv").write_text("x_m,y_m,z_m\n100,1500,0\n1500,-200,0\n")
    code, out, _ = run(capsys, "score", site / "tiny.toml", "--layout", site / "three.csv")
    assert code == 0
    assert "Unresolved directions" in out
    assert "[not resolved]" in flat(out)
    # Four meters within 2 km of a charge 3 km up: resolvable, but charge and height are
    # strongly correlated (the near-dipole of a charge and its ground image).
    code, out, _ = run(capsys, "score", site / "tiny.toml", "--layout", site / "layout.csv")
    assert "[poorly resolved" in flat(out) and "[not resolved]" not in flat(out)
    assert "mainly their product is seen" in flat(out)


def test_progress_bar_draws_only_on_a_terminal():
    buf = io.StringIO()
    with report.progress_bar(Console(file=buf, force_terminal=True, width=80)) as progress:
        for k in range(5):
            progress("greedy", k, 4)
        progress("refine", 3, 0)  # unknown total
    assert "greedy" in buf.getvalue()
    buf = io.StringIO()
    with report.progress_bar(Console(file=buf, force_terminal=False)) as progress:
        progress("greedy", 1, 4)
    assert buf.getvalue() == ""


def test_show_reprints_every_section_from_the_file(tmp_path, capsys):
    rng = np.random.default_rng(21)
    r = make_result(rng)
    r = Result(**{**r.__dict__, "simulation": make_simulation(rng)})
    path = write_result(r, tmp_path / "all.h5")
    code, shown, err = run(capsys, "show", path)
    assert code == 0, err
    direct = io.StringIO()
    report.print_result(r, Console(file=direct, width=80, highlight=False))
    assert shown == direct.getvalue()
    text = flat(shown)
    for phrase in (
        "status: INTERRUPTED",
        "If one meter fails: losing mast-A hurts most",
        "values: worst single loss",
        "Budget options (target 1.5)",
        "CHEAPEST",
        "Changes against old.h5",
        "1 kept, 1 moved, 0 added, 2 removed",
        "Simulated fits (5 noisy draws a scenario)",
        "charge and height of s0 trade off",
        "electrostatic-ignition",
    ):
        assert phrase in text, phrase
    assert max(len(line) for line in shown.splitlines()) <= 80


def test_d_ratio_and_efficiency_arithmetic(tmp_path, capsys):
    r = make_result(np.random.default_rng(22), singular=False, budget=False)
    r = dataclasses.replace(
        r, search=dataclasses.replace(r.search, objective="criterion"), changes=None
    )
    n = len(r.score.names)
    code, out, _ = run(capsys, "show", write_result(r, tmp_path / "r.h5"))
    assert code == 0
    # D-ratio = exp((plan − other)/n_params), D-efficiency = exp((plan − bound)/n_params).
    row = re.search(r"baseline: best of 100 random\s+(\S+)\s+(\S+)", out)
    assert float(row.group(1)) == -0.5
    assert float(row.group(2)) == pytest.approx(np.exp((r.score.value + 0.5) / n), rel=5e-3)
    eff = re.search(r"D-efficiency: (\S+) %", out)
    want = 100 * np.exp((r.score.value - r.search.bound) / n)
    assert float(eff.group(1)) == pytest.approx(want, abs=0.051)


def test_a_probe_on_the_point_charge_is_the_layouts_fault(site, capsys):
    # Coulomb's law is infinite at a point charge (the contract: an error naming the point);
    # the layout put the probe there, so it is bad input that names the layout file.
    (site / "on.csv").write_text("x_m,y_m,z_m\n100,1500,0\n0,0,3000\n")
    code, _, err = run(capsys, "score", site / "tiny.toml", "--layout", site / "on.csv")
    assert code == 2
    line = one_error_line(err)
    assert "on.csv" in line and "lies on a point charge" in line


# --------------------------------------------------------------------------------------------
# Writing results safely
# --------------------------------------------------------------------------------------------


def test_a_fifo_is_never_replaced(site, capsys):
    fifo = site / "pipe.h5"
    os.mkfifo(fifo)
    code, _, err = run(capsys, "score", site / "tiny.toml", "--layout", site / "layout.csv",
                       "--out", fifo, "--force")  # fmt: skip
    assert code == 2
    assert "pipe.h5: is a FIFO (named pipe), not a regular file" in one_error_line(err)
    assert stat.S_ISFIFO(os.lstat(fifo).st_mode)


@pytest.mark.parametrize("command", ["score", "plan"])
def test_out_naming_the_config_being_read_is_refused(site, capsys, command):
    config = site / "tiny.toml"
    argv = [command, config, "--out", config, "--force"]
    if command == "score":
        argv[2:2] = ["--layout", site / "layout.csv"]
    code, _, err = run(capsys, *argv)
    assert code == 2
    assert "tiny.toml: is a file this command reads" in one_error_line(err)
    assert config.read_text() == site_toml(TINY)


def test_two_runs_choosing_the_default_name_get_different_names(site, capsys, monkeypatch):
    # Another run takes tiny.h5 while this one searches: this one moves on to tiny-2.h5.
    from probeplan.store import write as store_write

    monkeypatch.chdir(site)
    real = store_write._write

    def racing(f, result):
        real(f, result)
        (site / "tiny.h5").write_bytes(b"the other run")

    monkeypatch.setattr(store_write, "_write", racing)
    code, out, err = run(capsys, "plan", "tiny.toml", "--quiet")
    assert code == 0, err
    assert out.strip() == "Result written to tiny-2.h5"
    assert (site / "tiny.h5").read_bytes() == b"the other run"
    assert read_result(site / "tiny-2.h5").complete


def test_a_stop_after_writing_says_the_file_was_written(site, capsys, monkeypatch):
    # A signal while the summary is printed: the result is on disk, whole, and said so.
    def interrupted(*args, **kwargs):
        raise KeyboardInterrupt

    monkeypatch.setattr(report, "print_result", interrupted)
    code, _, err = run(capsys, "plan", site / "tiny.toml", "--out", site / "p.h5")
    assert code == EXIT_INTERRUPTED
    assert "no result file was written" not in err
    assert f"interrupted after writing {site / 'p.h5'} (written whole)" in err
    assert read_result(site / "p.h5").complete


def test_a_signal_while_writing_leaves_a_whole_file_said_written(site, capsys, monkeypatch):
    from probeplan.store import write as store_write

    real = store_write._write

    def signalled(f, result):
        signal.raise_signal(signal.SIGINT)  # Ctrl-C in the middle of the write
        real(f, result)

    monkeypatch.setattr(store_write, "_write", signalled)
    code, _, err = run(capsys, "plan", site / "tiny.toml", "--out", site / "p.h5", "--quiet")
    assert code == EXIT_INTERRUPTED
    assert "interrupted after writing" in err and "no result file" not in err
    assert read_result(site / "p.h5").complete
    assert sorted(p.name for p in site.iterdir()) == ["layout.csv", "p.h5", "tiny.toml"]


def test_a_full_disk_is_one_line_naming_the_file(site, capsys, monkeypatch):
    from probeplan.store import write as store_write

    def full(f, result):
        f.create_dataset("half", data=np.zeros(1000))
        raise OSError(errno.ENOSPC, os.strerror(errno.ENOSPC))

    monkeypatch.setattr(store_write, "_write", full)
    code, _, err = run(capsys, "plan", site / "tiny.toml", "--out", site / "p.h5", "--quiet")
    assert code == 2
    line = one_error_line(err)
    assert f"{site / 'p.h5'}: cannot write the result file (No space left on device)" in line
    assert sorted(p.name for p in site.iterdir()) == ["layout.csv", "tiny.toml"]


def test_a_plot_that_cannot_be_written_is_bad_input(site, capsys, monkeypatch):
    from matplotlib.figure import Figure

    code, _, err = run(capsys, "score", site / "tiny.toml", "--layout", site / "layout.csv",
                       "--out", site / "s.h5")  # fmt: skip
    assert code == 0, err

    def full(self, *args, **kwargs):
        raise OSError(errno.ENOSPC, os.strerror(errno.ENOSPC))

    monkeypatch.setattr(Figure, "savefig", full)
    code, _, err = run(capsys, "plot", site / "s.h5", "--folder", site / "figs")
    assert code == 2
    assert "site_map.png: cannot write the plot (No space left on device)" in one_error_line(err)
    assert list((site / "figs").iterdir()) == []


def test_simulate_on_a_read_only_file_suggests_no_missing_option(site, capsys, monkeypatch):
    from probeplan.store import files as store_files

    code, _, err = run(capsys, "score", site / "tiny.toml", "--layout", site / "layout.csv",
                       "--out", site / "s.h5")  # fmt: skip
    assert code == 0, err

    def read_only(target):
        raise OSError(errno.EROFS, os.strerror(errno.EROFS))

    monkeypatch.setattr(store_files, "_claim_temporary", read_only)
    code, _, err = run(capsys, "simulate", site / "s.h5", "--trials", "2")
    assert code == 2
    line = one_error_line(err)
    assert "s.h5: cannot write" in line and "Read-only file system" in line
    assert "--out" not in line and "copy the file" in line


def test_a_config_saved_with_a_byte_order_mark_is_read(site, capsys):
    # Common practice: Windows editors save UTF-8 with a byte-order mark (U+FEFF) in front.
    (site / "bom.toml").write_text("\ufeff" + site_toml(TINY), encoding="utf-8")
    code, _, err = run(capsys, "score", site / "bom.toml", "--layout", site / "layout.csv")
    assert code == 0, err


def test_a_stop_before_the_search_has_a_layout_exits_130(site, capsys, monkeypatch):
    # The search reports a stop that came before its first layout by `has_layout`: nothing
    # to score or write, and the one line says so.
    from types import SimpleNamespace

    import probeplan.search

    monkeypatch.setattr(probeplan.search, "plan", lambda *a, **k: SimpleNamespace(has_layout=False))
    code, out, err = run(capsys, "plan", site / "tiny.toml", "--out", site / "p.h5", "--quiet")
    assert code == EXIT_INTERRUPTED
    assert err.strip() == (
        "probeplan: interrupted before the search had a layout; no result file was written."
    )
    assert out == "" and not (site / "p.h5").exists()
