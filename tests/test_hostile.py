"""Hostile and unlucky inputs, one table-driven or property test per class of input.

Sites are tiny fictional ones from ``tests/sites.py`` (a handful of scenarios, no refinement),
so every ``plan`` here takes a second or two.
"""

from __future__ import annotations

import os
import re
import shutil
import signal
import subprocess
import sys
import time

import h5py
import numpy as np
import pytest
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st
from result_builders import make_result
from sites import meter_grade, write_site

from probeplan.cli import main
from probeplan.errors import EXIT_INTERRUPTED
from probeplan.site import Site, make_region
from probeplan.store import free_names, read_result, write_result

# A 4 km fence with meters 1.8 km apart: three fit (near both ends and the middle), but a
# random draw that puts its first meter near the middle leaves no room for the third.
FENCE = {
    "region": [{"kind": "segment", "start_m": [-2000.0, 0.0, 0.0], "end_m": [2000.0, 0.0, 0.0]}],
    "probes": {"count": 3, "min_spacing_m": 1800.0, "component": "vector"},
    "design": {"random_layouts": 200, "grid_spacing_m": 100.0},
}


def run(capsys, *argv) -> tuple[int, str, str]:
    code = main([str(a) for a in argv])
    out, err = capsys.readouterr()
    return code, out, err


# ---------------------------------------------------------------- 1. crowded sites


def test_random_layouts_can_keep_only_those_that_fit():
    fence = Site(
        (make_region("segment", start_m=(-2000, 0, 0), end_m=(2000, 0, 0)),), min_spacing_m=1800
    )
    kept = fence.random_layouts(300, 3, np.random.default_rng(0), keep_placed=True)
    # Some draws cannot fit the third meter (see FENCE) and are dropped; the rest keep the rules.
    assert 0 < len(kept) < 300
    assert fence.spacing_ok(kept).all() and fence.allowed(kept.reshape(-1, 3)).all()
    with pytest.raises(ValueError, match="too little room"):
        fence.random_layouts(300, 3, np.random.default_rng(0))


def test_a_crowded_site_keeps_its_plan_and_says_how_many_baselines_fit(tmp_path, capsys):
    cfg = write_site(tmp_path / "fence.toml", FENCE)
    code, out, err = run(capsys, "plan", cfg, "--out", tmp_path / "r.h5")
    assert code == 0, err
    r = read_result(tmp_path / "r.h5")
    (name,) = [b.name for b in r.search.baselines if "random" in b.name]
    placed, missing = (int(n) for n in re.findall(r"\d+", name)[:2])
    assert placed + missing == 200 and missing > 0, name
    # The summary may wrap the baseline's name inside its table cell (other cells between).
    assert re.search(r"of 200 could\b.*?\bnot place every probe", out, re.DOTALL), out


# ---------------------------------------------------------------- 2. budgets that do not fit


@pytest.mark.parametrize(
    ("counts", "fit"),
    [([4, 5, 30], [4, 5]), ([30, 4], [4]), ([4, 25, 30], [4])],
    ids=["largest", "unsorted", "two"],
)
def test_a_budget_count_that_does_not_fit_is_a_row_marked_so(tmp_path, capsys, counts, fit):
    layer = {**SMALL, "grade": SMALL["grade"][:1], "budget": {"counts": counts, "target": 0.0}}
    cfg = write_site(tmp_path / "b.toml", layer)
    code, out, err = run(capsys, "budget", cfg, "--out", tmp_path / "b.h5")
    assert code == 0, err
    b = read_result(tmp_path / "b.h5").budget
    assert sorted(b.count[b.fits()].tolist()) == fit
    bad = ~b.fits()
    assert sorted(b.count[bad].tolist()) == sorted(set(counts) - set(fit))
    # A row that does not fit: the worst value (never NaN), an empty layout, a reason, and it
    # never meets the target nor is chosen.
    assert np.all(b.value[bad] == -np.inf) and not b.meets_target[bad].any()
    assert all("cannot place" in b.reason[k] for k in np.flatnonzero(bad))
    assert all(len(b.layouts[k]) == 0 for k in np.flatnonzero(bad))
    assert b.cheapest < 0 or b.fits()[b.cheapest]
    assert f"largest count asked for that fits is {max(fit)}" in " ".join(out.split())


