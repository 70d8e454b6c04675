"""The ways into a config (file, text, mapping): a full round trip, defaults, files, syntax.

Each section's checks and exact messages are in test_config_<section>.py; the typed-table
reader's in test_config_reader.py.

The site, charges and numbers below are invented for the tests (a fictional site), not taken
from any real installation.
"""

from __future__ import annotations

import dataclasses
import math
import tomllib

import numpy as np
import pytest
from config_cases import BASE, assert_pieces, edited, message, write

from probeplan import fisher, probes, report, site, sources
from probeplan.config import (
    AGGREGATES,
    COMPONENTS,
    CRITERIA,
    ESTIMATE_NAMES,
    BackgroundSpec,
    BudgetSpec,
    Config,
    DesignSpec,
    Grade,
    InstalledProbe,
    ProbeSpec,
    config_from_mapping,
    load_config,
    parse_config,
    vocab,
)
from probeplan.config.render import mapping_to_toml
from probeplan.errors import InputError
from probeplan.sources import DensityGrid, GaussianCharge, LineCharge, PointCharge, SphereCharge

# Every key of the format, with values that differ from the defaults.
FULL = """
title = "Fictional tank farm, north yard"
seed = 11
caution = "lightning"

[ground]
z_m = 2.0

[probes]
count = 3
component = [0.0, 3.0, 4.0]
noise_v_per_m = 15.0
relative_noise = 0.02
range_v_per_m = 50000.0
min_spacing_m = 20.0
gain = 1.5

[[probes.installed]]
position_m = [10.0, 20.0, 3.0]
name = "gatehouse"
component = "vector"
gain = 2.0
grade = "budget"

[[probes.installed]]
position_m = [-40.0, 5.0, 2.0]

[[region]]
kind = "rectangle"
min_m = [-300.0, -200.0]
max_m = [300.0, 200.0]
z_m = 3.0
name = "yard"
gain = 1.2

[[region]]
kind = "polygon"
vertices_m = [[400.0, 0.0], [500.0, 0.0], [450.0, 80.0]]
z_m = 4.0

[[region]]
kind = "segment"
start_m = [0.0, -250.0, 2.5]
end_m = [200.0, -250.0, 2.5]

[[region]]
kind = "points"
positions_m = [[600.0, 0.0, 10.0], [620.0, 5.0, 12.0]]

[[keepout]]
kind = "rectangle"
min_m = [-50.0, -50.0]
max_m = [50.0, 50.0]
buffer_m = 5.0
name = "tank 3"

[[source]]
kind = "point"
charge_c = -20.0
center_m = [100.0, -50.0, 7000.0]
estimate = ["z", "charge", "x", "y"]
charge_range_c = [-40.0, -10.0]
center_range_m = [[-3000.0, 3000.0], [-2000.0, 2000.0], [5000.0, 9000.0]]

[[source]]
kind = "line"
charge_c = 5.0
start_m = [0.0, 0.0, 3000.0]
end_m = [0.0, 0.0, 4000.0]
estimate = ["charge"]
center_range_m = [[0.0, 0.0], [0.0, 0.0], [3000.0, 3600.0]]

[[source]]
kind = "sphere"
charge_c = 10.0
center_m = [0.0, 0.0, 8000.0]
radius_m = 500.0
estimate = ["radius", "charge"]
radius_range_m = [300.0, 900.0]

[[source]]
kind = "gaussian"
charge_c = 2.0
center_m = [1000.0, 0.0, 6000.0]
sigma_m = 400.0
estimate = ["sigma"]
sigma_range_m = [200.0, 600.0]

[[source]]
kind = "grid"
density_path = "data/rho.npy"
origin_m = [0.0, 0.0, 5000.0]
spacing_m = [100.0, 100.0, 50.0]
estimate = ["x"]
charge_range_c = [1.0, 2.0]

[background]
field_v_per_m = [0.0, 0.0, -120.0]
estimate = false
field_range_v_per_m = [[-5.0, 5.0], [-5.0, 5.0], [-150.0, -100.0]]

[design]
criterion = "location"
scenarios = 8
aggregate = "quantile:0.9"
evaluations = 50
tolerate_failures = 1
grid_spacing_m = 25.0
random_layouts = 200

[[grade]]
name = "standard"
noise_v_per_m = 20.0
relative_noise = 0.03
cost = 4500.0
range_v_per_m = 20000.0

[[grade]]
name = "budget"
cost = 1200.0

[budget]
counts = [6, 3, 4]
target = 250.0
"""


