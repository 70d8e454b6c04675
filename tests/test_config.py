"""The TOML config loader: a full round trip, defaults, and one exact message per bad input.

The site, charges and numbers below are invented for the tests (a fictional site), not taken
from any real installation.
"""

from __future__ import annotations

import math

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

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
    load_config,
    parse_config,
)
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

# The smallest valid config; the bad-input cases edit one line of it.
BASE = """
title = "Fictional test range"
seed = 3

[ground]
z_m = 0.0

[probes]
count = 4
component = "z"
noise_v_per_m = 20.0

[[region]]
kind = "rectangle"
min_m = [-500.0, -500.0]
max_m = [500.0, 500.0]
z_m = 1.0

[[source]]
kind = "point"
charge_c = -20.0
center_m = [0.0, 0.0, 7000.0]
estimate = ["charge", "x", "y", "z"]
"""


def write(tmp_path, text: str, name: str = "cfg.toml"):
    path = tmp_path / name
    path.write_text(text, encoding="utf-8")
    return path


def edited(old: str, new: str, text: str = BASE) -> str:
    assert old in text, old
    return text.replace(old, new, 1)


def message(tmp_path, text: str) -> str:
    """The one InputError message that loading ``text`` from ``cfg.toml`` gives."""
    with pytest.raises(InputError) as info:
        load_config(write(tmp_path, text))
    return str(info.value)


def assert_pieces(msg: str, *pieces: str) -> None:
    for piece in pieces:
        assert piece in msg, f"{piece!r} not in {msg!r}"


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


def test_count_zero_is_allowed_with_installed_probes():
    text = (
        edited("count = 4", "count = 0") + "\n[[probes.installed]]\nposition_m = [1.0, 2.0, 0.0]\n"
    )
    cfg = parse_config(text)
    assert cfg.probes.count == 0 and len(cfg.installed) == 1


def test_ranges_for_known_parameters_and_background_estimate_default():
    text = edited('estimate = ["charge", "x", "y", "z"]', 'estimate = ["x", "y"]')
    text += "charge_range_c = [-30.0, -30.0]\n\n[background]\nfield_v_per_m = [0, 0, -100]\n"
    cfg = parse_config(text)
    assert cfg.sources[0].estimate == ("x_m", "y_m")
    assert cfg.sources[0].ranges == (("charge_c", -30.0, -30.0),)
    assert cfg.background.estimate is True and cfg.background.ranges == ()
    assert cfg.background.field_v_per_m == (0.0, 0.0, -100.0)


def test_only_background_estimated_is_enough():
    text = edited('estimate = ["charge", "x", "y", "z"]', "estimate = []")
    cfg = parse_config(text + "\n[background]\nfield_v_per_m = [0, 0, -100]\n")
    assert cfg.sources[0].estimate == ()


def test_density_path_is_relative_to_the_config_folder(tmp_path, monkeypatch):
    (tmp_path / "site").mkdir()
    np.save(tmp_path / "site" / "cloud.npy", np.full((2, 2, 2), 1e-9))
    text = edited(
        'kind = "point"\ncharge_c = -20.0\ncenter_m = [0.0, 0.0, 7000.0]',
        'kind = "grid"\ndensity_path = "cloud.npy"\norigin_m = [0, 0, 4000]\nspacing_m = 200.0',
    )
    monkeypatch.chdir(tmp_path)  # not the config's folder
    cfg = load_config(write(tmp_path / "site", text))
    grid = cfg.sources[0].source
    assert grid.spacing_m == (200.0, 200.0, 200.0)
    # charge = density × cell volume × cells = 1e-9 × 200³ × 8
    assert grid.charge_c == pytest.approx(1e-9 * 200.0**3 * 8)


def test_infinite_range_means_no_saturation(tmp_path):
    cfg = parse_config(edited("count = 4", "count = 4\nrange_v_per_m = inf"))
    assert cfg.probes.range_v_per_m == math.inf
    msg = message(tmp_path, edited("count = 4", "count = 4\nrange_v_per_m = -inf"))
    assert_pieces(
        msg, "`probes.range_v_per_m` must be a finite number (inf means no limit); got -inf"
    )