def test_a_budget_none_of_whose_counts_fit_is_refused(tmp_path, capsys):
    layer = {**SMALL, "budget": {"counts": [25, 30]}}
    code, _, err = run(capsys, "budget", write_site(tmp_path / "b.toml", layer))
    assert code == 2 and "b.toml" in err and "budget.counts" in err and "cannot place" in err


# ---------------------------------------------------------------- 5. damaged result files

# A small site with an installed meter and two grades, so a plan and a budget write every
# section that a result of theirs can hold.
# 30 meters 1.5 km apart do not fit its 4 km square (about 19 do): a budget row marked so.
SMALL = {
    "probes": {
        "installed": [{"name": "gate", "position_m": [-1500.0, -1000.0, 0.0]}],
        "min_spacing_m": 1500.0,
    },
    "design": {"random_layouts": 10, "grid_spacing_m": 500.0},
    "grade": [meter_grade("standard", 20.0, 1000.0), meter_grade("fine", 5.0, 3000.0)],
    "budget": {"counts": [4, 5, 30], "target": 0.0},
}


@pytest.fixture(scope="module")
def real_results(tmp_path_factory):
    """A real plan result and a real budget result of the small site."""
    d = tmp_path_factory.mktemp("real")
    cfg = write_site(d / "small.toml", SMALL)
    assert main(["plan", str(cfg), "--out", str(d / "plan.h5"), "--quiet"]) == 0
    assert main(["budget", str(cfg), "--out", str(d / "budget.h5"), "--quiet"]) == 0
    return d / "plan.h5", d / "budget.h5"


def _datasets(path) -> list[str]:
    names: list[str] = []
    with h5py.File(path, "r") as f:
        f.visititems(lambda n, o: names.append(n) if isinstance(o, h5py.Dataset) else None)
    return names


def _replace(f: h5py.File, name: str, data) -> None:
    attrs = dict(f[name].attrs)
    del f[name]
    data = np.asarray(data)
    f.create_dataset(name, data=data, dtype=h5py.string_dtype() if data.dtype.kind == "O" else None)
    f[name].attrs.update(attrs)


def _corrupt(f: h5py.File, name: str, kind: str) -> bool:
    """Damage dataset ``name`` in the way ``kind`` says; False when it does not apply."""
    data = f[name][()]
    text = h5py.check_string_dtype(f[name].dtype) is not None
    if kind == "missing":
        del f[name]
    elif kind == "wrong type":
        bad = np.full(np.shape(data), 7.0) if text else np.full(np.shape(data), "x", dtype="S1")
        _replace(f, name, bad)
    elif kind == "wrong rank":
        _replace(f, name, np.asarray(data)[..., None])
    elif kind == "wrong length":
        if np.ndim(data) == 0 or len(data) == 0:
            return False
        _replace(f, name, np.concatenate([data, data[:1]]))
    elif kind in ("nan", "inf", "fraction", "big"):
        arr = np.array(data)
        if text or arr.size == 0 or arr.dtype.kind not in "fiub":
            return False
        value = {"nan": np.nan, "inf": np.inf, "fraction": 0.5, "big": 1e300}[kind]
        flat = arr.astype(float).ravel()
        if kind in ("fraction", "big") and arr.dtype.kind == "f":
            return False  # any finite number is a number
        flat[0] = value
        _replace(f, name, flat.reshape(arr.shape))
    return True


KINDS = ("missing", "wrong type", "wrong rank", "wrong length", "nan", "inf", "fraction", "big")
# What a reader may accept because the result means it: optional datasets, ±inf where the
# criterion is infinite (a singular layout), lists of any length, and the sections whose
# dataclass states NaN as "not computed".
OPTIONAL = {"layout/axes", "layout/grade", "layout/names", "notes", "search/bound"}
OPTIONAL |= {"search/bound_gap", "score/failure_values", "budget/feasible", "budget/reason"}
# Added later than the first result files, so a file without them still reads.
OPTIONAL |= {"scenarios/source_names", "search/evaluations_spent", "search/evaluation_stages"}
OPTIONAL |= {"search/restart_values"}  # written only where restarts ran
INFINITE = {"score/crb_std", "score/per_scenario", "score/value", "score/failure_values"}
INFINITE |= {"search/history", "search/bound", "search/bound_gap", "search/stage_values"}
INFINITE |= {"search/baseline_values", "budget/value", "search/restart_values"}
ANY_LENGTH = {"notes", "search/history", "search/restart_values"}


