"""The commands of a user's second day: budget, reruns with --from, simulate and plot."""

from __future__ import annotations

import struct

import h5py
import numpy as np
import pytest
from sites import meter_grade, write_site

from probeplan.cli import main
from probeplan.store import read_result

# A tiny invented site (fictional numbers): every command runs in seconds.
MAST = {"name": "mast", "position_m": [-1500.0, -1000.0, 0.0]}
SITE = dict(
    title="Rerun test site (fictional)",
    seed=5,
    probes={"min_spacing_m": 300.0, "installed": [MAST]},
    design={"random_layouts": 10, "grid_spacing_m": 500.0},
    grade=[meter_grade("basic", 40.0, 1000.0), meter_grade("fine", 10.0, 2500.0)],
    budget={"counts": [3, 5], "target": -30.0},
)

# A new building appears in the north-east quarter: a keep-out for the rerun.
BUILDING = {"kind": "rectangle", "min_m": [0.0, 0.0], "max_m": [2000.0, 2000.0]}


@pytest.fixture()
def site(tmp_path, monkeypatch):
    monkeypatch.chdir(tmp_path)
    write_site(tmp_path / "site.toml", SITE)
    write_site(tmp_path / "site2.toml", SITE, keepout=[BUILDING])
    return tmp_path


@pytest.fixture()
def planned(site):
    assert main(["plan", "site.toml", "--out", "old.h5", "--quiet"]) == 0
    return read_result(site / "old.h5")


def test_score_from_an_old_result_reproduces_its_score(planned, capsys):
    assert main(["score", "site.toml", "--from", "old.h5", "--out", "again.h5"]) == 0
    again = read_result("again.h5")
    assert again.score.value == pytest.approx(planned.score.value, rel=1e-12)
    np.testing.assert_allclose(again.score.fisher, planned.score.fisher, rtol=1e-12)
    assert again.changes is not None
    assert again.changes.added_m.shape[0] == 0 and again.changes.removed_m.shape[0] == 0
    assert again.changes.old_rescored == pytest.approx(planned.score.value, rel=1e-12)
    assert "Changes against old.h5" in capsys.readouterr().out


def test_planned_layout_exported_as_csv_scores_the_same(planned, capsys):
    # The hand-over file: `show --layout-csv` writes the new probes in the layout format,
    # rounded to the centimetre for people; this plan's positions are whole centimetres (grid
    # points), so `score --layout` of it reproduces the plan's Fisher information exactly.
    assert main(["show", "old.h5", "--layout-csv", "layout.csv"]) == 0
    assert capsys.readouterr().out.strip().endswith("Layout written to layout.csv")
    text = open("layout.csv", encoding="utf-8").read().splitlines()
    assert text[0].startswith("# new probes of plan") and text[1] == (
        "name,x_m,y_m,z_m,component,grade,gain"
    )
    assert len(text) == 2 + 4 and text[2].startswith("new-0,")
    assert main(["score", "site.toml", "--layout", "layout.csv", "--out", "again.h5"]) == 0
    again = read_result("again.h5").score
    np.testing.assert_array_equal(again.positions_m, planned.score.positions_m)
    np.testing.assert_array_equal(again.fisher, planned.score.fisher)
    # An existing file is kept unless --force (exit 2, one line).
    assert main(["show", "old.h5", "--layout-csv", "layout.csv"]) == 2
    assert "--force" in capsys.readouterr().err
    assert main(["show", "old.h5", "--layout-csv", "layout.csv", "--force"]) == 0