finite = st.floats(-1e3, 1e3, allow_nan=False)


@settings(max_examples=25, deadline=None)
@given(st.tuples(finite, finite, finite).filter(lambda v: np.linalg.norm(v) > 1e-3))
def test_component_vector_is_normalised(vector):
    text = edited('component = "z"', f"component = [{vector[0]!r}, {vector[1]!r}, {vector[2]!r}]")
    axis = np.array(parse_config(text).probes.component)
    assert np.linalg.norm(axis) == pytest.approx(1.0)
    np.testing.assert_allclose(axis * np.linalg.norm(vector), vector, atol=1e-9)


def test_quantile_aggregate_is_normalised():
    cfg = parse_config(BASE + '\n[design]\naggregate = "quantile:0.25"\n')
    assert cfg.design.aggregate == "quantile:0.25" and cfg.design.quantile == 0.25


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


# ------------------------------------------------------------------------------------------
# Bad inputs: one case per check, with the message pieces it must carry
# ------------------------------------------------------------------------------------------

SOURCE_POINT = 'kind = "point"\ncharge_c = -20.0\ncenter_m = [0.0, 0.0, 7000.0]'
EST = 'estimate = ["charge", "x", "y", "z"]'
RECT = 'kind = "rectangle"\nmin_m = [-500.0, -500.0]\nmax_m = [500.0, 500.0]\nz_m = 1.0'

