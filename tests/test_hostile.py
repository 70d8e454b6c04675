"""Hostile and unlucky inputs, one table-driven or property test per class of input.

Sites are tiny fictional ones from ``tests/sites.py`` (a handful of scenarios, no refinement),
so every ``plan`` here takes a second or two.
"""

from __future__ import annotations

import re

import numpy as np
import pytest
from sites import write_site

from probeplan.cli import main
from probeplan.site import Site, make_region
from probeplan.store import read_result

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
    assert "could not place" in out
