"""HDF5 results and layout CSVs: exact round trips, atomic writes, clear errors on bad files.

The round trips check against the file format itself: h5py reads back what HDF5 stored, and
IEEE-754 float64 values (±inf and NaN included) must come back bit for bit.
"""

from __future__ import annotations

from pathlib import Path

import h5py
import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st
from hypothesis.extra.numpy import arrays
from result_builders import (
    CONFIG_TEXT,
    NAMES,
    assert_results_equal,
    assert_same,
    make_result,
    make_simulation,
)

from probeplan.errors import InputError
from probeplan.problem import Score
from probeplan.result import Result, SearchInfo
from probeplan.store import (
    LayoutFile,
    free_name,
    param_unit,
    read_layout_csv,
    read_result,
    write_result,
)
from probeplan.store import write as store_write

# --------------------------------------------------------------------------------------------
# Round trip
# --------------------------------------------------------------------------------------------


@pytest.mark.parametrize("search", [True, False])
@pytest.mark.parametrize("budget", [True, False])
@pytest.mark.parametrize("singular", [True, False])
def test_round_trip_is_exact(tmp_path, search, budget, singular):
    r = make_result(np.random.default_rng(1), search=search, budget=budget, singular=singular)
    path = write_result(r, tmp_path / "r.h5")
    assert path == tmp_path / "r.h5"
    assert_results_equal(r, read_result(path))


def test_round_trip_free_space_and_no_bound(tmp_path):
    rng = np.random.default_rng(2)
    r = make_result(rng, budget=False)
    info = SearchInfo(np.zeros(0), None, None, 10.0, 5)
    r = Result(**{**r.__dict__, "ground_z_m": None, "search": info, "extra": {}})
    q = read_result(write_result(r, tmp_path / "r.h5"))
    assert q.ground_z_m is None
    assert q.search.bound is None and q.search.bound_gap is None
    assert q.search.history.shape == (0,)
    assert_results_equal(r, q)
    with h5py.File(tmp_path / "r.h5") as f:
        assert "search/bound" not in f  # "where computed" (contract)
        assert "ground_z_m" not in f.attrs


def test_round_trip_simulation_section(tmp_path):
    rng = np.random.default_rng(13)
    sim = make_simulation(rng)
    r = make_result(rng, budget=False)
    r = Result(**{**r.__dict__, "simulation": sim, "changes": None})
    path = write_result(r, tmp_path / "sim.h5")
    assert_results_equal(r, read_result(path))
    with h5py.File(path) as f:
        assert list(f["simulation/rms_error"].attrs["units"]) == ["C", "m", "m", "m", "V/m"]
        assert f["simulation/location_rms_m"].attrs["units"] == "m"


@settings(max_examples=25, deadline=None)
@given(
    arrays(
        np.float64,
        st.tuples(st.integers(1, 4), st.just(3)),
        # Positions are finite in every result (the reader refuses others as damaged).
        elements=st.floats(allow_nan=False, allow_infinity=False),
    )
)
def test_positions_round_trip_bit_for_bit(tmp_path_factory, positions):
    rng = np.random.default_rng(3)
    r = make_result(rng, search=False, budget=False)
    n = positions.shape[0]
    score = Score(
        **{
            **r.score.__dict__,
            "positions_m": positions,
            "installed": np.zeros(n, dtype=bool),
            "gain": np.ones(n),
            "saturated": np.zeros(n),
            "failure_values": None,
            "axes": None,
            "grade": None,
        }
    )
    r = Result(**{**r.__dict__, "score": score})
    path = tmp_path_factory.mktemp("h") / "p.h5"
    q = read_result(write_result(r, path))
    assert q.score.positions_m.tobytes() == positions.tobytes()


def test_contract_paths_units_and_provenance(tmp_path):
    r = make_result(np.random.default_rng(4))
    path = write_result(r, tmp_path / "r.h5")
    with h5py.File(path) as f:
        a = f.attrs
        assert a["probeplan_version"] == "0.1.0"
        assert a["created_utc"] == "2024-05-01T12:00:00Z"
        assert a["command"] == "plan"
        assert a["config_toml"] == CONFIG_TEXT
        assert a["seed"] == 11
        assert not a["complete"]
        assert a["caution"] == "esd"
        assert a["sign_convention"] == "physics: E points away from positive charge"
        assert f["layout/positions_m"].shape == (3, 3)
        assert f["layout/positions_m"].attrs["units"] == "m"
        assert f["layout/installed"].dtype == bool
        assert list(f["layout/names"].asstr()[()]) == ["mast-A", "new-0", "new-1"]
        assert list(f["scenarios/params"].attrs["names"]) == list(NAMES)
        want_units = ["C", "m", "m", "m", "V/m"]
        assert list(f["scenarios/params"].attrs["units"]) == want_units
        assert list(f["score/crb_std"].attrs["units"]) == want_units
        assert f["score/fisher"].shape == (3, 5, 5)
        assert f["score/fisher"].attrs["units"] == "SI (1/(unit_i unit_j))"
        v = f["score/value"]
        assert v.shape == ()
        assert (v.attrs["criterion"], v.attrs["aggregate"]) == ("d", "quantile:0.9")
        assert v.attrs["units"] == "log det, SI"
        assert f["search/history"].shape == (17,)
        assert f["search/bound"].shape == ()
        for name in ("count", "grade", "cost", "value", "meets_target"):
            assert f[f"budget/{name}"].shape == (3,)
        assert f["budget"].attrs["cheapest"] == 1
        assert f["budget/layouts/2/positions_m"].shape == (4, 3)
        assert list(f["budget/grade"].asstr()[()]) == ["standard", "précis", "standard"]
        # Every float dataset that is not a pure number carries units.
        missing = []
        f.visititems(
            lambda name, obj: (
                missing.append(name)
                if isinstance(obj, h5py.Dataset)
                and obj.dtype.kind == "f"
                and "units" not in obj.attrs
                else None
            )
        )
        assert missing == []