def test_rerun_with_old_probes_installed_keeps_them_fixed(planned):
    code = main(
        [
            "plan",
            "site2.toml",
            "--from",
            "old.h5",
            "--from-as",
            "installed",
            "--out",
            "new.h5",
            "--quiet",
        ]
    )
    assert code == 0
    new = read_result("new.h5")
    installed = new.score.positions_m[new.score.installed]
    # Every probe of the old layout is installed now, at exactly its old position.
    for pos in planned.score.positions_m:
        assert np.min(np.linalg.norm(installed - pos, axis=1)) == 0.0
    added = new.score.positions_m[~new.score.installed]
    assert added.shape == (4, 3)
    # The new probes respect the new keep-out.
    assert not np.any((added[:, 0] >= 0) & (added[:, 1] >= 0))
    # The kept meters keep the names they were given (the summary and the file agree).
    names = [n for n, inst in zip(new.probe_names, new.score.installed, strict=True) if inst]
    assert names[0] == "mast" and names[1:] == [f"kept-{k}" for k in range(1, 5)]
    assert new.changes.mode == "installed"
    assert new.changes.added_m.shape[0] == 4 and new.changes.removed_m.shape[0] == 0
    # More probes, same site: the information can only grow (Loewner order), so does d.
    assert new.score.value >= planned.score.value


def test_rerun_from_a_result_of_installed_meters_alone_rescores_it(site):
    # count = 0 scores what a site already has; a later plan that adds meters --from that
    # result compares with it like with any other (it once printed "d = nan").
    extra = [
        {"position_m": [x, y, 0.0]}
        for x, y in ((1500.0, 1200.0), (-1200.0, 1500.0), (1000.0, -1500.0), (0.0, 100.0))
    ]
    for name, count in (("none.toml", 0), ("more.toml", 2)):
        write_site(site / name, SITE, probes={"count": count, "installed": [MAST, *extra]})
    assert main(["plan", "none.toml", "--out", "none.h5", "--quiet"]) == 0
    assert main(["plan", "more.toml", "--from", "none.h5", "--out", "new.h5", "--quiet"]) == 0
    old, changes = read_result("none.h5").score, read_result("new.h5").changes
    assert changes.rescore_note == ""
    assert changes.old_rescored == old.value  # the same meters under the same config


def test_resuming_a_rerun_keeps_the_meters_it_installed(planned):
    # A run started with --from-as installed holds more installed meters than its config text
    # lists; resuming it must keep them (it once fell back to the config's one installed meter).
    args = ["plan", "site2.toml", "--from", "old.h5", "--from-as", "installed"]
    assert main([*args, "--out", "new.h5", "--quiet"]) == 0
    assert main(["plan", "--resume", "new.h5", "--out", "again.h5", "--quiet"]) == 0
    new, again = read_result("new.h5").score, read_result("again.h5").score
    np.testing.assert_array_equal(again.installed, new.installed)
    kept = new.positions_m[new.installed]
    np.testing.assert_array_equal(again.positions_m[again.installed], kept)
    assert again.value >= new.value  # the resumed search starts from the stored layout
    # simulate and plot rebuild the problem from the file: with the same installed meters, the
    # bounds a simulation quotes are the stored ones (they once dropped the kept meters).
    assert main(["simulate", "new.h5", "--trials", "3"]) == 0
    sim = read_result("new.h5").simulation
    s0 = int(np.flatnonzero(sim.scenarios == 0)[0])
    np.testing.assert_allclose(sim.crb_std[s0], new.crb_std[0], rtol=1e-12)


def test_rerun_from_old_start_reports_changes(planned):
    assert main(["plan", "site2.toml", "--from", "old.h5", "--out", "new.h5", "--quiet"]) == 0
    new = read_result("new.h5")
    ch = new.changes
    assert ch.mode == "start"
    n_old, n_new = len(planned.score.positions_m), len(new.score.positions_m)
    kept, moved = ch.kept_m.shape[0], ch.moved_to_m.shape[0]
    assert kept + moved + ch.added_m.shape[0] == n_new
    assert kept + moved + ch.removed_m.shape[0] == n_old
    added = new.score.positions_m[~new.score.installed]
    assert not np.any((added[:, 0] >= 0) & (added[:, 1] >= 0)), "new keep-out honoured"