BAD = {
    # unknown keys and tables
    "typo in probes": (
        ("noise_v_per_m = 20.0", "nosie_v_per_m = 20.0"),
        ["unknown key `nosie_v_per_m` in [probes]; did you mean `noise_v_per_m`?"],
    ),
    "unknown key, no close match": (
        ("count = 4", "count = 4\ncolour = 1"),
        ["unknown key `colour` in [probes]; allowed: count, component, noise_v_per_m"],
    ),
    "unknown top-level table": (
        ("[ground]", "[grund]"),
        ["unknown table `grund` at the top level; did you mean `ground`?"],
    ),
    "unknown key in an array table": (
        (EST, EST + "\ncentre_m = [0, 0, 1]"),
        ["unknown key `centre_m` in source[0]; did you mean `center_m`?"],
    ),
    "key of another kind": (
        (EST, EST + "\nradius_m = 100.0"),
        [
            "key `radius_m` does not apply to a point source (source[0]); allowed: kind, "
            "charge_c, center_m, estimate, charge_range_c, center_range_m."
        ],
    ),
    "single [region] table": (
        ("[[region]]", "[region]"),
        ["`region` must be an array of tables, each headed [[region]]", "write [[region]]"],
    ),
    # wrong types and non-finite numbers
    "string for a number": (
        ("noise_v_per_m = 20.0", 'noise_v_per_m = "20"'),
        [
            '`probes.noise_v_per_m` must be a number > 0; got "20" (a string)',
            "write numbers without quotes",
        ],
    ),
    "bool for a number": (
        ("charge_c = -20.0", "charge_c = true"),
        ["`source[0].charge_c` must be a number; got true (a boolean)"],
    ),
    "bool for an integer": (
        ("count = 4", "count = true"),
        ["`probes.count` must be a whole number >= 0; got true (a boolean)"],
    ),
    "float for an integer": (
        ("count = 4", "count = 4.0"),
        ["`probes.count` must be a whole number >= 0; got 4.0 (a number)"],
    ),
    "nan": (
        ("charge_c = -20.0", "charge_c = nan"),
        ["`source[0].charge_c` must be a finite number; got nan"],
    ),
    "inf in a vector": (
        ("[0.0, 0.0, 7000.0]", "[0.0, inf, 7000.0]"),
        ["`source[0].center_m[1]` must be a finite number; got inf"],
    ),
    "negative noise": (
        ("noise_v_per_m = 20.0", "noise_v_per_m = -1.0"),
        ["`probes.noise_v_per_m` must be > 0; got -1.0"],
    ),
    "missing noise": (
        ("noise_v_per_m = 20.0", ""),
        ["`probes.noise_v_per_m` is missing; give the 1-sigma noise in V/m (a number > 0)"],
    ),
    "negative relative noise": (
        ("count = 4", "count = 4\nrelative_noise = -0.1"),
        ["`probes.relative_noise` must be >= 0; got -0.1"],
    ),
    "zero gain": (
        ("count = 4", "count = 4\ngain = 0"),
        ["`probes.gain` must be > 0; got 0.0"],
    ),
    "negative seed": (("seed = 3", "seed = -1"), ["`seed` must be a whole number >= 0; got -1"]),
    "title not text": (
        ('title = "Fictional test range"', "title = 5"),
        ["`title` must be a string; got 5"],
    ),
    # reversed ranges, never swapped
    "reversed charge range": (
        (EST, EST + "\ncharge_range_c = [-10.0, -40.0]"),
        [
            "`source[0].charge_range_c` must be [lo, hi] with lo <= hi; got [-10.0, -40.0]",
            "never swapped",
        ],
    ),
    "reversed centre range": (
        (EST, EST + "\ncenter_range_m = [[0, 1], [0, 1], [9000.0, 5000.0]]"),
        ["`source[0].center_range_m[2]` must be [lo, hi] with lo <= hi; got [9000.0, 5000.0]"],
    ),
    "centre range of two pairs": (
        (EST, EST + "\ncenter_range_m = [[0, 1], [0, 1]]"),
        ["`source[0].center_range_m` must be 3 ranges [[x_lo, x_hi], [y_lo, y_hi], [z_lo, z_hi]]"],
    ),
    "reversed rectangle": (
        ("max_m = [500.0, 500.0]", "max_m = [-600.0, 500.0]"),
        ["`region[0].min_m` x = -500.0 is above `region[0].max_m` x = -600.0"],
    ),
    # vectors of the wrong length
    "centre of two numbers": (
        ("center_m = [0.0, 0.0, 7000.0]", "center_m = [0.0, 7000.0]"),
        ["`source[0].center_m` must be 3 numbers (x, y, z) in metres; got 2: [0.0, 7000.0]"],
    ),
    "corner of three numbers": (
        ("min_m = [-500.0, -500.0]", "min_m = [-500.0, -500.0, 0.0]"),
        ["`region[0].min_m` must be 2 numbers (x, y) in metres; got 3"],
    ),
    # enumerated options
    "unknown source kind": (
        ('kind = "point"', 'kind = "cloud"'),
        [
            '`source[0].kind` must be one of "point", "line", "sphere", "gaussian", "grid"; '
            'got "cloud" (a string)'
        ],
    ),
    "unknown region kind": (
        ('kind = "rectangle"', 'kind = "rectangel"'),
        ['`region[0].kind` must be one of "rectangle", "polygon"', 'did you mean "rectangle"?'],
    ),
    "unknown component": (
        ('component = "z"', 'component = "w"'),
        ['`probes.component` must be one of "x", "y", "z", "vector" or a unit vector'],
    ),
    "zero component vector": (
        ('component = "z"', "component = [0, 0, 0]"),
        ["`probes.component` must be", "got the zero vector [0, 0, 0]"],
    ),
    "unknown criterion": (
        (EST, EST + '\n\n[design]\ncriterion = "e"'),
        ['`design.criterion` must be one of "d", "location", "charge"; got "e"'],
    ),
    "unknown aggregate": (
        (EST, EST + '\n\n[design]\naggregate = "median"'),
        [
            '`design.aggregate` must be "mean", "worst" or "quantile:q" with 0 < q < 1',
            'got "median"',
        ],
    ),
    "quantile of 1": (
        (EST, EST + '\n\n[design]\naggregate = "quantile:1"'),
        ['`design.aggregate` must be "mean", "worst" or "quantile:q"', 'got "quantile:1"'],
    ),
    "quantile of 0": (
        (EST, EST + '\n\n[design]\naggregate = "quantile:0"'),
        ['got "quantile:0"'],
    ),
    "two failures tolerated": (
        (EST, EST + "\n\n[design]\ntolerate_failures = 2"),
        ["`design.tolerate_failures` must be one of 0, 1; got 2"],
    ),
    "zero scenarios": (
        (EST, EST + "\n\n[design]\nscenarios = 0"),
        ["`design.scenarios` must be a whole number >= 1; got 0"],
    ),
    "unknown caution": (
        ('title = "Fictional test range"', 'caution = "storm"'),
        [
            '`caution` must be one of "lightning", "esd", "high-voltage", "general", "none"; '
            'got "storm"'
        ],
    ),
    # estimate names
    "unknown estimate name": (
        (EST, 'estimate = ["charge", "q"]'),
        [
            '`source[0].estimate[1]`: unknown parameter name "q"',
            "allowed for a point source: charge, x, y, z",
        ],
    ),
    "estimate invalid for the kind": (
        (EST, 'estimate = ["radius"]'),
        ["`radius` is not a parameter of a point source; allowed: charge, x, y, z"],
    ),
    "duplicated estimate": (
        (EST, 'estimate = ["x", "y", "x"]'),
        ["`source[0].estimate[2]`: `x` is listed twice"],
    ),
    "estimate not an array": (
        (EST, 'estimate = "x"'),
        ["`source[0].estimate` must be an array of parameter names", 'got "x" (a string)'],
    ),
    "nothing estimated": (
        (EST, "estimate = []"),
        ["nothing to estimate", "estimate = "],
    ),
    "location criterion without x and y": (
        (EST, 'estimate = ["charge", "z"]\n\n[design]\ncriterion = "location"'),
        ['`design.criterion` = "location" scores source 0', 'lacks "x", "y"'],
    ),
    "charge criterion without charge": (
        (EST, 'estimate = ["x"]\n\n[design]\ncriterion = "charge"'),
        ['`design.criterion` = "charge"', 'lacks "charge"'],
    ),
    # below the ground
    "source below ground": (
        ("[0.0, 0.0, 7000.0]", "[0.0, 0.0, -5.0]"),
        [
            "`source[0].center_m` puts the point source down to z = -5 m, not above the ground "
            "plane at z = 0 m"
        ],
    ),
    "centre range below ground": (
        (EST, EST + "\ncenter_range_m = [[0, 0], [0, 0], [-100.0, 9000.0]]"),
        ["`source[0].center_range_m` let the point source reach down to z = -100 m"],
    ),
    "sphere radius range below ground": (
        (
            SOURCE_POINT,
            'kind = "sphere"\ncharge_c = 1.0\ncenter_m = [0, 0, 1000.0]\nradius_m = 500.0\n'
            "radius_range_m = [100.0, 1200.0]",
        ),
        [
            "`source[0].radius_range_m` let the sphere source reach down to z = -200 m",
            "minus 1200 m from the centre",
        ],
    ),
    "sphere centre range minus radius below ground": (
        (
            SOURCE_POINT,
            'kind = "sphere"\ncharge_c = 1.0\ncenter_m = [0, 0, 1000.0]\nradius_m = 500.0\n'
            "center_range_m = [[0, 0], [0, 0], [400.0, 1000.0]]",
        ),
        ["`source[0].center_range_m` let the sphere source reach down to z = -100 m"],
    ),
    "line end below ground": (
        (SOURCE_POINT, 'kind = "line"\ncharge_c = 1.0\nstart_m = [0, 0, 10]\nend_m = [0, 0, -1]'),
        ["`source[0].start_m` / `end_m` puts the line source down to z = -1 m"],
    ),
    "line range below ground": (
        (
            SOURCE_POINT,
            'kind = "line"\ncharge_c = 1.0\nstart_m = [0, 0, 100]\nend_m = [0, 0, 300]\n'
            "center_range_m = [[0, 0], [0, 0], [50.0, 300.0]]",
        ),
        ["`source[0].center_range_m` let the line source reach down to z = -50 m"],
    ),
    "region below ground": (
        ("z_m = 1.0", "z_m = -1.0"),
        ["`region[0].z_m` puts a probe at z = -1 m, below the ground plane at z = 0 m"],
    ),
    "installed below ground": (
        (EST, EST + "\n\n[[probes.installed]]\nposition_m = [0, 0, -2]"),
        ["`probes.installed[0].position_m` puts a probe at z = -2 m"],
    ),
    # wrapped constructor errors
    "sphere radius negative": (
        (
            SOURCE_POINT,
            'kind = "sphere"\ncharge_c = 1.0\ncenter_m = [0, 0, 1000.0]\nradius_m = -2.0',
        ),
        ["cfg.toml: source[0]: `radius_m` must be > 0; got -2.0."],
    ),
    "line of zero length": (
        (SOURCE_POINT, 'kind = "line"\ncharge_c = 1.0\nstart_m = [0, 0, 10]\nend_m = [0, 0, 10]'),
        ["cfg.toml: source[0]: `start_m` and `end_m` of a line charge must differ"],
    ),
    "sigma range not positive": (
        (
            SOURCE_POINT,
            'kind = "gaussian"\ncharge_c = 1.0\ncenter_m = [0, 0, 1000.0]\nsigma_m = 10.0\n'
            "sigma_range_m = [0.0, 20.0]",
        ),
        ["`source[0].sigma_range_m[0]` must be > 0; got 0.0"],
    ),
    # required tables and counts
    "no source": (
        ("[[source]]\n" + SOURCE_POINT + "\n" + EST, ""),
        ["no [[source]] table is given; at least one is needed"],
    ),
    "no region": (
        ("[[region]]\n" + RECT, ""),
        ["no [[region]] table is given; at least one is needed"],
    ),
    "no probes table": (
        ('[probes]\ncount = 4\ncomponent = "z"\nnoise_v_per_m = 20.0', ""),
        ["the [probes] table is missing"],
    ),
    "count zero without installed": (
        ("count = 4", "count = 0"),
        ["`probes.count` must be >= 1 when no [[probes.installed]] is given; got 0"],
    ),
    "duplicate installed names": (
        (
            EST,
            EST + '\n\n[[probes.installed]]\nposition_m = [0, 0, 1]\nname = "a"\n'
            '[[probes.installed]]\nposition_m = [5, 0, 1]\nname = "a"',
        ),
        ['`probes.installed[1].name` = "a" is already the name of probes.installed[0]'],
    ),
    "installed grade unknown": (
        (
            EST,
            EST + '\n\n[[probes.installed]]\nposition_m = [0, 0, 1]\ngrade = "gold"\n'
            '[[grade]]\nname = "std"\ncost = 1.0',
        ),
        ['`probes.installed[0].grade` = "gold" names no [[grade]]; the grades are: std.'],
    ),
    "installed grade without grades": (
        (EST, EST + '\n\n[[probes.installed]]\nposition_m = [0, 0, 1]\ngrade = "std"'),
        ["names no [[grade]]; the grades are: none: the config has no [[grade]] table"],
    ),
    "installed grade empty": (
        (EST, EST + '\n\n[[probes.installed]]\nposition_m = [0, 0, 1]\ngrade = ""'),
        ["`probes.installed[0].grade` must not be empty; give a [[grade]] name."],
    ),
    # grades and budget
    "budget without grade": (
        (EST, EST + "\n\n[budget]\ncounts = [2, 3]"),
        ["[budget] needs at least one [[grade]]"],
    ),
    "duplicate grade names": (
        (EST, EST + '\n\n[[grade]]\nname = "std"\ncost = 1.0\n[[grade]]\nname = "std"\ncost = 2.0'),
        ['`grade[1].name` = "std" is already the name of grade[0]; grade names must be unique'],
    ),
    "grade without cost": (
        (EST, EST + '\n\n[[grade]]\nname = "std"'),
        ["`grade[0].cost` is missing; give the cost per meter (a number >= 0)"],
    ),
    "budget count zero": (
        (EST, EST + '\n\n[[grade]]\nname = "std"\ncost = 1.0\n[budget]\ncounts = [0, 2]'),
        ["`budget.counts[0]` must be a whole number >= 1; got 0"],
    ),
    "budget count not an integer": (
        (EST, EST + '\n\n[[grade]]\nname = "std"\ncost = 1.0\n[budget]\ncounts = [2, "3"]'),
        ['`budget.counts[1]` must be a whole number >= 1; got "3" (a string)'],
    ),
    "budget counts repeated": (
        (EST, EST + '\n\n[[grade]]\nname = "std"\ncost = 1.0\n[budget]\ncounts = [2, 3, 2]'),
        ["`budget.counts` lists 2 more than once"],
    ),
}