def _accepted(name: str, kind: str) -> bool:
    if kind == "missing":
        return name in OPTIONAL
    if kind == "inf":
        return name in INFINITE
    if kind == "wrong length":
        # A baseline's or budget option's layout has as many probes as it has.
        return name in ANY_LENGTH or name.startswith(("search/baselines/", "budget/layouts/"))
    return False


@pytest.mark.parametrize("which", [0, 1], ids=["plan", "budget"])
@pytest.mark.parametrize("kind", KINDS)
def test_every_damaged_dataset_is_refused_naming_file_and_dataset(
    real_results, which, kind, tmp_path, capsys
):
    src = real_results[which]
    failures = []
    for name in _datasets(src):
        copy = tmp_path / f"{name.replace('/', '_')}.h5"
        shutil.copy(src, copy)
        with h5py.File(copy, "r+") as f:
            if not _corrupt(f, name, kind):
                continue
        code, out, err = run(capsys, "show", copy)
        if code == 0 and _accepted(name, kind):
            continue
        if code != 2 or str(copy) not in err or f"/{name}" not in err:
            failures.append(f"{name} ({kind}): exit {code}: {err.strip()[:300]}")
    assert not failures, "\n".join(failures)


ATTRS = [
    ("", "complete", "no"),
    ("", "complete", np.int64(1)),
    ("", "seed", 2.5),
    ("", "seed", "three"),
    ("", "title", np.float64(3.0)),
    ("", "ground_z_m", "low"),
    ("score/value", "criterion", np.int64(4)),
    ("score/unresolved_text", "scenario", "first"),
    ("scenarios/params", "names", np.float64(1.0)),
]


@pytest.mark.parametrize(("path", "key", "value"), ATTRS)
def test_every_damaged_attribute_is_refused_naming_file_and_key(
    real_results, path, key, value, tmp_path, capsys
):
    copy = tmp_path / "r.h5"
    shutil.copy(real_results[0], copy)
    with h5py.File(copy, "r+") as f:
        (f[path] if path else f).attrs[key] = value
    code, _, err = run(capsys, "show", copy)
    assert code == 2 and str(copy) in err and f"`{key}`" in err, err


# ---------------------------------------------------------------- 5. degenerate layouts: no NaN


def _nan_datasets(path) -> list[str]:
    found: list[str] = []

    def visit(name, obj):
        if isinstance(obj, h5py.Dataset) and obj.dtype.kind == "f" and np.isnan(obj[()]).any():
            found.append(name)

    with h5py.File(path, "r") as f:
        f.visititems(visit)
    return found


# Classes of degenerate layouts about the base site's charge at (0, 0, 3000) m (tests/sites.py):
# all probes at one point, far beyond any field, collinear, about the charge (within a
# nanometre, or a hair outside), and the bottom of the float range.
DEGENERATE = st.sampled_from(
    [
        lambda u: [[u, u, 0.0]] * 4,
        lambda u: [[1e15 * (1 + k + u), 0.0, 0.0] for k in range(4)],
        lambda u: [[k * (1 + u), 0.0, 0.0] for k in range(4)],
        lambda u: [[u * 1e-160, 0.0, 3000.0], [100, 0, 0], [0, 100, 0], [5, 5, 0]],
        lambda u: [[0.0, 0.0, 3000.0 - 1e-6 * (1 + u)], [100, 0, 0], [0, 100, 0], [5, 5, 0]],
        lambda u: [[u * 1e-300, k * 1e-300, 0.0] for k in range(4)],
    ]
)


@settings(
    max_examples=12, deadline=None, suppress_health_check=[HealthCheck.function_scoped_fixture]
)
@given(make=DEGENERATE, u=st.floats(0.0, 1.0))
def test_no_written_result_holds_nan_over_degenerate_layouts(tmp_path, capsys, make, u):
    cfg = write_site(tmp_path / "s.toml", design={"random_layouts": 10, "grid_spacing_m": 1000.0})
    csv = tmp_path / "lay.csv"
    csv.write_text("x_m,y_m,z_m\n" + "".join(f"{x!r},{y!r},{z!r}\n" for x, y, z in make(u)))
    out = tmp_path / "r.h5"
    code, _, err = run(capsys, "score", cfg, "--layout", csv, "--out", out, "--force")
    assert code in (0, 2), err
    if code == 2:
        assert str(csv) in err
    else:
        assert _nan_datasets(out) == []