@pytest.mark.parametrize(
    ("name", "unit"),
    [
        ("s0.charge_c", "C"),
        ("s3.z_m", "m"),
        ("s1.sigma_m", "m"),
        ("bg.x_v_per_m", "V/m"),  # ends in `_m` too: the longer suffix wins
        ("weird", "1"),
    ],
)
def test_param_unit(name, unit):
    assert param_unit(name) == unit


# --------------------------------------------------------------------------------------------
# Atomic writes
# --------------------------------------------------------------------------------------------


def test_write_leaves_no_temporary(tmp_path):
    write_result(make_result(np.random.default_rng(5)), tmp_path / "r.h5")
    assert sorted(p.name for p in tmp_path.iterdir()) == ["r.h5"]


def test_refuses_existing_file_without_force(tmp_path):
    target = tmp_path / "r.h5"
    target.write_bytes(b"precious")
    with pytest.raises(InputError, match=r"r\.h5 exists; pass --force to overwrite it"):
        write_result(make_result(np.random.default_rng(6)), target)
    assert target.read_bytes() == b"precious"
    assert sorted(p.name for p in tmp_path.iterdir()) == ["r.h5"]


def test_force_overwrites(tmp_path):
    target = tmp_path / "r.h5"
    target.write_bytes(b"old")
    r = make_result(np.random.default_rng(7))
    write_result(r, target, force=True)
    assert_results_equal(r, read_result(target))
    assert sorted(p.name for p in tmp_path.iterdir()) == ["r.h5"]


@pytest.mark.parametrize("error", [RuntimeError("boom"), KeyboardInterrupt()])
def test_failed_write_leaves_nothing(tmp_path, monkeypatch, error):
    def half_write(f, result):
        f.create_dataset("layout/positions_m", data=np.zeros((2, 3)))
        raise error

    monkeypatch.setattr(store_write, "_write", half_write)
    with pytest.raises(type(error)):
        write_result(make_result(np.random.default_rng(8)), tmp_path / "r.h5")
    assert list(tmp_path.iterdir()) == []


def test_failed_overwrite_keeps_old_file(tmp_path, monkeypatch):
    target = tmp_path / "r.h5"
    r = make_result(np.random.default_rng(9))
    write_result(r, target)

    def boom(f, result):
        raise RuntimeError("boom")

    monkeypatch.setattr(store_write, "_write", boom)
    with pytest.raises(RuntimeError):
        write_result(r, target, force=True)
    assert_results_equal(r, read_result(target))
    assert sorted(p.name for p in tmp_path.iterdir()) == ["r.h5"]


def test_missing_folder_and_folder_target(tmp_path):
    r = make_result(np.random.default_rng(10))
    with pytest.raises(InputError, match=r"the folder .*nowhere does not exist"):
        write_result(r, tmp_path / "nowhere" / "r.h5")
    with pytest.raises(InputError, match="is a folder"):
        write_result(r, tmp_path)


# --------------------------------------------------------------------------------------------
# Bad result files
# --------------------------------------------------------------------------------------------


def test_read_missing_file(tmp_path):
    with pytest.raises(InputError, match=r"gone\.h5: no such result file"):
        read_result(tmp_path / "gone.h5")


def test_read_not_hdf5(tmp_path):
    path = tmp_path / "notes.h5"
    path.write_text("title = 'a config, not a result'\n")
    with pytest.raises(InputError, match=r"notes\.h5: not an HDF5 file"):
        read_result(path)


def test_read_foreign_hdf5(tmp_path):
    path = tmp_path / "other.h5"
    with h5py.File(path, "w") as f:
        f["data"] = np.arange(3)
    with pytest.raises(InputError, match=r"other\.h5: an HDF5 file, but not a probeplan result"):
        read_result(path)


@pytest.mark.parametrize("path", ["score/fisher", "scenarios/params", "search/history"])
def test_read_incomplete_result_names_what_is_missing(tmp_path, path):
    target = write_result(make_result(np.random.default_rng(12)), tmp_path / "r.h5")
    with h5py.File(target, "a") as f:
        del f[path]
    with pytest.raises(InputError, match=rf"r\.h5: not a complete probeplan result.*/{path}"):
        read_result(target)


