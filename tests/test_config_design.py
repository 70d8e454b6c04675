"""[design], [[grade]] and [budget] (probeplan.config.design, .grades): choices and counts.

The grades and costs are invented for the tests.
"""

from __future__ import annotations

import pytest
from config_cases import BASE, EST, assert_bad_case

from probeplan.config import parse_config


def test_quantile_aggregate_is_normalised():
    cfg = parse_config(BASE + '\n[design]\naggregate = "quantile:0.25"\n')
    assert cfg.design.aggregate == "quantile:0.25" and cfg.design.quantile == 0.25


def test_scheduler_keys():
    cfg = parse_config(BASE + '\n[design]\nscheduler = "tcp://h:8786"\nscheduler_timeout_s = 3\n')
    assert cfg.design.scheduler == "tcp://h:8786" and cfg.design.scheduler_timeout_s == 3.0
    plain = parse_config(BASE).design
    assert plain.scheduler is None and plain.scheduler_timeout_s == 10.0


BAD = {
    "empty scheduler": (
        (EST, EST + '\n\n[design]\nscheduler = " "'),
        ["`design.scheduler` must not be empty", 'such as "tcp://host:8786"'],
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
    "location criterion without x and y": (
        (EST, 'estimate = ["charge", "z"]\n\n[design]\ncriterion = "location"'),
        ['`design.criterion` = "location" scores source 0', 'lacks "x", "y"'],
    ),
    "charge criterion without charge": (
        (EST, 'estimate = ["x"]\n\n[design]\ncriterion = "charge"'),
        ['`design.criterion` = "charge"', 'lacks "charge"'],
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
    assert_bad_case(tmp_path, *BAD[case])