@pytest.fixture
def full_config(tmp_path) -> Config:
    (tmp_path / "data").mkdir()
    rho = np.zeros((2, 3, 4))
    rho[:, :, 1:] = 1e-9  # the lowest layer is empty: the charge starts 50 m up
    np.save(tmp_path / "data" / "rho.npy", rho)
    return load_config(write(tmp_path, FULL))


# ------------------------------------------------------------------------------------------
# Valid configs
# ------------------------------------------------------------------------------------------


def test_full_round_trip_top_level_and_probes(full_config, tmp_path):
    cfg = full_config
    assert cfg.path == str(tmp_path / "cfg.toml")
    assert cfg.text == FULL
    assert cfg.title == "Fictional tank farm, north yard"
    assert cfg.seed == 11
    assert cfg.ground_z_m == 2.0
    assert cfg.caution == "lightning" and cfg.storm_watch is True
    assert cfg.probes == ProbeSpec(
        count=3,
        component=(0.0, 0.6, 0.8),  # [0, 3, 4] normalised
        noise_v_per_m=15.0,
        relative_noise=0.02,
        range_v_per_m=50000.0,
        min_spacing_m=20.0,
        gain=1.5,
    )
    assert cfg.installed == (
        InstalledProbe((10.0, 20.0, 3.0), "gatehouse", "vector", 2.0, "budget"),
        InstalledProbe((-40.0, 5.0, 2.0), "installed-1", None, 1.0),
    )
    assert cfg.installed_m.shape == (2, 3)
    np.testing.assert_array_equal(cfg.installed_m[1], [-40.0, 5.0, 2.0])
    assert len(cfg.regions) == 4 and len(cfg.keepouts) == 1
    assert [r.kind for r in cfg.regions] == ["rectangle", "polygon", "segment", "points"]
    site = cfg.site()
    assert site is not None


def test_full_round_trip_sources(full_config):
    point, line, sphere, gauss, grid = cfg_sources = full_config.sources
    assert len(cfg_sources) == 5
    assert point.source == PointCharge(-20.0, (100.0, -50.0, 7000.0))
    # Estimate names come back in the source's parameter order, whatever order was written.
    assert point.estimate == ("charge_c", "x_m", "y_m", "z_m")
    assert point.ranges == (
        ("charge_c", -40.0, -10.0),
        ("x_m", -3000.0, 3000.0),
        ("y_m", -2000.0, 2000.0),
        ("z_m", 5000.0, 9000.0),
    )
    assert line.source == LineCharge(5.0, (0.0, 0.0, 3000.0), (0.0, 0.0, 4000.0))
    assert line.estimate == ("charge_c",)
    assert line.ranges[2] == ("z_m", 3000.0, 3600.0)  # lo == hi allowed for x and y
    assert sphere.source == SphereCharge(10.0, (0.0, 0.0, 8000.0), 500.0)
    assert sphere.estimate == ("charge_c", "radius_m")
    assert sphere.ranges == (("radius_m", 300.0, 900.0),)
    assert gauss.source == GaussianCharge(2.0, (1000.0, 0.0, 6000.0), 400.0)
    assert gauss.estimate == ("sigma_m",)
    assert gauss.ranges == (("sigma_m", 200.0, 600.0),)
    assert isinstance(grid.source, DensityGrid)
    assert grid.source.density_c_per_m3.shape == (2, 3, 4)
    assert grid.source.spacing_m == (100.0, 100.0, 50.0)
    assert grid.estimate == ("x_m",)
    assert grid.ranges == (("charge_c", 1.0, 2.0),)


def test_full_round_trip_background_design_grades_budget(full_config):
    cfg = full_config
    assert cfg.background == BackgroundSpec(
        field_v_per_m=(0.0, 0.0, -120.0),
        estimate=False,
        ranges=(
            ("x_v_per_m", -5.0, 5.0),
            ("y_v_per_m", -5.0, 5.0),
            ("z_v_per_m", -150.0, -100.0),
        ),
    )
    assert cfg.design == DesignSpec("location", 8, "quantile:0.9", 50, 1, 25.0, 200)
    assert cfg.design.quantile == 0.9
    assert cfg.grades == (
        Grade("standard", 20.0, 0.03, 4500.0, 20000.0),
        Grade("budget", 15.0, 0.02, 1200.0, 50000.0),  # noise and range from [probes]
    )
    assert cfg.budget == BudgetSpec(counts=(3, 4, 6), target=250.0)