@pytest.mark.parametrize("case", sorted(BAD))
def test_bad_input_gives_one_clear_message(tmp_path, case):
    (old, new), pieces = BAD[case]
    msg = message(tmp_path, edited(old, new))
    assert msg.startswith("cfg.toml: ") or msg.startswith(str(tmp_path / "cfg.toml") + ": ")
    assert_pieces(msg, *pieces)


def test_message_names_the_file_as_given(tmp_path):
    bad = edited("noise_v_per_m = 20.0", "noise_v_per_m = 0.0")
    with pytest.raises(InputError, match=r"^configs/x\.toml: `probes\.noise_v_per_m` must be > 0"):
        parse_config(bad, "configs/x.toml")


def _grid_text(path: str) -> str:
    return edited(
        SOURCE_POINT,
        f'kind = "grid"\ndensity_path = "{path}"\norigin_m = [0, 0, 4000]\nspacing_m = 100.0',
    )


def test_grid_density_file_missing(tmp_path):
    msg = message(tmp_path, _grid_text("absent.npy"))
    assert_pieces(
        msg, '`source[0].density_path` = "absent.npy": no such file', "config file's folder"
    )


@pytest.mark.parametrize(
    "array, piece",
    [
        (np.ones((2, 2)), "the array must be 3-D (nx, ny, nz) of C/m³; got shape (2, 2)"),
        (np.full((2, 2, 2), np.nan), "the density must be finite"),
        (np.array(["a"] * 8).reshape(2, 2, 2), "the array must hold real numbers"),
    ],
)
def test_grid_density_file_bad(tmp_path, array, piece):
    np.save(tmp_path / "rho.npy", array)
    assert_pieces(message(tmp_path, _grid_text("rho.npy")), "`source[0].density_path`", piece)