def test_resume_and_from_do_not_mix(planned, capsys):
    code = main(["plan", "site.toml", "--resume", "old.h5", "--from", "old.h5", "--quiet"])
    assert code == 2
    assert "give --resume or --from, not both" in capsys.readouterr().err


def test_budget_writes_the_table(site, capsys):
    assert main(["budget", "site.toml", "--quiet"]) == 0
    res = read_result(site / "site-budget.h5")
    b = res.budget
    assert res.command == "budget" and res.complete
    assert sorted(zip(b.count.tolist(), b.grade.tolist(), strict=True)) == [
        (3, "basic"),
        (3, "fine"),
        (5, "basic"),
        (5, "fine"),
    ]
    unit = {"basic": 1000.0, "fine": 2500.0}
    np.testing.assert_array_equal(
        b.cost, [c * unit[g] for c, g in zip(b.count, b.grade, strict=True)]
    )
    np.testing.assert_array_equal(b.meets_target, b.value >= -30.0)
    if b.cheapest >= 0:
        assert b.cost[b.cheapest] == b.cost[b.meets_target].min()
    # The scored layout is the cheapest option that meets the target (or the best one).
    row = b.cheapest if b.cheapest >= 0 else int(np.argmax(b.value))
    np.testing.assert_allclose(res.score.positions_m[~res.score.installed], b.layouts[row])
    assert res.score.value == pytest.approx(b.value[row], rel=1e-9)
    # Rescoring the file gives its value: its new meters are of the row's grade. Also for a
    # file written before each meter's grade was stored (the grade comes from the budget row).
    assert res.score.grade[1:] == (b.grade[row],) * int(b.count[row])
    with h5py.File(site / "site-budget.h5", "r+") as f:
        del f["layout/grade"]
    assert read_result(site / "site-budget.h5").score.grade == res.score.grade
    assert main(["score", "site.toml", "--from", "site-budget.h5", "--out", "re.h5"]) == 0
    assert read_result("re.h5").score.value == pytest.approx(res.score.value, rel=1e-12)


def test_budget_without_grades_is_bad_input(site, capsys):
    write_site(site / "nogrades.toml", SITE, grade=None, budget=None)
    assert main(["budget", "nogrades.toml"]) == 2
    err = capsys.readouterr().err
    assert err.startswith("probeplan: error: nogrades.toml:")
    assert "[budget] table" in err and not (site / "nogrades-budget.h5").exists()


def test_simulate_stores_its_fits_in_the_file(planned, capsys):
    assert main(["simulate", "old.h5", "--trials", "20"]) == 0
    out = capsys.readouterr().out
    assert "Simulated fits" in out
    res = read_result("old.h5")
    sim = res.simulation
    assert sim is not None and sim.trials == 20
    assert sim.rms_error.shape == sim.crb_std.shape
    assert np.all(np.isfinite(sim.crb_std))
    # The rest of the result is untouched.
    assert res.score.value == planned.score.value


def test_simulate_rejects_too_few_trials(planned, capsys):
    assert main(["simulate", "old.h5", "--trials", "1"]) == 2
    assert "--trials must be a whole number >= 2" in capsys.readouterr().err


def _png_size(path):
    # PNG: 8-byte signature, then the IHDR chunk whose data starts with width, height
    # (big-endian 32-bit) — the PNG specification (ISO/IEC 15948), section 11.2.2.
    head = path.read_bytes()[:24]
    assert head[:8] == b"\x89PNG\r\n\x1a\n"
    return struct.unpack(">II", head[16:24])


def test_plot_writes_images(planned, site, capsys):
    assert main(["plot", "old.h5"]) == 0
    folder = site / "old_plots"
    files = sorted(p.name for p in folder.iterdir())
    assert files == ["coverage_map.png", "site_map.png"]
    for name in files:
        w, h = _png_size(folder / name)
        assert w > 400 and h > 300
    assert main(["plot", "old.h5", "--format", "svg", "--folder", "svgs"]) == 0
    assert (site / "svgs" / "site_map.svg").read_text().lstrip().startswith("<?xml")


