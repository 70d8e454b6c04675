"""Plots: files written with the right size and format, no display, and the coverage numbers.

The sites below are invented for the tests (fictional). References for the checks:

* PNG: the file starts with the 8-byte signature 89 50 4E 47 0D 0A 1A 0A and its first chunk
  is IHDR, whose data begin with the width and height as big-endian 32-bit integers (PNG
  specification, W3C / ISO/IEC 15948, §11.2.2 — recalled from memory).
* SVG is XML whose root element is ``svg`` in the namespace http://www.w3.org/2000/svg (W3C
  SVG specification); parsed with the standard library's XML parser.
* The coverage map's value at a grid point is the location bound of a problem whose nominal
  charge sits at that point, computed the ordinary way (config → problem → score).
"""

from __future__ import annotations

import struct
import xml.etree.ElementTree as ET
from pathlib import Path

import numpy as np
import pytest
from sites import ALL, box, make_config, point_source

from probeplan import plots
from probeplan.config import load_config
from probeplan.problem import build_problem
from probeplan.result import BudgetTable, make_result

CONFIGS = Path(__file__).resolve().parent.parent / "configs"

# A fictional yard: ground meters around a small charged cloud 180 m up, a building and a
# tank kept clear, one three-axis meter on a mast.
SITE = dict(
    title="fictional plot test yard",
    seed=4,
    probes={
        "noise_v_per_m": 10.0,
        "relative_noise": 0.02,
        "range_v_per_m": 30000.0,
        "installed": [{"position_m": [-150.0, 120.0, 8.0], "component": "vector"}],
    },
    region=[{"kind": "rectangle", "min_m": [-400.0, -300.0], "max_m": [400.0, 300.0], "z_m": 0.0}],
    keepout=[
        {"kind": "rectangle", "min_m": [-50.0, -40.0], "max_m": [60.0, 50.0]},
        {"kind": "points", "positions_m": [[250.0, -200.0, 0.0]], "buffer_m": 40.0},
    ],
    background={"field_v_per_m": [0.0, 0.0, -100.0], "estimate": True},
)

LAYOUT = np.array(
    [[-300.0, -250.0, 0.0], [320.0, -100.0, 0.0], [100.0, 240.0, 0.0], [-200.0, -20.0, 0.0]]
)
PNG_SIGNATURE = b"\x89PNG\r\n\x1a\n"


def config(x=20.0, y=-10.0, estimate=ALL, criterion="d", scenarios=6):
    cloud = point_source(-0.002, (x, y, 180.0), estimate, center_range_m=box(100.0, 150.0, 220.0))
    design = {"criterion": criterion, "scenarios": scenarios, "evaluations": None}
    return make_config("<plot test>", SITE, source=[cloud], design=design)


def png_size(path: Path) -> tuple[int, int]:
    data = path.read_bytes()
    assert data[:8] == PNG_SIGNATURE
    assert data[12:16] == b"IHDR"
    return struct.unpack(">II", data[16:24])


def expected_size() -> tuple[int, int]:
    w, h = plots.FIGSIZE_IN
    return round(w * plots.DPI), round(h * plots.DPI)


def svg_root(path: Path) -> ET.Element:
    root = ET.parse(path).getroot()
    assert root.tag == "{http://www.w3.org/2000/svg}svg"
    return root


def budget_table() -> BudgetTable:
    counts = np.array([2, 3, 4, 2, 3, 4])
    grades = np.array(["basic"] * 3 + ["fine"] * 3)
    cost = counts * np.where(grades == "basic", 1000.0, 2500.0)
    value = np.array([-30.0, -27.0, -25.5, -26.0, -np.inf, -22.0])
    return BudgetTable(
        count=counts,
        grade=grades,
        cost=cost,
        value=value,
        meets_target=value >= -26.0,
        pareto=np.array([True, True, True, False, False, True]),
        cheapest=3,
        target=-26.0,
        layouts=tuple(np.zeros((c, 3)) for c in counts),
    )


def test_site_map_png_has_the_figure_size(tmp_path):
    cfg = config()
    score = build_problem(cfg).score(LAYOUT)
    out = plots.site_map(cfg, score, tmp_path / "site.png")
    assert out == tmp_path / "site.png" and out.stat().st_size > 10_000
    assert png_size(out) == expected_size()
    assert sorted(p.name for p in tmp_path.iterdir()) == ["site.png"]  # no temporary left


def test_site_map_svg_parses_and_accepts_a_result(tmp_path):
    cfg = config()
    result = make_result("score", cfg, build_problem(cfg).score(LAYOUT))
    out = plots.site_map(cfg, result, tmp_path / "site.svg")
    root = svg_root(out)
    # SVG sizes are in points, 72 to the inch (matplotlib's SVG writer).
    w, h = plots.FIGSIZE_IN
    assert (root.get("width"), root.get("height")) == (f"{w * 72:g}pt", f"{h * 72:g}pt")