def test_a_plan_on_a_site_too_far_for_any_field_holds_no_nan(tmp_path, capsys):
    # Meters 1e12 m away read nothing: every layout is singular, every bound −inf, never NaN.
    far = {"kind": "rectangle", "min_m": [1e12, 1e12], "max_m": [1e12 + 4e3, 1e12 + 4e3]}
    cfg = write_site(
        tmp_path / "far.toml", region=[far], design={"random_layouts": 10, "grid_spacing_m": 1e3}
    )
    code, _, err = run(capsys, "plan", cfg, "--out", tmp_path / "r.h5")
    assert code in (0, 2), err
    if code == 0:
        assert _nan_datasets(tmp_path / "r.h5") == []


# ---------------------------------------------------------------- 5. configs beyond any run

BEYOND = [
    ("nul in title", {"title": "a\x00b"}, ["`title`", "NUL"]),
    (
        "nul in a name",
        {"probes": {"installed": [{"name": "g\x00", "position_m": [0, 0, 0]}]}},
        ["NUL"],
    ),
    (
        "huge vertex",
        {
            "region": [
                {"kind": "polygon", "vertices_m": [[0, 0], [1e308, 0], [1e308, 1e308]], "z_m": 0}
            ]
        },
        ["vertices_m[1][0]", "1e+08 m"],
    ),
    (
        "huge rectangle",
        {"region": [{"kind": "rectangle", "min_m": [-1e300, 0], "max_m": [1, 1], "z_m": 0}]},
        ["min_m[0]", "1e+08 m"],
    ),
    ("scenarios", {"design": {"scenarios": 10**9}}, ["design.scenarios", "GiB", "limit"]),
    ("scenarios overflow", {"design": {"scenarios": 10**30}}, ["design.scenarios", "limit"]),
    ("random layouts", {"design": {"random_layouts": 10**12}}, ["random_layouts", "limit"]),
    ("evaluations", {"design": {"evaluations": 10**12}}, ["design.evaluations", "limit"]),
    ("count", {"probes": {"count": 10**9}}, ["probes.count", "limit"]),
    ("grid spacing", {"design": {"grid_spacing_m": 1e-6}}, ["grid_spacing_m", "limit"]),
    ("grid and scenarios", {"design": {"grid_spacing_m": 2.0, "scenarios": 10**4}}, ["limit"]),
]


@pytest.mark.parametrize(("layer", "pieces"), [c[1:] for c in BEYOND], ids=[c[0] for c in BEYOND])
def test_a_config_beyond_any_run_is_refused_at_once(tmp_path, capsys, layer, pieces):
    cfg = write_site(tmp_path / "big.toml", layer)
    code, _, err = run(capsys, "plan", cfg, "--out", tmp_path / "r.h5")
    assert code == 2, err
    assert str(cfg) in err and all(p in err for p in pieces), err
    assert not (tmp_path / "r.h5").exists()


def test_a_layout_of_a_million_rows_is_refused_at_once(tmp_path, capsys):
    cfg = write_site(tmp_path / "s.toml")
    csv = tmp_path / "million.csv"
    csv.write_text("x_m,y_m,z_m\n" + "1,2,0\n" * 1_000_000)
    code, _, err = run(capsys, "score", cfg, "--layout", csv)
    assert code == 2 and str(csv) in err and "at most" in err, err


# ---------------------------------------------------------------- 7. every file error names it

BAD_CSV = {
    "empty": b"",
    "comments only": b"# nothing\n",
    "header only": b"x_m,y_m,z_m\n",
    "unknown column": b"x_m,y_m,z_m,colour\n1,2,0,red\n",
    "missing column": b"x_m,y_m\n1,2\n",
    "twice": b"x_m,y_m,z_m,x_m\n1,2,0,1\n",
    "text number": b"x_m,y_m,z_m\n1,two,0\n",
    "nan": b"x_m,y_m,z_m\n1,nan,0\n",
    "inf": b"x_m,y_m,z_m\n1,inf,0\n",
    "huge": b"x_m,y_m,z_m\n1,1e400,0\n",
    "short row": b"x_m,y_m,z_m\n1,2\n",
    "long row": b"x_m,y_m,z_m\n1,2,0,4\n",
    "bad component": b"x_m,y_m,z_m,component\n1,2,0,sideways\n",
    "not utf-8": b"x_m,y_m,z_m\n1,2,\xff\n",
    "nul": b"x_m,y_m,z_m\n1,2,0\x00\n",
    "on the charge": b"x_m,y_m,z_m\n0,0,3000\n1,2,0\n3,4,0\n5,6,0\n",
}