def test_plot_rejects_an_unknown_format(planned, capsys):
    assert main(["plot", "old.h5", "--format", "bmp"]) == 2
    assert "invalid choice: 'bmp'" in capsys.readouterr().err


def test_budget_resume_keeps_finished_options_and_plans_the_rest(site, capsys):
    from concurrent.futures import ThreadPoolExecutor

    from probeplan.budget import OptionPlan, run_budget
    from probeplan.config import load_config

    cfg = load_config(site / "site.toml")
    with ThreadPoolExecutor(max_workers=2) as pool:
        full, complete = run_budget(cfg, executor=pool)
    assert complete
    # Pretend the sweep was interrupted after the two smallest options of grade "basic".
    keep = [k for k in range(len(full.count)) if full.grade[k] == "basic" and full.count[k] == 3]
    done = tuple(
        OptionPlan(
            int(full.count[k]), "basic", float(full.cost[k]), -1.0, full.layouts[k], np.ones(3)
        )
        for k in keep
    )
    with ThreadPoolExecutor(max_workers=2) as pool:
        resumed, complete = run_budget(cfg, executor=pool, done=done)
    assert complete and len(resumed.count) == len(full.count)
    row = [
        k
        for k in range(len(resumed.count))
        if resumed.grade[k] == "basic" and resumed.count[k] == 3
    ][0]
    assert resumed.value[row] == -1.0, "a finished option is kept as stored, not replanned"


def test_budget_resume_on_the_command_line(site, capsys):
    assert main(["budget", "site.toml", "--out", "b.h5", "--quiet"]) == 0
    before = read_result(site / "b.h5")
    assert main(["budget", "--resume", "b.h5", "--quiet"]) == 0
    after = read_result(site / "b.h5")
    np.testing.assert_array_equal(after.budget.value, before.budget.value)
    assert "budget row" in after.notes[0]
    assert main(["plan", "--resume", "b.h5"]) == 2
    assert "`plan --resume` continues a `plan` result" in capsys.readouterr().err


def test_score_notes_rule_breaks_and_keeps_csv_names(site, capsys):
    (site / "l.csv").write_text("name,x_m,y_m,z_m\nalpha,100,1500,0\nbeta,9000,0,0\n")
    (site / "l2.csv").write_text(
        "name,x_m,y_m,z_m\nalpha,100,1500,0\nbeta,0,0,0\ngamma,1500,-900,0\ndelta,-900,1200,0\n"
    )
    assert main(["score", "site.toml", "--layout", "l2.csv", "--out", "s.h5"]) == 0
    res = read_result(site / "s.h5")
    assert res.probe_names == ("mast", "alpha", "beta", "gamma", "delta")
    assert res.notes == ()
    assert main(["score", "site.toml", "--layout", "l.csv"]) == 0
    out = capsys.readouterr().out
    assert "lies outside every mounting region" in " ".join(out.split())
    (site / "under.csv").write_text("x_m,y_m,z_m\n0,0,-3\n")
    assert main(["score", "site.toml", "--layout", "under.csv"]) == 2
    assert "below the ground plane" in capsys.readouterr().err


def test_plan_refuses_fewer_readings_than_parameters(site, capsys):
    write_site(site / "few.toml", SITE, probes={"count": 2, "installed": None})
    assert main(["plan", "few.toml"]) == 2
    err = capsys.readouterr().err
    assert "give 2 readings, which cannot determine 4 estimated parameters" in err
    assert not (site / "few.h5").exists()


def test_from_as_needs_from(site, capsys):
    assert main(["plan", "site.toml", "--from-as", "installed"]) == 2
    assert "--from-as goes with --from" in capsys.readouterr().err


