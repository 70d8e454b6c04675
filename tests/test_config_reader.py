"""The typed-table reader (probeplan.config.reader): one exact message per kind of bad value.

Unknown keys and tables, wrong types, non-finite numbers, reversed ranges, vectors of the wrong
length and enumerated options, each named by its dotted key. The site is fictional.
"""

from __future__ import annotations

import pytest
from config_cases import EST, assert_bad_case

BAD = {
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
            "charge_c, center_m, center_lonlat, name, estimate, charge_range_c, center_range_m."
        ],
    ),
    "single [region] table": (
        ("[[region]]", "[region]"),
        ["`region` must be an array of tables, each headed [[region]]", "write [[region]]"],
    ),
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
    "centre of two numbers": (
        ("center_m = [0.0, 0.0, 7000.0]", "center_m = [0.0, 7000.0]"),
        ["`source[0].center_m` must be 3 numbers (x, y, z) in metres; got 2: [0.0, 7000.0]"],
    ),
    "corner of three numbers": (
        ("min_m = [-500.0, -500.0]", "min_m = [-500.0, -500.0, 0.0]"),
        ["`region[0].min_m` must be 2 numbers (x, y) in metres; got 3"],
    ),
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
    "unknown caution": (
        ('title = "Fictional test range"', 'caution = "storm"'),
        [
            '`caution` must be one of "lightning", "esd", "high-voltage", "general", "none"; '
            'got "storm"'
        ],
    ),
}


@pytest.mark.parametrize("case", sorted(BAD))
def test_bad_input_gives_one_clear_message(tmp_path, case):
    assert_bad_case(tmp_path, *BAD[case])