def test_defaults_of_a_minimal_config():
    cfg = parse_config(BASE.replace('title = "Fictional test range"\nseed = 3\n', ""))
    assert cfg.path == "<config>"
    assert cfg.title == "" and cfg.seed == 0
    assert cfg.probes == ProbeSpec(4, "z", 20.0, 0.0, math.inf, 0.0, 1.0)
    assert cfg.installed == () and cfg.keepouts == ()
    assert cfg.background is None and cfg.budget is None and cfg.grades == ()
    assert cfg.design == DesignSpec()
    assert (cfg.design.criterion, cfg.design.scenarios, cfg.design.aggregate) == ("d", 64, "mean")
    assert (cfg.design.evaluations, cfg.design.random_layouts) == (300, 1000)
    assert cfg.design.quantile is None
    # A source 7 km above a ground plane marks a storm-watch config.
    assert cfg.storm_watch is True and cfg.caution == "lightning"


def test_vocabulary_tuples():
    assert COMPONENTS == ("x", "y", "z", "vector")
    assert CRITERIA == ("d", "location", "charge")
    assert AGGREGATES == ("mean", "worst", "quantile:q")
    assert ESTIMATE_NAMES["radius"] == "radius_m"


def test_free_space_and_low_sources_are_not_storm_watch():
    free = parse_config(BASE.replace("[ground]\nz_m = 0.0\n", ""))
    assert free.ground_z_m is None and free.storm_watch is False and free.caution == "general"
    low = parse_config(edited("[0.0, 0.0, 7000.0]", "[0.0, 0.0, 5.0]"))
    assert low.storm_watch is False and low.caution == "general"
    esd = parse_config('caution = "esd"\n' + BASE)
    assert esd.caution == "esd" and esd.storm_watch is False


# ------------------------------------------------------------------------------------------
# Files and syntax
# ------------------------------------------------------------------------------------------


def test_folder_and_non_utf8_files_are_rejected(tmp_path):
    with pytest.raises(InputError, match="is a folder, not a config file"):
        load_config(tmp_path)
    bad = tmp_path / "latin.toml"
    bad.write_bytes(b'title = "caf\xe9"\n')
    with pytest.raises(InputError, match=r"latin\.toml: not UTF-8 text"):
        load_config(bad)


def test_missing_file_is_named(tmp_path):
    missing = tmp_path / "nope.toml"
    with pytest.raises(InputError, match="nope.toml: no such config file"):
        load_config(missing)


def test_toml_syntax_error_names_the_line(tmp_path):
    text = edited("noise_v_per_m = 20.0", "noise_v_per_m = ")
    line = text.splitlines().index("noise_v_per_m = ") + 1
    msg = message(tmp_path, text)
    assert_pieces(msg, "cfg.toml: ", f"line {line}: TOML syntax error: Invalid value")


def test_toml_syntax_error_at_end_of_file(tmp_path):
    msg = message(tmp_path, BASE + "extra = [1, 2")
    assert_pieces(msg, "cfg.toml: line ", "TOML syntax error: Unclosed array")


def test_duplicate_key_is_a_syntax_error(tmp_path):
    msg = message(tmp_path, edited("count = 4", "count = 4\ncount = 5"))
    assert_pieces(msg, "cfg.toml: line ", "TOML syntax error")


def test_message_names_the_file_as_given(tmp_path):
    bad = edited("noise_v_per_m = 20.0", "noise_v_per_m = 0.0")
    with pytest.raises(InputError, match=r"^configs/x\.toml: `probes\.noise_v_per_m` must be > 0"):
        parse_config(bad, "configs/x.toml")


def test_a_byte_order_mark_is_accepted(tmp_path):
    # Some editors start a UTF-8 file with U+FEFF; TOML itself does not allow it (toml.io 1.0).
    path = tmp_path / "bom.toml"
    path.write_bytes(b"\xef\xbb\xbf" + BASE.encode("utf-8"))
    cfg = load_config(path)
    assert cfg.text == BASE
    assert repr(dataclasses.replace(cfg, path="")) == repr(parse_config(BASE, ""))
    assert parse_config("\ufeff" + BASE).text == BASE