def test_plot_folder_that_is_a_file_is_bad_input(planned, site, capsys):
    (site / "taken").write_text("x")
    assert main(["plot", "old.h5", "--folder", "taken"]) == 2
    assert "exists and is not a folder" in capsys.readouterr().err


# --------------------------------------------------------------------------------------------
# One error boundary: a fault inside the library is a bug (exit 1), never "bad input" (exit 2)
# --------------------------------------------------------------------------------------------


@pytest.mark.parametrize(
    ("module", "function", "argv"),
    [
        ("probeplan.budget", "pareto_front", ["budget", "site.toml", "--quiet"]),
        ("probeplan.simulate", "fit_bounds", ["simulate", "old.h5", "--trials", "3"]),
        ("probeplan.plots", "coverage_grid", ["plot", "old.h5"]),
    ],
)
def test_an_internal_value_error_is_a_bug_not_bad_input(
    planned, capsys, monkeypatch, module, function, argv
):
    import importlib

    def fault(*args, **kwargs):
        raise ValueError("injected fault")

    monkeypatch.setattr(importlib.import_module(module), function, fault)
    monkeypatch.delenv("PROBEPLAN_DEBUG", raising=False)
    assert main(argv) == 1
    err = capsys.readouterr().err
    lines = err.strip().splitlines()
    assert len(lines) == 1, err
    assert lines[0].startswith(f"probeplan {argv[0]}: internal error: ValueError: injected fault")
    assert "PROBEPLAN_DEBUG=1" in lines[0] and "Traceback" not in err


def _tank(name: str, x_m: float, radius_m: float = 40.0) -> dict:
    """A grounded vertical cylinder on the plane (fictional storage tank)."""
    return {
        "kind": "cylinder",
        "name": name,
        "base_m": [x_m, -1000.0, 0.0],
        "radius_m": radius_m,
        "height_m": 20.0,
    }


def test_rerun_reports_what_changed_in_the_structures(site, capsys):
    write_site(site / "tanks.toml", SITE, structure=[_tank("T1", 1000.0)])
    write_site(site / "more.toml", SITE, structure=[_tank("T1", 1000.0), _tank("T2", -500.0)])
    write_site(site / "moved.toml", SITE, structure=[_tank("T1", 1050.0, radius_m=50.0)])
    assert main(["plan", "tanks.toml", "--out", "old.h5", "--quiet"]) == 0
    assert main(["score", "more.toml", "--from", "old.h5", "--out", "more.h5"]) == 0
    ch = read_result("more.h5").changes
    assert ch.structures_added == ("T2",) and ch.structures_removed == ()
    assert ch.structures_changed == ()
    assert "structures: added 'T2'" in capsys.readouterr().out
    # From the two-tank result back to one tank, moved 50 m east and 10 m wider in radius:
    # the bounding box's centre moves 50 m along x and its plan size grows by 20 m (to a
    # fraction of a panel: the boxes are the polygonal meshes', not the circles').
    assert main(["score", "moved.toml", "--from", "more.h5", "--out", "moved.h5"]) == 0
    ch = read_result("moved.h5").changes
    assert ch.structures_added == () and ch.structures_removed == ("T2",)
    assert ch.structures_changed == ("T1",)
    np.testing.assert_allclose(ch.structures_shift_m[0], [50.0, 0.0, 0.0], atol=0.5)
    grown = ch.structures_new_size_m[0] - ch.structures_old_size_m[0]
    np.testing.assert_allclose(grown, [20.0, 20.0, 0.0], atol=0.5)
    out = capsys.readouterr().out
    assert "removed 'T2'" in out and "'T1' moved by (50.00, 0.00, 0.00) m" in out
    # The same structures again: nothing to report but that they are unchanged.
    assert main(["score", "moved.toml", "--from", "moved.h5", "--out", "same.h5"]) == 0
    ch = read_result("same.h5").changes
    assert ch.structures_added == ch.structures_removed == ch.structures_changed == ()
    assert "structures: unchanged" in capsys.readouterr().out
