"""``probeplan locate`` end to end: the command, the file, the summary, the plot, bad input.

The site and the readings are invented for the tests (a fictional site); the physics of the
fit is checked in ``test_locate.py`` against an independent model. Here the readings come
from the stored model itself, so that only the plumbing is under test.
"""

from __future__ import annotations

import h5py
import numpy as np
import pytest
from sites import box, point_source, rectangle, write_site

from probeplan.cli import main
from probeplan.probes import readings
from probeplan.reruns import stored_problem
from probeplan.store import probe_names, read_result

SITE = {
    "probes": {"count": 6, "relative_noise": 0.01},
    "region": [rectangle(8000.0)],
    "source": [point_source(-20.0, (0.0, 0.0, 6000.0), center_range_m=box(3000.0, 5000.0, 8000.0))],
    "design": {"scenarios": 4, "evaluations": 0},
}
N = 12


@pytest.fixture()
def recorded(tmp_path, monkeypatch):
    """A planned layout, its readings of a drifting charge and the truth, as CSV files."""
    monkeypatch.chdir(tmp_path)
    write_site(tmp_path / "site.toml", SITE)
    assert main(["plan", "site.toml", "--out", "plan.h5", "--quiet"]) == 0
    result = read_result("plan.h5")
    _, problem, (pos, gain, axes, grades) = stored_problem(result, "plan.h5")
    meters = problem.meters(pos, gain, axes, grades)
    t = np.arange(N) * 30.0
    truth = np.c_[np.linspace(-20, -25, N), np.linspace(-500, 500, N), np.zeros(N), np.full(N, 6e3)]
    theta = np.tile(problem.theta[0], (N, 1))
    theta[:, problem.est_cols] = truth
    e, _ = problem.scene.evaluate(theta, meters.positions_m, jacobian=False)
    clean = readings(e, meters.axes, meters.gain)  # (N, 6, 1)
    noise = meters.sigma(clean) * np.random.default_rng(1).standard_normal(clean.shape)
    noisy = (clean + noise)[..., 0]
    names = probe_names(result)
    rows = np.c_[t, noisy]
    np.savetxt("readings.csv", rows, delimiter=",", header="time_s," + ",".join(names), comments="")
    header = "time_s," + ",".join(problem.names)
    np.savetxt("truth.csv", np.c_[t, truth], delimiter=",", header=header, comments="")
    return tmp_path, names


def test_locate_stores_its_fits_and_prints_the_summary(recorded, capsys):
    folder, names = recorded
    argv = ["locate", "plan.h5", "--readings", "readings.csv", "--truth", "truth.csv"]
    assert main([*argv, "--out", "loc.h5"]) == 0
    out = capsys.readouterr().out
    assert "Recorded readings: 12 steps" in out
    assert "Delivery check against the truth" in out
    caution = "not a warning system and does not decide when to stop work outdoors"
    assert caution in " ".join(out.split())
    assert max(len(line) for line in out.splitlines()) <= 80
    with h5py.File("loc.h5") as f:
        g = f["locate"]
        assert g["estimate"].shape == (N, 4)
        assert [str(s) for s in g["estimate"].attrs["names"]] == [
            "s0.charge_c",
            "s0.x_m",
            "s0.y_m",
            "s0.z_m",
        ]
        for name in ("time_s", "estimate", "std", "chi2", "dof", "converged", "outliers"):
            assert "units" in g[name].attrs, name
        assert g["outliers"].shape == (N, 6) and g["converged"][()].all()
        assert "delivery" in g
    loc = read_result("loc.h5").location
    assert loc.meter_names == names and loc.delivery is not None
    # The summary and the plot come back from the file alone.
    assert main(["show", "loc.h5"]) == 0
    assert "Recorded readings: 12 steps" in capsys.readouterr().out
    assert main(["plot", "loc.h5", "--folder", "plots"]) == 0
    assert (folder / "plots" / "locate.png").stat().st_size > 0
    # Without --out the fits go back into the file read.
    assert main(argv) == 0
    assert read_result("plan.h5").location is not None


@pytest.mark.parametrize(
    ("edit", "match"),
    [
        (lambda h, r: (h.replace("new-1", "new-9"), r), r"unknown column `new-9`"),
        (lambda h, r: (h.replace("new-1", "new-0"), r), r"column `new-0` appears twice"),
        (lambda h, r: (h, r[:2] + [r[3], r[2]] + r[4:]), r"comes before the time on line"),
        (lambda h, r: (h, [r[0], "x" + r[0]] + r[1:]), r"is not a number|is not a time"),
    ],
)
def test_bad_readings_exit_2_and_write_nothing(recorded, capsys, edit, match):
    lines = open("readings.csv").read().splitlines()
    header, rows = edit(lines[0], lines[1:])
    open("bad.csv", "w").write("\n".join([header, *rows]) + "\n")
    before = open("plan.h5", "rb").read()
    assert main(["locate", "plan.h5", "--readings", "bad.csv", "--out", "loc.h5"]) == 2
    err = capsys.readouterr().err
    assert "bad.csv: line" in err and len(err.strip().splitlines()) == 1
    assert any(__import__("re").search(m, err) for m in match.split("|"))
    assert not (recorded[0] / "loc.h5").exists()
    assert open("plan.h5", "rb").read() == before


def test_an_existing_out_file_is_kept_without_force(recorded, capsys):
    open("loc.h5", "w").write("keep me")
    argv = ["locate", "plan.h5", "--readings", "readings.csv", "--out", "loc.h5"]
    assert main(argv) == 2
    assert "--force" in capsys.readouterr().err
    assert open("loc.h5").read() == "keep me"
    assert main([*argv, "--force"]) == 0


def test_readings_and_truth_are_required_to_match(recorded, capsys):
    assert main(["locate", "plan.h5"]) == 2
    assert "--readings" in capsys.readouterr().err
    open("late.csv", "w").write("time_s,s0.charge_c\n99999,-20\n")
    argv = ["locate", "plan.h5", "--readings", "readings.csv", "--truth", "late.csv"]
    assert main([*argv, "--out", "loc.h5"]) == 2
    assert "late.csv: no time of the truth matches" in capsys.readouterr().err
    assert not (recorded[0] / "loc.h5").exists()
