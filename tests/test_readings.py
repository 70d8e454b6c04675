"""Readings and truth CSV files: what is accepted, and the one message for each mistake.

The meters below are invented for the tests: two ground meters reading E_z and one 3-axis
meter on a mast.
"""

from __future__ import annotations

import datetime as dt

import numpy as np
import pytest

from probeplan.errors import InputError
from probeplan.readings import read_readings, read_truth, reading_columns

NAMES = ("north", "south", "mast")
AXES = np.zeros((3, 3, 3))
AXES[0, 0] = AXES[1, 0] = [0.0, 0.0, 1.0]
AXES[2] = np.eye(3)
PARAMS = ("s0.charge_c", "s0.x_m", "s0.y_m", "s0.z_m")


def write(tmp_path, text: str, name: str = "readings.csv", encoding="utf-8"):
    path = tmp_path / name
    path.write_bytes(text.encode(encoding))
    return path


def read(tmp_path, text: str, **kwargs):
    return read_readings(write(tmp_path, text), NAMES, AXES, **kwargs)


def test_columns_are_named_as_the_meters():
    cols = reading_columns(NAMES, AXES)
    assert cols == {
        "north": (0, 0),
        "south": (1, 0),
        "mast.x": (2, 0),
        "mast.y": (2, 1),
        "mast.z": (2, 2),
    }


def test_values_missing_cells_and_column_order(tmp_path):
    text = (
        "# fictional test record\n"
        "mast.z,time_s,south,north,mast.x\n"
        "-5.5,0.0,-1200,-1300.5,3\n"
        "\n"
        "-6,10,,-1290,4\n"
    )
    r = read(tmp_path, text)
    np.testing.assert_array_equal(r.time_s, [0.0, 10.0])
    assert not r.time_is_utc
    assert r.columns == ("mast.z", "south", "north", "mast.x")
    assert r.values_v_per_m.shape == (2, 3, 3)
    np.testing.assert_array_equal(r.values_v_per_m[0, :, 0], [-1300.5, -1200.0, 3.0])
    assert r.values_v_per_m[1, 2, 2] == -6.0
    # Empty cell, a meter axis without a column (mast.y) and unused axes: missing, value 0.
    assert not r.present[1, 1, 0] and r.values_v_per_m[1, 1, 0] == 0.0
    assert not r.present[:, 2, 1].any()
    assert not r.present[:, 0, 1:].any()
    assert np.all(np.isfinite(r.values_v_per_m))


def test_iso_times_in_utc_and_a_byte_order_mark(tmp_path):
    text = (
        "time,north\n"
        "2026-07-01T14:05:00Z,-10\n"
        "2026-07-01T16:05:01+02:00,-11\n"  # 14:05:01 UTC
        "2026-07-01T14:05:02,-12\n"  # no offset: UTC
    )
    r = read_readings(write(tmp_path, text, encoding="utf-8-sig"), NAMES, AXES)
    assert r.time_is_utc
    t0 = dt.datetime(2026, 7, 1, 14, 5, tzinfo=dt.UTC).timestamp()
    np.testing.assert_allclose(r.time_s, t0 + np.array([0.0, 1.0, 2.0]))


@pytest.mark.parametrize(
    ("text", "match"),
    [
        ("time_s,nort\n0,1\n", r"line 1, column 2: unknown column `nort`.*did you mean `north`"),
        ("time_s,mast\n0,1\n", r"meter `mast` reads three axes; name its columns `mast.x`"),
        ("time_s,north.z\n0,1\n", r"meter `north` reads one axis; name its column `north`"),
        ("time_s,north,south,north\n0,1,2,3\n", r"column 4: column `north` appears twice"),
        ("time_s,time,north\n0,0,1\n", r"both `time_s` and `time`"),
        ("north,south\n1,2\n", r"neither `time_s` nor `time`"),
        ("time_s\n0\n", r"no readings columns"),
        ("time_s,north\n", r"no rows: the header is on line 1"),
        ("", r"empty file"),
        ("time_s,north\n0,1\n1,abc\n", r"line 3, column 2 \(`north`\): 'abc' is not a number"),
        ("time_s,north\n0,nan\n", r"line 2, column 2 \(`north`\): 'nan' is not a finite"),
        ("time_s,north\n0,1\n1,inf\n", r"'inf' is not a finite number"),
        ("time_s,north\n0,1\n1,2,3\n", r"line 3: 3 cells where the header on line 1 has 2"),
        ("time_s,north\n5,1\n4,2\n", r"line 3, column 1 \(`time_s`\): time 4 comes before"),
        ("time_s,north\n5,1\n5,2\n", r"line 3, column 1 \(`time_s`\): time 5 repeats"),
        ("time_s,north\n,1\n", r"line 2, column 1 \(`time_s`\): an empty cell is not a time"),
        ("time,north\nyesterday,1\n", r"'yesterday' is not a time; give an ISO 8601 time"),
        ("time_s,,north\n0,1,2\n", r"column 2: a column without a name"),
    ],
)
def test_bad_readings_name_file_line_and_column(tmp_path, text, match):
    with pytest.raises(InputError, match=match) as err:
        read(tmp_path, text)
    assert str(err.value).startswith(str(tmp_path / "readings.csv"))


def test_absurd_sizes_are_refused_before_memory_runs_out(tmp_path):
    rows = "".join(f"{t},{t}\n" for t in range(11))
    with pytest.raises(InputError, match=r"line 12: more than 10 rows"):
        read(tmp_path, "time_s,north\n" + rows, max_rows=10)
    with pytest.raises(InputError, match=r"more than the 20 this command reads"):
        read(tmp_path, "time_s,north\n" + rows, max_bytes=20)
    assert read(tmp_path, "time_s,north\n" + rows, max_rows=11).n_times == 11


def test_files_that_cannot_be_read(tmp_path):
    with pytest.raises(InputError, match=r"no such readings file"):
        read_readings(tmp_path / "absent.csv", NAMES, AXES)
    with pytest.raises(InputError, match=r"is a folder"):
        read_readings(tmp_path, NAMES, AXES)
    with pytest.raises(InputError, match=r"not UTF-8 text"):
        read_readings(write(tmp_path, "time_s,north\n0,1\n", encoding="utf-16"), NAMES, AXES)


def test_truth_columns_are_parameter_names(tmp_path):
    path = write(tmp_path, "time_s,s0.z_m,s0.charge_c\n0,7000,-20\n10,,-21\n", "truth.csv")
    truth = read_truth(path, PARAMS)
    assert truth.names == PARAMS
    np.testing.assert_array_equal(truth.values[:, 0], [-20.0, -21.0])
    np.testing.assert_array_equal(truth.present[:, 3], [True, False])
    assert not truth.present[:, 1:3].any()
    bad = write(tmp_path, "time_s,s0.charge\n0,-20\n", "bad.csv")
    hint = r"bad.csv: line 1, column 2: .*did you mean `s0.charge_c`"
    with pytest.raises(InputError, match=hint):
        read_truth(bad, PARAMS)