def test_grid_density_file_not_npy(tmp_path):
    (tmp_path / "rho.npy").write_text("not an array")
    msg = message(tmp_path, _grid_text("rho.npy"))
    assert_pieces(msg, '`source[0].density_path` = "rho.npy": not a readable .npy array file')


def test_neutral_grid_cannot_have_its_charge_estimated(tmp_path):
    rho = np.zeros((2, 2, 2))
    rho[0, 0, 1], rho[1, 1, 1] = 1e-9, -1e-9
    np.save(tmp_path / "rho.npy", rho)
    msg = message(tmp_path, _grid_text("rho.npy"))
    assert_pieces(msg, "`source[0].estimate`: the grid's net charge is zero")


def test_grid_keys_of_other_kinds_rejected(tmp_path):
    np.save(tmp_path / "rho.npy", np.ones((1, 1, 1)))
    text = _grid_text("rho.npy").replace("spacing_m = 100.0", "spacing_m = 100.0\ncharge_c = 1.0")
    assert_pieces(message(tmp_path, text), "`charge_c` does not apply to a grid source (source[0])")


# ------------------------------------------------------------------------------------------
# Mounting rules: regions, keep-outs and feasibility (checked by probeplan.site)
# ------------------------------------------------------------------------------------------

KEEPOUT_ALL = (
    '\n[[keepout]]\nkind = "rectangle"\nmin_m = [-600.0, -600.0]\nmax_m = [600.0, 600.0]\n'
)