@pytest.mark.parametrize("data", BAD_CSV.values(), ids=BAD_CSV.keys())
@pytest.mark.parametrize("command", ["score", "simulate"])
def test_every_layout_csv_error_names_the_file(tmp_path, capsys, data, command):
    cfg = write_site(tmp_path / "s.toml")
    csv = tmp_path / "lay.csv"
    csv.write_bytes(data)
    argv = [command, cfg, "--layout", csv] if command == "score" else [command, csv]
    code, _, err = run(capsys, *argv)
    assert code == 2, err
    assert str(csv) in err or (command == "simulate" and "lay.csv" in err), err


@pytest.mark.parametrize(
    "data",
    [b"", b"not hdf5 at all", b"\x89HDF\r\n\x1a\n" + b"\x00" * 64],
    ids=["empty", "text", "truncated"],
)
@pytest.mark.parametrize("command", ["show", "simulate", "plot", "resume", "from"])
def test_every_result_file_error_names_the_file(tmp_path, capsys, data, command):
    cfg = write_site(tmp_path / "s.toml")
    bad = tmp_path / "bad.h5"
    bad.write_bytes(data)
    argv = {
        "show": ["show", bad],
        "simulate": ["simulate", bad],
        "plot": ["plot", bad],
        "resume": ["plan", "--resume", bad],
        "from": ["plan", cfg, "--from", bad],
    }[command]
    code, _, err = run(capsys, *argv)
    assert code == 2 and str(bad) in err, err


# ---------------------------------------------------------------- 3, 4. real processes


def _children(pid: int) -> set[int]:
    """Every descendant of ``pid`` (Linux /proc)."""
    out: set[int] = set()
    todo = [pid]
    while todo:
        p = todo.pop()
        try:
            with open(f"/proc/{p}/task/{p}/children") as fh:
                kids = {int(k) for k in fh.read().split()}
        except OSError:
            kids = set()
        out |= kids
        todo += kids
    return out


def _alive(pid: int) -> bool:
    try:
        with open(f"/proc/{pid}/stat") as fh:
            return fh.read().split(")")[-1].split()[0] != "Z"
    except OSError:
        return False


@pytest.mark.skipif(not os.path.exists("/proc/self/task"), reason="needs Linux /proc")
def test_budget_workers_do_not_outlive_their_parent(tmp_path):
    layer = {**SMALL, "design": {"random_layouts": 10, "grid_spacing_m": 100.0, "scenarios": 40}}
    cfg = write_site(tmp_path / "b.toml", layer)
    proc = subprocess.Popen(
        [sys.executable, "-m", "probeplan", "budget", str(cfg), "--out", str(tmp_path / "b.h5")],
        stdout=subprocess.DEVNULL,
        stderr=subprocess.DEVNULL,
    )
    kids: set[int] = set()
    deadline = time.monotonic() + 120
    while len(kids) < 2 and proc.poll() is None and time.monotonic() < deadline:
        time.sleep(0.05)  # poll for the pool's workers (and the stop flag's manager)
        kids = _children(proc.pid)
    proc.kill()  # the parent dies without a chance to shut its pool down
    proc.wait()
    deadline = time.monotonic() + 30
    while any(_alive(k) for k in kids) and time.monotonic() < deadline:
        time.sleep(0.1)
    left = [k for k in kids if _alive(k)]
    for k in left:
        os.kill(k, signal.SIGKILL)
    assert kids and not left


