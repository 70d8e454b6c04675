"""The maps a user reads: what they span, what they label, and what they say when they cannot
be drawn. The sites are invented for the tests (fictional)."""

from __future__ import annotations

import io

import numpy as np
import pytest
from matplotlib.backends.backend_agg import FigureCanvasAgg
from matplotlib.transforms import Bbox
from rich.console import Console
from sites import ALL, make_config, point_source, rectangle

from probeplan import plots, report
from probeplan.problem import build_problem
from probeplan.result import make_result

# A small yard (200 m × 200 m) under a storm charge that the scenarios move over 4 km.
YARD = {
    "seed": 2,
    "probes": {"count": 3, "noise_v_per_m": 10.0, "range_v_per_m": 1e6},
    "region": [rectangle(100.0)],
    "keepout": [
        {"kind": "rectangle", "name": "fuel bund", "min_m": [-20.0, -20.0], "max_m": [20.0, 20.0]}
    ],
    "design": {"scenarios": 8},
}
SPREAD = [[-2000.0, 2000.0], [-1500.0, 1000.0], [2500.0, 3500.0]]

LAYOUT = np.array([[90.0, -90.0, 0.0], [-90.0, -90.0, 0.0], [90.0, 90.0, 0.0]])


def yard(title="Fictional yard", mast_z=0.0, estimate=ALL):
    cfg = make_config(
        "yard.toml",
        YARD,
        title=title,
        probes={"installed": [{"name": "mast-A", "position_m": [-80.0, 60.0, mast_z]}]},
        source=[point_source(-10.0, estimate=estimate, center_range_m=SPREAD)],
    )
    return cfg, build_problem(cfg)


@pytest.fixture
def figures(monkeypatch):
    """The figures the plot functions would save, in order (nothing is written)."""
    drawn = []

    def keep(fig, path, fmt):
        FigureCanvasAgg(fig).draw()
        drawn.append(fig)
        return path

    monkeypatch.setattr(plots, "_save", keep)
    return drawn


def texts(fig) -> list[str]:
    return [t.get_text() for ax in fig.axes for t in ax.texts]


def test_the_coverage_map_spans_the_scenarios_not_only_the_site():
    _, pr = yard()
    cov = plots.coverage_grid(pr, LAYOUT, resolution=6)
    xs, ys = pr.theta[:, pr.scene.param_names.index("s0.x_m")], pr.theta[:, 2]
    assert xs.min() < -100.0 or xs.max() > 100.0  # the scenarios leave the yard
    assert cov.x_m[0] <= xs.min() and cov.x_m[-1] >= xs.max()
    assert cov.y_m[0] <= ys.min() and cov.y_m[-1] >= ys.max()


@pytest.mark.parametrize(
    ("lo", "hi"),
    [(100.0, 101.0), (100.0, 150.0), (3.0, 30.0), (1.0, 1e5), (0.37, 0.41), (2.5, 4.9)],
)
def test_the_colour_bar_has_at_least_two_labelled_ticks(lo, hi):
    ticks = plots.colorbar_ticks(lo, hi)
    assert ticks.size >= 2
    assert np.all((ticks >= lo) & (ticks <= hi))
    assert len(set(ticks.tolist())) == ticks.size


def test_the_drawn_colour_bar_labels_its_ticks_in_readable_units(figures):
    _, pr = yard()
    plots.coverage_map(pr, LAYOUT, None, "cov.png", resolution=6)
    (fig,) = figures
    bar = fig.axes[-1]
    labels = [t.get_text() for t in bar.get_yticklabels() if t.get_text()]
    assert len(labels) >= 2, labels
    assert all(label.endswith((" m", " km")) for label in labels), labels


@pytest.mark.parametrize(
    "title",
    [
        "A fictional site " * 20,  # far longer than a figure is wide
        "Costs $5 and $6 — a fictional \x1b[2J site",  # no mathematics, no escape
    ],
)
def test_titles_fit_the_figure(figures, title):
    cfg, pr = yard(title=title)
    result = make_result("score", cfg, pr.score(LAYOUT))
    plots.site_map(cfg, result, "site.png")
    plots.coverage_map(pr, LAYOUT, None, "cov.png", resolution=4)
    for fig in figures:
        renderer = fig.canvas.get_renderer()
        box = fig.axes[0].title.get_window_extent(renderer)
        assert Bbox.intersection(box, fig.bbox) is not None
        assert box.x0 >= fig.bbox.x0 - 1 and box.x1 <= fig.bbox.x1 + 1
        shown = fig.axes[0].title.get_text()
        assert "$" not in shown.replace("\\$", "") and "\x1b" not in shown


def test_meters_and_keepouts_are_labelled_by_name(figures):
    cfg, pr = yard()
    result = make_result("score", cfg, pr.score(LAYOUT))
    plots.plot_all(result, cfg, pr, ".")
    for fig in figures[:2]:
        labels = texts(fig)
        for name in ("mast-A", "new-0", "new-1", "new-2", "fuel bund"):
            assert name in labels, (name, labels)
        assert not any("z = " in label for label in labels)  # every meter on the ground


def test_meters_at_different_heights_show_their_height(figures):
    cfg, pr = yard(mast_z=12.5)
    result = make_result("score", cfg, pr.score(LAYOUT))
    plots.site_map(cfg, result, "site.png")
    labels = texts(figures[0])
    assert "mast-A\nz = 12.5 m" in labels and "new-0\nz = 0 m" in labels


def test_a_map_that_cannot_be_drawn_says_why(tmp_path):
    cfg, pr = yard(estimate=("charge", "z"))
    result = make_result("score", cfg, pr.score(LAYOUT))
    paths = plots.plot_all(result, cfg, pr, tmp_path)
    assert [p.name for p in paths] == ["site_map.png"]
    ((name, why),) = paths.skipped
    assert name == "coverage_map.png" and "s0.charge_c, s0.z_m" in why
    buf = io.StringIO()
    report.print_plots(paths, Console(file=buf, width=80))
    out = " ".join(buf.getvalue().split())
    assert "Not drawn: coverage_map.png: it shows the horizontal location error of source 0" in out
    assert 'add "x" and "y" to source[0].estimate' in out
