"""[ground], [probes], [[probes.installed]], [[region]], [[keepout]] and the mounting rules.

probeplan.config.ground, .probes and .regions; the site's own checks (probeplan.site) come back
wrapped in one message naming the tables. The site is fictional.
"""

from __future__ import annotations

import math

import numpy as np
import pytest
from config_cases import BASE, EST, RECT, assert_bad_case, assert_pieces, edited, message
from hypothesis import given, settings
from hypothesis import strategies as st

from probeplan.config import parse_config


def test_count_zero_is_allowed_with_installed_probes():
    text = (
        edited("count = 4", "count = 0") + "\n[[probes.installed]]\nposition_m = [1.0, 2.0, 0.0]\n"
    )
    cfg = parse_config(text)
    assert cfg.probes.count == 0 and len(cfg.installed) == 1


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


BAD = {
    "reversed rectangle": (
        ("max_m = [500.0, 500.0]", "max_m = [-600.0, 500.0]"),
        ["`region[0].min_m` x = -500.0 is above `region[0].max_m` x = -600.0"],
    ),
    "region below ground": (
        ("z_m = 1.0", "z_m = -1.0"),
        ["`region[0].z_m` puts a probe at z = -1 m, below the ground plane at z = 0 m"],
    ),
    "installed below ground": (
        (EST, EST + "\n\n[[probes.installed]]\nposition_m = [0, 0, -2]"),
        ["`probes.installed[0].position_m` puts a probe at z = -2 m"],
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
}


@pytest.mark.parametrize("case", sorted(BAD))
def test_bad_input_gives_one_clear_message(tmp_path, case):
    assert_bad_case(tmp_path, *BAD[case])


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


def test_budget_none_of_whose_counts_fit(tmp_path):
    # A larger count that does not fit is a budget row marked so (tests/test_hostile.py); the
    # config is refused only when even the smallest does not.
    text = edited("count = 4", "count = 2\nmin_spacing_m = 400.0")
    text += '\n[[grade]]\nname = "std"\ncost = 1.0\n[budget]\ncounts = [70, 60]\n'
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