def test_two_runs_writing_at_once_never_replace_each_other(tmp_path):
    cfg = write_site(tmp_path / "s.toml", design={"random_layouts": 10, "grid_spacing_m": 1000.0})

    def start(*extra):
        return subprocess.Popen(
            [sys.executable, "-m", "probeplan", "plan", str(cfg), "--quiet", *extra],
            cwd=tmp_path,
            stdout=subprocess.PIPE,
            stderr=subprocess.PIPE,
            text=True,
        )

    # Two runs to one explicit name, two to the default name, all at once.
    runs = [start("--out", "same.h5"), start("--out", "same.h5"), start(), start()]
    done = [(p.wait(timeout=300), p.stderr.read()) for p in runs]
    codes = sorted(c for c, _ in done[:2])
    assert codes == [0, 2], done
    assert "exists" in next(e for c, e in done[:2] if c == 2)
    assert [c for c, _ in done[2:]] == [0, 0], done
    h5 = sorted(p.name for p in tmp_path.glob("*.h5"))
    assert len(h5) == 3 and "same.h5" in h5, h5
    for name in h5:
        assert read_result(tmp_path / name).complete
    assert not list(tmp_path.glob(".tmp-*")) and not list(tmp_path.glob("*.tmp*"))


def _signal_run(folder, cfg, sig, delay_s: float) -> tuple[int, str, str]:
    proc = subprocess.Popen(
        [sys.executable, "-m", "probeplan", "plan", str(cfg), "--out", "r.h5"],
        cwd=folder,
        stdout=subprocess.PIPE,
        stderr=subprocess.PIPE,
        text=True,
        env={**os.environ, "PROBEPLAN_DEBUG": ""},
    )
    time.sleep(delay_s)
    proc.send_signal(sig)
    out, err = proc.communicate(timeout=300)
    return proc.returncode, out, err


@pytest.mark.skipif(sys.platform != "linux", reason="POSIX signals and Linux start-up times")
def test_a_signal_at_any_moment_keeps_the_contract(tmp_path):
    # The moments are fractions of one uninterrupted run's time, so the signals fall, on any
    # machine, in the start-up, the config check, the search stages, the write and the
    # summary; whichever it hits, the contract holds (contract.md, "stop cleanly").
    cfg = write_site(tmp_path / "s.toml", design={"random_layouts": 200, "grid_spacing_m": 200.0})
    start = time.monotonic()
    subprocess.run(
        [sys.executable, "-m", "probeplan", "plan", str(cfg), "--out", "full.h5", "--quiet"],
        cwd=tmp_path,
        check=True,
        capture_output=True,
    )
    whole_s = time.monotonic() - start
    sigs = [signal.SIGTERM, signal.SIGINT]
    for k, frac in enumerate((0.15, 0.35, 0.55, 0.75, 0.9, 0.98)):
        folder = tmp_path / f"m{k}"
        folder.mkdir()
        code, out, err = _signal_run(folder, cfg, sigs[k % 2], frac * whole_s)
        where = f"signal at {frac:.0%} of {whole_s:.1f} s: exit {code}\n{out[-300:]}\n{err}"
        assert "Traceback" not in err and "Exception ignored" not in err, where
        assert not [p for p in folder.iterdir() if p.name != "r.h5"], where  # no temporary
        result = folder / "r.h5"
        if code == 0:
            assert read_result(result).complete, where  # done before the signal came
            continue
        assert code == EXIT_INTERRUPTED, where
        if result.exists():
            assert "no result file was written" not in err, where
            r = read_result(result)
            said = (out + err).lower()
            assert "interrupted" in said and (not r.complete or "r.h5" in err), where
        else:
            assert "no result file was written" in err, where


def test_a_default_name_taken_before_the_write_begins_moves_on(tmp_path):
    # The race the real processes above can hit: another run wrote the default name between
    # this run's choice of it and the start of its write.
    names = free_names("site", tmp_path)
    first = next(names)
    first.write_bytes(b"the other run")
    r = make_result(np.random.default_rng(5))
    assert write_result(r, first, names=names) == tmp_path / "site-2.h5"
    assert first.read_bytes() == b"the other run"


def test_an_interrupt_while_a_class_is_made_is_an_interrupt(monkeypatch, capsys):
    # Python wraps an exception raised in __set_name__ (a dataclass of a module imported on
    # first use, say) in a RuntimeError (Python data model, "Creating the class object"). A
    # Ctrl-C in that instant must still end as an interrupt (exit 130), not an internal error.
    import probeplan.cli as cli

    class Trips:
        def __set_name__(self, owner, name):
            raise KeyboardInterrupt

    def command(args, written):
        type("Late", (), {"field": Trips()})
        return 0

    monkeypatch.setitem(cli.COMMANDS, "plan", command)
    assert main(["plan", "whatever.toml"]) == EXIT_INTERRUPTED
    err = capsys.readouterr().err
    assert "internal error" not in err