# --------------------------------------------------------------------------------------------
# Output names
# --------------------------------------------------------------------------------------------


def test_free_name(tmp_path):
    assert free_name("site", tmp_path) == tmp_path / "site.h5"
    (tmp_path / "site.h5").touch()
    assert free_name("site", tmp_path) == tmp_path / "site-2.h5"
    (tmp_path / "site-2.h5").touch()
    assert free_name("site", tmp_path) == tmp_path / "site-3.h5"


# --------------------------------------------------------------------------------------------
# Layout CSV
# --------------------------------------------------------------------------------------------


def write(tmp_path, text: str, name: str = "layout.csv") -> Path:
    path = tmp_path / name
    path.write_text(text, encoding="utf-8")
    return path


def test_layout_any_order_and_optional_columns(tmp_path):
    path = write(
        tmp_path,
        "# new meters (fictional)\n"
        "name, z_m ,x_m,y_m,component,grade,gain\n"
        "\n"
        "north,0,10.5,-3,z,standard,\n"
        "mast,12,-1e3,2.5e2,0 0 2,,1.3\n",
    )
    lay = read_layout_csv(path)
    assert isinstance(lay, LayoutFile)
    assert_same(lay.positions_m, np.array([[10.5, -3.0, 0.0], [-1000.0, 250.0, 12.0]]))
    assert lay.names == ("north", "mast")
    assert lay.components == ("z", (0.0, 0.0, 1.0))
    assert lay.grades == ("standard", None)
    assert lay.gains == (None, 1.3)


def test_layout_minimal_columns(tmp_path):
    lay = read_layout_csv(write(tmp_path, "x_m,y_m,z_m\n1,2,3\n4,5,6\n"))
    assert lay.positions_m.shape == (2, 3)
    assert lay.names == ("new-0", "new-1")
    assert lay.components is None and lay.grades is None and lay.gains is None


@settings(max_examples=25, deadline=None)
@given(arrays(np.float64, st.tuples(st.integers(1, 5), st.just(3)), elements=st.floats(-1e7, 1e7)))
def test_layout_numbers_round_trip(tmp_path_factory, positions):
    # repr of a float64 reads back to the same float (Python's shortest round-trip repr).
    rows = "".join(",".join(repr(float(v)) for v in row) + "\n" for row in positions)
    text = "x_m,y_m,z_m\n" + rows
    path = tmp_path_factory.mktemp("csv") / "l.csv"
    path.write_text(text)
    assert read_layout_csv(path).positions_m.tobytes() == positions.tobytes()


@pytest.mark.parametrize(
    ("text", "message"),
    [
        (
            "x_m,y_m,z_m\n1,2,3\n4,5,6\n7,abc,9\n",
            r"layout\.csv: line 4, column y_m: expected a number in metres, got 'abc'",
        ),
        (
            "x_m,y_m,z_m\n# a comment\n\n1,nan,3\n",
            r"line 4, column y_m: expected a finite number in metres, got 'nan'",
        ),
        ("x_m,y_m,z_m\n1,2,inf\n", r"line 2, column z_m: expected a finite number"),
        ("x_m,y_m,z_m\n1,,3\n", r"line 2, column y_m: expected a number in metres, got an empty"),
        ("x_m,z_m\n1,2\n", r"layout\.csv: line 1: missing column `y_m`"),
        ("x_m,y_m,z_m,height\n1,2,3,4\n", r"unknown column `height`; allowed columns: x_m, y_m"),
        ("x_m,y_m,Z_m\n1,2,3\n", r"unknown column `Z_m` \(did you mean `z_m`\?\)"),
        ("", r"layout\.csv: empty file; expected a header row with x_m,y_m,z_m"),
        ("\n# only a comment\n", r"empty file"),
        ("x_m,y_m,z_m\n", r"no probes: the header is on line 1 but no row follows"),
        ("x_m,y_m,z_m\n1,2,3,4\n", r"line 2: 4 cells, expected 3"),
        ("x_m,x_m,y_m,z_m\n1,1,2,3\n", r"column `x_m` appears twice"),
        ("x_m,y_m,z_m,gain\n1,2,3,-1\n", r"line 2, column gain: expected a calibration factor > 0"),
        ("x_m,y_m,z_m,component\n1,2,3,up\n", r"line 2, column component: expected one of x, y"),
        ("name,x_m,y_m,z_m\na,1,2,3\na,4,5,6\n", r"line 3, column name: 'a' is already the name"),
    ],
)
def test_layout_errors_name_file_line_and_column(tmp_path, text, message):
    with pytest.raises(InputError, match=message):
        read_layout_csv(write(tmp_path, text))


def test_layout_missing_file(tmp_path):
    with pytest.raises(InputError, match=r"gone\.csv: no such layout file"):
        read_layout_csv(tmp_path / "gone.csv")