def test_site_is_built_from_the_config():
    cfg = parse_config(BASE + "\n[[probes.installed]]\nposition_m = [3.0, 4.0, 1.0]\n")
    site = cfg.site()
    assert site.min_spacing_m == 0.0
    np.testing.assert_array_equal(site.installed_m, [[3.0, 4.0, 1.0]])
    assert site.allowed([[0.0, 0.0, 1.0], [0.0, 0.0, 2.0]]).tolist() == [True, False]


def test_region_wholly_inside_keepouts(tmp_path):
    msg = message(tmp_path, BASE + KEEPOUT_ALL)
    assert_pieces(
        msg,
        "cfg.toml: [[region]] / [[keepout]] with `probes.count` = 4",
        "no mounting position is left: region 0 (rectangle) lies wholly inside keep-out 0",
    )


def test_count_times_spacing_does_not_fit(tmp_path):
    # A 1000 m × 1000 m rectangle holds at most about 1e6/(0.866 × 400²) + 4000/400 + 1 ≈ 18
    # probes 400 m apart (hexagonal packing bound), far fewer than 50.
    text = edited("count = 4", "count = 50\nmin_spacing_m = 400.0")
    msg = message(tmp_path, text)
    assert_pieces(
        msg,
        "[[region]] / [[keepout]] with `probes.count` = 50 and `probes.min_spacing_m` = 400",
        "cannot place 50 probes at least 400 m apart",
    )