def test_a_bad_byte_after_a_byte_order_mark_is_counted_from_the_file_start(tmp_path):
    path = tmp_path / "bom.toml"
    path.write_bytes(b'\xef\xbb\xbftitle = "caf\xe9"\n')  # 3 + 12 bytes before the bad one
    with pytest.raises(InputError, match=r"bom\.toml: not UTF-8 text \(byte 15\)"):
        load_config(path)


# ------------------------------------------------------------------------------------------
# A config from a mapping
# ------------------------------------------------------------------------------------------


def _same(a: Config, b: Config) -> bool:
    # Regions hold cached shapely geometry, compared by identity: compare the reprs instead.
    return repr(dataclasses.replace(a, text="")) == repr(dataclasses.replace(b, text=""))


def test_a_mapping_gives_the_config_its_toml_gives(full_config, tmp_path):
    data = tomllib.loads(full_config.text)
    cfg = config_from_mapping(data, full_config.path)
    assert _same(cfg, full_config)
    # Its text is TOML that reads back to the same mapping, so reruns can parse it.
    assert tomllib.loads(cfg.text) == data
    assert _same(parse_config(cfg.text, cfg.path), full_config)
    # Relative paths start at base_dir when given, else at the folder of `path`.
    moved = config_from_mapping(data, "elsewhere.toml", base_dir=tmp_path)
    np.testing.assert_array_equal(
        moved.sources[4].source.density_c_per_m3, full_config.sources[4].source.density_c_per_m3
    )


def test_a_mapping_takes_tuples_and_numpy_numbers():
    data = tomllib.loads(BASE)
    data["source"][0]["center_m"] = (np.float64(0.0), 0, np.float32(7000.0))
    data["probes"]["count"] = np.int64(4)
    assert _same(config_from_mapping(data, "<config>"), parse_config(BASE))


def test_a_mapping_is_checked_like_a_file():
    data = tomllib.loads(edited("noise_v_per_m = 20.0", "noise_v_per_m = -1.0"))
    with pytest.raises(InputError, match=r"^site: `probes\.noise_v_per_m` must be > 0; got -1\.0"):
        config_from_mapping(data, "site")
    assert config_from_mapping(tomllib.loads(BASE)).path == "<mapping>"


@pytest.mark.parametrize(
    ("edit", "piece"),
    [
        (lambda d: d["probes"].update(count=None), "`probes.count` is None (NoneType)"),
        (lambda d: d["source"][0].update(center_m=[0, object(), 1]), "`source[0].center_m[1]`"),
        (lambda d: d.update({3: 1}), "key 3 at the top level must be a string"),
    ],
)
def test_values_toml_cannot_hold_are_named(edit, piece):
    data = tomllib.loads(BASE)
    edit(data)
    with pytest.raises(InputError, match="^<mapping>: ") as info:
        config_from_mapping(data)
    assert piece in str(info.value)
    with pytest.raises(InputError, match="must be a dict"):
        config_from_mapping([("seed", 1)])


def test_toml_written_from_a_mapping_reads_back():
    # Quoted keys, escapes, special floats, inline tables in arrays, nested arrays of tables.
    data = {
        "a b": 'say "hi"\n\x7f\u00e9',
        "x": [math.inf, -math.inf, 1e-300, -0.0, 2**62],
        "mixed": [{"k": 1}, {"k": [1, 2]}],
        "t": {"inner": {"deep": True}, "rows": [{"n": 1, "sub": [{"m": 2}]}, {"n": 3}]},
        "empty": [],
        "top": [{"z": 0.5}],
    }
    assert tomllib.loads(mapping_to_toml(data, "<test>")) == data
    nan = tomllib.loads(mapping_to_toml({"v": math.nan}, "<test>"))["v"]
    assert math.isnan(nan)


# ------------------------------------------------------------------------------------------
# The vocabularies: defined once, where the stage that owns them lives
# ------------------------------------------------------------------------------------------


def test_vocabularies_are_the_owning_stages_own():
    assert vocab.CRITERIA is fisher.CRITERIA
    assert vocab.AGGREGATES is fisher.AGGREGATE_NAMES
    assert vocab.COMPONENTS is probes.COMPONENTS
    assert vocab.SOURCE_KINDS == tuple(sources.KINDS)
    assert vocab.REGION_KINDS == tuple(site.REGION_KINDS)
    # Every caution but "none" has its panel in the summary; "none" prints one plain line.
    assert set(report.CAUTIONS) == set(vocab.CAUTIONS) - {"none"}