def test_coverage_matches_a_direct_score():
    # Every grid value is the `location` bound of the same layout with the nominal charge moved
    # to that grid point (installed 3-axis meter, background estimated: the padded axes too).
    cfg = config()
    pr = build_problem(cfg)
    cov = plots.coverage_grid(pr, LAYOUT, resolution=7)
    assert cov.error_m.shape == (7, 7)
    assert cov.z_m == 180.0 and cov.charge_c == -0.002
    for i, j in [(0, 0), (3, 4), (6, 2)]:
        x, y = cov.x_m[j], cov.y_m[i]
        direct = build_problem(config(x=x, y=y, criterion="location", scenarios=1))
        expected = direct.score(LAYOUT).per_scenario[0]
        assert cov.error_m[i, j] == pytest.approx(expected, rel=1e-9)
    # The grid covers the site: the region's corners lie within it.
    assert cov.x_m[0] <= -400.0 and cov.x_m[-1] >= 400.0
    assert cov.y_m[0] <= -300.0 and cov.y_m[-1] >= 300.0


def test_coverage_map_png(tmp_path):
    pr = build_problem(config())
    out = plots.coverage_map(pr, LAYOUT, None, tmp_path / "cov.png", resolution=12)
    assert png_size(out) == expected_size() and out.stat().st_size > 10_000


def test_coverage_needs_the_horizontal_position():
    pr = build_problem(config(estimate=("charge", "z")))
    with pytest.raises(ValueError, match=r'needs the horizontal position of source 0.*"x" and "y"'):
        plots.coverage_grid(pr, LAYOUT)
    with pytest.raises(ValueError, match=r"`resolution` must be an integer from 2 to 400; got 1"):
        plots.coverage_grid(build_problem(config()), LAYOUT, resolution=1)


@pytest.mark.parametrize("fmt", plots.FORMATS)
def test_budget_curve(tmp_path, fmt):
    out = plots.budget_curve(budget_table(), tmp_path / f"budget.{fmt}", "d", -26.0)
    assert out.stat().st_size > 5_000
    if fmt == "png":
        assert png_size(out) == expected_size()
    else:
        svg_root(out)


def test_budget_curve_without_target_and_error_criteria(tmp_path):
    bt = budget_table()
    for criterion in ("location", "charge"):
        out = plots.budget_curve(bt, tmp_path / f"{criterion}.png", criterion, None)
        assert png_size(out) == expected_size()
    with pytest.raises(ValueError, match=r"`criterion` must be one of d, location, charge"):
        plots.budget_curve(bt, tmp_path / "x.png", "best", None)


def test_plot_all_writes_what_applies(tmp_path):
    cfg = config()
    pr = build_problem(cfg)
    score = pr.score(LAYOUT)
    plain = make_result("score", cfg, score)
    paths = plots.plot_all(plain, cfg, pr, tmp_path / "a")
    assert [p.name for p in paths] == ["site_map.png", "coverage_map.png"]
    with_budget = make_result("budget", cfg, score, budget=budget_table())
    paths = plots.plot_all(with_budget, cfg, pr, tmp_path / "b", fmt="svg")
    assert [p.name for p in paths] == ["site_map.svg", "coverage_map.svg", "budget_curve.svg"]
    for p in paths:
        svg_root(p)
    no_xy = config(estimate=("charge", "z"))
    pr2 = build_problem(no_xy)
    paths = plots.plot_all(make_result("score", no_xy, pr2.score(LAYOUT)), no_xy, pr2, tmp_path)
    assert [p.name for p in paths] == ["site_map.png"]


def test_bad_format_and_suffix(tmp_path):
    cfg = config()
    pr = build_problem(cfg)
    result = make_result("score", cfg, pr.score(LAYOUT))
    with pytest.raises(ValueError, match=r"`fmt` must be one of png, svg; got 'jpg'"):
        plots.plot_all(result, cfg, pr, tmp_path, fmt="jpg")
    with pytest.raises(ValueError, match=r"must end in one of \.png, \.svg; got '\.pdf'"):
        plots.site_map(cfg, result, tmp_path / "site.pdf")


@pytest.mark.parametrize("name", ["indoor_powder.toml", "hv_test_bay.toml"])
def test_example_configs_draw(tmp_path, name):
    # Walls (3-D polygons), rails (segments), brackets (points) and buffered keep-outs.
    cfg = load_config(CONFIGS / name)
    pr = build_problem(cfg)
    layout = pr.site.regular_layout(pr.count)
    assert pr.site.allowed(layout).all()
    result = make_result("score", cfg, pr.score(layout))
    paths = plots.plot_all(result, cfg, pr, tmp_path)
    assert [p.name for p in paths] == ["site_map.png", "coverage_map.png"]
    assert all(png_size(p) == expected_size() for p in paths)