def test_budget_count_that_does_not_fit(tmp_path):
    text = edited("count = 4", "count = 2\nmin_spacing_m = 400.0")
    text += '\n[[grade]]\nname = "std"\ncost = 1.0\n[budget]\ncounts = [2, 60]\n'
    msg = message(tmp_path, text)
    assert_pieces(msg, "with `budget.counts` = 60", "cannot place 60 probes")


def test_region_constructor_errors_are_wrapped(tmp_path):
    text = edited(
        RECT, 'kind = "polygon"\nvertices_m = [[0, 0, 1], [10, 0, 1], [0, 10, 1]]\nz_m = 1.0'
    )
    msg = message(tmp_path, text)
    assert_pieces(
        msg, "cfg.toml: region[0]: `z_m` is not used by a polygon with [x, y, z] vertices"
    )


def test_rectangle_region_needs_its_height(tmp_path):
    msg = message(tmp_path, edited("z_m = 1.0", ""))
    assert_pieces(msg, "`region[0].z_m` is missing; give the mounting height in metres (a number)")


def test_buffer_belongs_to_keepouts_and_gain_to_regions(tmp_path):
    msg = message(tmp_path, edited("z_m = 1.0", "z_m = 1.0\nbuffer_m = 2.0"))
    assert_pieces(msg, "key `buffer_m` does not apply to a rectangle region (region[0])")
    msg = message(tmp_path, BASE + KEEPOUT_ALL.replace("600.0]\n", "600.0]\ngain = 2.0\n", 1))
    assert_pieces(msg, "key `gain` does not apply to a rectangle keepout (keepout[0])")


def test_keepout_takes_a_buffer():
    text = BASE + '\n[[keepout]]\nkind = "points"\npositions_m = [[0, 0, 1]]\nbuffer_m = 5.0\n'
    cfg = parse_config(text)
    assert cfg.keepouts[0].buffer_m == 5.0
    assert cfg.site().allowed([[3.0, 0.0, 1.0], [6.0, 0.0, 1.0]]).tolist() == [False, True]
