"""The scoring stage: Fisher information of a layout, checked against the world.

* J against central finite differences of the forward model and a hand-built meter model;
* saturation, Loewner monotonicity, probe order and unit scaling laws;
* which parameters are estimated, and the scenario table;
* a Monte Carlo check that a least-squares fit attains the Cramér–Rao bound at high SNR.

Every site, charge and number below is invented for the tests (a fictional site).
"""

from __future__ import annotations

import math

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st
from hypothesis.extra.numpy import arrays
from scipy.optimize import least_squares
from sites import ALL, make_config, meter_grade, point_source, rectangle, small_site

from probeplan.probes import axes_table, component_axes, draw_readings, readings
from probeplan.problem import build_problem, draw_scenarios

# --------------------------------------------------------------------------------------------
# Small configs
# --------------------------------------------------------------------------------------------

RANGES = dict(
    charge_range_c=[-30.0, -10.0],
    center_range_m=[[-2000.0, 2000.0], [-2000.0, 2000.0], [5000.0, 8000.0]],
)


def problem_config(
    *,
    ground: bool = True,
    component: str | list[float] = "z",
    noise: float = 20.0,
    relative: float = 0.0,
    range_v_per_m: float | None = None,
    gain: float = 1.0,
    count: int = 5,
    charge: float = -20.0,
    center: tuple[float, float, float] = (300.0, 200.0, 6000.0),
    estimate: tuple[str, ...] = ALL,
    ranges: bool = False,
    background: dict | None = None,
    installed: tuple[dict, ...] = (),
    criterion: str = "d",
    aggregate: str = "mean",
    scenarios: int = 1,
    seed: int = 3,
    half_width_m: float = 6000.0,
    region_gain: float = 1.0,
    grades: list[dict] | None = None,
):
    """A one-region storm-watch style config (fictional numbers) as a checked Config."""
    probes = {
        "count": count,
        "component": component,
        "noise_v_per_m": noise,
        "relative_noise": relative,
        "gain": gain,
        "range_v_per_m": range_v_per_m,
    }
    if installed:
        probes["installed"] = list(installed)
    return make_config(
        "test.toml",
        seed=seed,
        title=None,
        ground={"z_m": 0.0} if ground else None,
        probes=probes,
        region=[rectangle(half_width_m, gain=region_gain)],
        source=[point_source(charge, center, estimate, **(RANGES if ranges else {}))],
        background=background,
        design={
            "criterion": criterion,
            "aggregate": aggregate,
            "scenarios": scenarios,
            "evaluations": None,
        },
        grade=grades,
    )


BACKGROUND = {"field_v_per_m": [0.0, 0.0, -120.0], "estimate": True}

# A spread layout of five ground probes (m).
LAYOUT5 = np.array(
    [
        [-4000.0, -3500.0, 0.0],
        [3500.0, -3000.0, 0.0],
        [0.0, 500.0, 0.0],
        [-3000.0, 4000.0, 0.0],
        [4200.0, 3800.0, 0.0],
    ]
)


# --------------------------------------------------------------------------------------------
# A hand-built meter model and finite differences
# --------------------------------------------------------------------------------------------

_STEP_FLOOR = {"_m": 100.0, "_c": 1e-3, "_v_per_m": 1.0}


def _step(name: str, value: float) -> float:
    floor = next(v for k, v in _STEP_FLOOR.items() if name.endswith(k))
    return 1e-6 * max(abs(value), floor)


def _meters(problem, pos_new, gain_new, components=None, noises=None):
    """Every meter as (position (3,), axes (n_axes, 3), gain, Noise): installed first, then new
    (``components`` and ``noises``: the new meters' own, one each; default the config's)."""
    out = []
    pr = problem.config.probes
    for k, p in enumerate(problem.installed_m):
        comp = problem.config.installed[k].component or pr.component
        grade = _grade(problem.config, problem.config.installed[k].grade)
        out.append((p, component_axes(comp), problem.installed_gain[k], grade))
    components = components or [pr.component] * len(pos_new)
    noises = noises or [problem.noise] * len(pos_new)
    for p, g, c, n in zip(pos_new, gain_new, components, noises, strict=True):
        out.append((p, component_axes(c), g, n))
    return out


def _grade(config, name):
    """The config's own table of a grade (noise_v_per_m, relative_noise, range_v_per_m): the
    named [[grade]], or [probes] for none."""
    return next(g for g in config.grades if g.name == name) if name else config.probes


def _hand_readings(problem, theta_full, meters):
    """Noise-free readings gain × (axis · E), all meters and axes, from the field alone."""
    pos = np.array([m[0] for m in meters])
    e, _ = problem.scene.evaluate(theta_full[None], pos, jacobian=False)
    return np.concatenate([m[2] * (m[1] @ e[0, k]) for k, m in enumerate(meters)])


def fisher_by_differences(problem, pos_new, gain_new, components=None, noises=None):
    """J_s = G_sᵀ Σ_s⁻¹ G_s with G by central differences; Σ at the scenario's own readings.

    Source: the Gaussian Fisher information with parameter-independent covariance (Kay,
    Fundamentals of Statistical Signal Processing, vol. 1, §3.9, eq. 3.31), with Σ fixed at
    the scenario's readings as the contract states; a saturated reading is dropped (contract).
    Each reading has the noise of its own meter's grade.
    """
    meters = _meters(problem, pos_new, gain_new, components, noises)
    per_reading = [m[3] for m in meters for _ in range(m[1].shape[0])]
    add = np.array([n.noise_v_per_m for n in per_reading])
    rel = np.array([n.relative_noise for n in per_reading])
    top = np.array([n.range_v_per_m for n in per_reading])
    out = np.empty((problem.n_scenarios, problem.n_params, problem.n_params))
    for s, theta in enumerate(problem.theta):
        m0 = _hand_readings(problem, theta, meters)
        grad = np.empty((m0.size, problem.n_params))
        for j, col in enumerate(problem.est_cols):
            h = _step(problem.scene.param_names[col], theta[col])
            up, down = theta.copy(), theta.copy()
            up[col] += h
            down[col] -= h
            grad[:, j] = (
                _hand_readings(problem, up, meters) - _hand_readings(problem, down, meters)
            ) / (2 * h)
        sigma = np.hypot(add, rel * m0)
        keep = np.abs(m0) <= top
        g = grad[keep] / sigma[keep, None]
        out[s] = g.T @ g
    return out


def assert_fisher_close(actual, expected, rtol=1e-6):
    """Entry-wise agreement relative to sqrt(J_ii J_jj) (the natural scale of J_ij)."""
    d = np.sqrt(np.diagonal(expected, axis1=-2, axis2=-1))
    scale = d[..., :, None] * d[..., None, :]
    assert np.all(np.abs(actual - expected) <= rtol * scale + 1e-300), np.max(
        np.abs(actual - expected) / scale
    )


def criterion_by_hand(name, fisher, theta_est, names):
    """Per-scenario criterion from the contract's definitions, with numpy inverses."""
    if name == "d":
        sign, ld = np.linalg.slogdet(fisher)
        assert np.all(sign > 0)
        return ld
    cov = np.linalg.inv(fisher)
    if name == "location":
        ix, iy = names.index("s0.x_m"), names.index("s0.y_m")
        return np.sqrt(cov[:, ix, ix] + cov[:, iy, iy])
    iq = names.index("s0.charge_c")
    return np.sqrt(cov[:, iq, iq]) / np.abs(theta_est[:, iq])


FD_CASES = {
    # Ground meters over a storm charge, fair-weather background estimated, proportional noise.
    "ground-background-relative": dict(relative=0.02, background=BACKGROUND, ranges=True),
    # Free space, three-axis meters with gain 1.5 (all background components seen).
    "free-space-vector-gain": dict(
        ground=False,
        component="vector",
        gain=1.5,
        relative=0.05,
        center=(300.0, 200.0, 3000.0),
        background=BACKGROUND,
        ranges=True,
    ),
    # A tilted unit-vector axis, a region gain, and installed meters (one three-axis, gain 2).
    "unit-axis-installed": dict(
        component=[0.3, 0.0, 1.0],
        region_gain=1.3,
        relative=0.01,
        ranges=True,
        background=BACKGROUND,
        installed=(
            {"position_m": [-1500.0, 2500.0, 0.0], "component": "vector", "gain": 2.0},
            {"position_m": [2500.0, 1000.0, 0.0]},
        ),
    ),
}


@pytest.mark.parametrize("criterion", ["d", "location", "charge"])
@pytest.mark.parametrize("case", sorted(FD_CASES))
def test_fisher_matches_finite_differences(case, criterion):
    cfg = problem_config(criterion=criterion, scenarios=3, **FD_CASES[case])
    problem = build_problem(cfg)
    score = problem.score(LAYOUT5)
    # The gain a new meter gets: its own gain times its mounting region's (a mast factor).
    gain_new = np.full(len(LAYOUT5), cfg.probes.gain * cfg.regions[0].gain)
    expected = fisher_by_differences(problem, LAYOUT5, gain_new)
    assert_fisher_close(score.fisher, expected)
    assert_fisher_close(problem.fisher(LAYOUT5[None], gain_new[None])[0], expected)
    # The criterion of each scenario, then the mean over scenarios (contract definitions).
    per = criterion_by_hand(criterion, expected, problem.theta_est, problem.names)
    np.testing.assert_allclose(score.per_scenario, per, rtol=1e-5)
    assert score.value == pytest.approx(per.mean(), rel=1e-5)
    assert problem.layout_values(LAYOUT5[None], gain_new[None])[0] == pytest.approx(
        score.value, rel=1e-12
    )
    # 1-sigma bound: sqrt(diag(J⁻¹)) (Cramér–Rao, Kay vol. 1, §3.7).
    crb = np.sqrt(np.diagonal(np.linalg.inv(expected), axis1=-2, axis2=-1))
    np.testing.assert_allclose(score.crb_std, crb, rtol=1e-5)


GRADES = [
    meter_grade("coarse", 80.0, 1.0, relative_noise=0.05),
    meter_grade("fine", 5.0, 3.0, range_v_per_m=2000.0),
]


def test_each_probe_reads_its_own_axes_with_its_own_grade():
    # A mixed layout as one would score an existing installation: each meter its own component
    # and grade, an installed x meter of the fine grade among them. Reference: the same
    # finite-difference Fisher information (Kay, §3.9), each reading with its own meter's noise.
    # Free space, so that horizontal readings see the charge too (over a grounded plane its
    # field is vertical at the ground) and the layout resolves every parameter.
    installed = {"position_m": [2500.0, 1000.0, 0.0], "component": "x", "grade": "fine"}
    cfg = problem_config(
        ground=False,
        scenarios=3,
        ranges=True,
        background=BACKGROUND,
        installed=(installed,),
        grades=GRADES,
    )
    assert cfg.installed[0].grade == "fine"
    comps = ["vector", "x", "vector", (0.6, 0.0, 0.8), "vector"]
    grades = ["coarse", "", "fine", "fine", "coarse"]
    axes = axes_table(comps)
    problem = build_problem(cfg, layout_axes=axes)
    # The horizontal readings make the horizontal background observable: it is estimated too.
    assert {"bg.x_v_per_m", "bg.y_v_per_m", "bg.z_v_per_m"} <= set(problem.names)
    score = problem.score(LAYOUT5, None, axes, grades)
    gain = np.full(len(LAYOUT5), cfg.probes.gain)
    noises = [_grade(cfg, g) for g in grades]
    assert noises[2].noise_v_per_m == 5.0 and noises[1].noise_v_per_m == 20.0
    assert np.isfinite(score.value)
    expected = fisher_by_differences(problem, LAYOUT5, gain, comps, noises)
    assert_fisher_close(score.fisher, expected)
    assert score.grade == ("fine", *grades)
    np.testing.assert_array_equal(score.axes[1:], axes)
    np.testing.assert_array_equal(score.axes[0], [[1.0, 0.0, 0.0], [0, 0, 0], [0, 0, 0]])
    # Losing one meter removes exactly its own readings (information of independent readings
    # adds): compare with the reference of the others. Meters are numbered installed first.
    finite = 0
    for k in range(len(LAYOUT5)):
        keep = [i for i in range(len(LAYOUT5)) if i != k]
        without = fisher_by_differences(
            problem, LAYOUT5[keep], gain[keep], [comps[i] for i in keep], [noises[i] for i in keep]
        )
        sign, logdet = np.linalg.slogdet(without)
        got = score.failure_values[1 + k]
        if np.isfinite(got):
            finite += 1
            assert np.all(sign > 0) and got == pytest.approx(logdet.mean(), rel=1e-6)
        else:  # a vector meter is the only one seeing some combination: singular without it
            eig = np.linalg.eigvalsh(without)
            assert np.min(eig / eig[..., -1:]) < 1e-9
    assert finite >= 2


def test_unknown_grade_or_wrong_axes_is_a_clear_error():
    problem = build_problem(problem_config())
    with pytest.raises(ValueError, match=r"`grades` must name 5 grades.*got \['gold'"):
        problem.score(LAYOUT5, grades=["gold"] * 5)
    with pytest.raises(ValueError, match=r"`axes` must have shape \(5, n_axes, 3\)"):
        problem.score(LAYOUT5, axes=np.zeros((4, 1, 3)))


def test_score_lists_installed_probes_first():
    cfg = problem_config(**FD_CASES["unit-axis-installed"])
    problem = build_problem(cfg)
    score = problem.score(LAYOUT5)
    assert score.positions_m.shape == (7, 3)
    np.testing.assert_array_equal(score.installed, [True, True] + [False] * 5)
    np.testing.assert_array_equal(score.positions_m[:2], cfg.installed_m)
    np.testing.assert_allclose(score.gain, [2.0, 1.0] + [1.3] * 5)
    # The installed three-axis meter sees every background component.
    assert score.names[-3:] == ("bg.x_v_per_m", "bg.y_v_per_m", "bg.z_v_per_m")
    assert score.fisher.shape == (1, 7, 7)
    assert score.crb_std.shape == (1, 7)


# --------------------------------------------------------------------------------------------
# Saturation
# --------------------------------------------------------------------------------------------


def test_saturated_reading_carries_no_information():
    # 1 mC at 100 m over ground: straight below, |E_z| = 2kq/h² ≈ 1.8 kV/m (Coulomb plus the
    # image charge), beyond a 1 kV/m range; 300 m aside it is ≈ 57 V/m, well inside.
    cfg = problem_config(
        noise=1.0,
        range_v_per_m=1000.0,
        charge=1e-3,
        center=(0.0, 0.0, 100.0),
        half_width_m=1000.0,
    )
    problem = build_problem(cfg)
    under = np.array([[0.0, 0.0, 0.0]])
    ring = np.array([[300.0, 0.0, 0.0], [0.0, 300.0, 0.0], [-300.0, 0.0, 0.0], [0.0, -300.0, 0.0]])
    rows, saturated = problem.rows(np.concatenate([under, ring]))
    assert saturated[0, 0].all() and not saturated[0, 1:].any()
    assert np.all(rows[0, 0] == 0.0)
    with_probe = problem.score(np.concatenate([under, ring]))
    without = problem.score(ring)
    np.testing.assert_array_equal(with_probe.fisher, without.fisher)
    np.testing.assert_array_equal(with_probe.saturated, [1.0, 0.0, 0.0, 0.0, 0.0])
    # The finite-difference model, which drops readings beyond range, agrees.
    expected = fisher_by_differences(problem, np.concatenate([under, ring]), np.ones(5))
    assert_fisher_close(with_probe.fisher, expected)


# --------------------------------------------------------------------------------------------
# Laws: more probes never hurt, order does not matter, units scale
# --------------------------------------------------------------------------------------------

_LOEWNER = build_problem(problem_config(relative=0.02, background=BACKGROUND, ranges=True))
_layout = arrays(
    float,
    st.tuples(st.integers(1, 6), st.just(3)),
    elements=st.floats(-6000.0, 6000.0, allow_nan=False),
)


@settings(max_examples=25, deadline=None)
@given(layout=_layout, extra=arrays(float, 3, elements=st.floats(-6000.0, 6000.0)))
def test_adding_a_probe_never_lowers_information(layout, extra):
    # Fisher information of independent readings adds (Kay vol. 1, §3.7), and each term is
    # positive semidefinite, so J_{n+1} − J_n ⪰ 0 in the Loewner order.
    layout = layout.copy()
    layout[:, 2] = 0.0
    more = np.concatenate([layout, [[extra[0], extra[1], 0.0]]])
    j_n = _LOEWNER.fisher(layout[None])[0]
    j_more = _LOEWNER.fisher(more[None])[0]
    # (a parameter no meter sees has a zero diagonal: left unscaled, not divided by 0)
    diag = np.diagonal(j_more, axis1=-2, axis2=-1)
    d = 1.0 / np.sqrt(np.where(diag > 0, diag, 1.0))
    diff = (j_more - j_n) * d[..., :, None] * d[..., None, :]
    assert np.linalg.eigvalsh(diff).min() >= -1e-10
    v_n, v_more = _LOEWNER.values(np.stack([j_n, j_more]))
    assert v_more >= v_n or not np.isfinite(v_n)


def test_tilted_meters_estimate_only_the_background_they_can_separate():
    # Every reading sees 0.6 B_y + 0.8 B_z: one number, so one background component.
    bg = {"field_v_per_m": [0.0, 0.0, -120.0], "estimate": True}
    problem = build_problem(small_site(count=6, component=[0.0, 0.6, 0.8], background=bg))
    assert [n for n in problem.names if n.startswith("bg.")] == ["bg.z_v_per_m"]
    layout = np.array(
        [
            [-2500, -2500, 0],
            [2500, -2500, 0],
            [0, 0, 0],
            [-2500, 2500, 0],
            [2500, 2500, 0],
            [0, 2500, 0],
        ],
        dtype=float,
    )
    assert np.isfinite(problem.score(layout).value)
    # Axis-aligned meters: exactly the components they read.
    both = build_problem(
        small_site(
            count=6,
            background=bg,
            installed=[{"position_m": [100.0, 0.0, 0.0], "component": "x"}],
        )
    )
    assert [n for n in both.names if n.startswith("bg.")] == ["bg.x_v_per_m", "bg.z_v_per_m"]


def test_a_budget_grade_does_not_change_the_installed_meters():
    grades = [meter_grade("coarse", 200.0, 1.0)]
    inst = [{"position_m": [500.0, 500.0, 0.0]}]
    cfg = small_site(installed=inst, grades=grades)
    plain = build_problem(cfg)
    coarse = build_problem(cfg, grade=cfg.grades[0])
    np.testing.assert_array_equal(plain.fisher_installed, coarse.fisher_installed)
    assert coarse.noise.noise_v_per_m == 200.0
    assert coarse.grades[coarse.installed_grade[0]].noise_v_per_m == 20.0


def test_probe_order_does_not_matter():
    problem = build_problem(problem_config(relative=0.02, background=BACKGROUND, ranges=True))
    perm = np.random.default_rng(0).permutation(len(LAYOUT5))
    a = problem.fisher(LAYOUT5[None])[0]
    b = problem.fisher(LAYOUT5[perm][None])[0]
    np.testing.assert_allclose(b, a, rtol=1e-12, atol=0.0)
    assert problem.score(LAYOUT5[perm]).value == pytest.approx(problem.score(LAYOUT5).value)


def test_doubling_additive_noise_quarters_information():
    # J = Gᵀ Σ⁻¹ G with Σ = σ² I: doubling σ divides J by 4, so log det drops by p·ln 4.
    base = dict(background=BACKGROUND, ranges=True, scenarios=4)
    quiet = build_problem(problem_config(noise=20.0, **base))
    loud = build_problem(problem_config(noise=40.0, **base))
    np.testing.assert_allclose(loud.score(LAYOUT5).fisher, quiet.score(LAYOUT5).fisher / 4.0)
    p = quiet.n_params
    assert p == 5
    assert quiet.score(LAYOUT5).value - loud.score(LAYOUT5).value == pytest.approx(
        p * math.log(4.0), rel=1e-9
    )


def test_charge_scaling_scales_position_bound_inversely():
    # The field is linear in the charge q (Coulomb's law): ∂h/∂q is independent of q and
    # ∂h/∂x ∝ q, so with additive noise J = D J₁ D, D = diag(1, c, c, c), when q → c·q.
    # Hence the 1-sigma position bounds scale by 1/c and the charge bound is unchanged.
    c = 3.0
    weak = build_problem(problem_config(charge=-10.0)).score(LAYOUT5).crb_std[0]
    strong = build_problem(problem_config(charge=-10.0 * c)).score(LAYOUT5).crb_std[0]
    assert strong[0] == pytest.approx(weak[0], rel=1e-9)
    np.testing.assert_allclose(strong[1:], weak[1:] / c, rtol=1e-9)


def test_length_scaling_of_the_bounds():
    # Coulomb's field is homogeneous of degree −2 in lengths (and the image method maps a
    # scaled scene over z = 0 to a scaled image): with every length × a, ∂h/∂q scales as a⁻²
    # and ∂h/∂x as a⁻³, so σ_q scales as a² and σ_x, σ_y, σ_z as a³ (additive noise).
    a = 2.0
    small = build_problem(problem_config(center=(300.0, 200.0, 3000.0), half_width_m=3000.0))
    large = build_problem(
        problem_config(center=(300.0 * a, 200.0 * a, 3000.0 * a), half_width_m=3000.0 * a)
    )
    crb_small = small.score(LAYOUT5 / 2.0).crb_std[0]
    crb_large = large.score(LAYOUT5 / 2.0 * a).crb_std[0]
    assert crb_large[0] == pytest.approx(crb_small[0] * a**2, rel=1e-9)
    np.testing.assert_allclose(crb_large[1:], crb_small[1:] * a**3, rtol=1e-9)


# --------------------------------------------------------------------------------------------
# What is estimated
# --------------------------------------------------------------------------------------------


def test_background_components_no_meter_reads_are_not_estimated():
    # Vertical (z) meters cannot see a horizontal background field at all: the contract says
    # only the components some meter reads are estimated.
    problem = build_problem(problem_config(background=BACKGROUND))
    assert problem.names == ("s0.charge_c", "s0.x_m", "s0.y_m", "s0.z_m", "bg.z_v_per_m")
    # An installed three-axis meter sees all three.
    inst = {"position_m": [100.0, 100.0, 0.0], "component": "vector"}
    problem = build_problem(problem_config(background=BACKGROUND, installed=(inst,)))
    assert problem.names[-3:] == ("bg.x_v_per_m", "bg.y_v_per_m", "bg.z_v_per_m")
    # A meter along x sees only the x component.
    problem = build_problem(problem_config(background=BACKGROUND, component="x"))
    assert problem.names[-1] == "bg.x_v_per_m"
    assert "bg.z_v_per_m" not in problem.names


def test_only_listed_parameters_are_estimated_in_contract_order():
    problem = build_problem(problem_config(estimate=("z", "charge"), background=BACKGROUND))
    assert problem.names == ("s0.charge_c", "s0.z_m", "bg.z_v_per_m")
    assert problem.fisher(LAYOUT5[None]).shape == (1, 1, 3, 3)


# --------------------------------------------------------------------------------------------
# Scenarios
# --------------------------------------------------------------------------------------------


def test_draw_scenarios_nominal_first_then_within_ranges():
    cfg = problem_config(ranges=True, scenarios=40, background=BACKGROUND)
    problem = build_problem(cfg)
    names = problem.scene.param_names
    theta = problem.theta
    assert theta.shape == (40, len(names))
    np.testing.assert_array_equal(theta[0], problem.scene.nominal((0.0, 0.0, -120.0)))
    col = {n: k for k, n in enumerate(names)}
    for name, lo, hi in [
        ("s0.charge_c", -30.0, -10.0),
        ("s0.x_m", -2000.0, 2000.0),
        ("s0.y_m", -2000.0, 2000.0),
        ("s0.z_m", 5000.0, 8000.0),
    ]:
        v = theta[1:, col[name]]
        assert np.all((v >= lo) & (v <= hi)), name
        assert np.ptp(v) > 0.5 * (hi - lo), name  # really drawn, not all nominal
    # Parameters without a range stay nominal in every scenario.
    np.testing.assert_array_equal(theta[:, col["bg.z_v_per_m"]], -120.0)


def test_draw_scenarios_is_reproducible_from_the_seed():
    cfg = problem_config(ranges=True, scenarios=8)
    problem = build_problem(cfg)
    a = draw_scenarios(cfg, problem.scene, np.random.default_rng(5))
    b = draw_scenarios(cfg, problem.scene, np.random.default_rng(5))
    c = draw_scenarios(cfg, problem.scene, np.random.default_rng(6))
    np.testing.assert_array_equal(a, b)
    np.testing.assert_array_equal(a[0], c[0])
    assert not np.array_equal(a[1:], c[1:])
    # build_problem draws with the config's seed, so equal seeds give equal tables.
    np.testing.assert_array_equal(build_problem(cfg).theta, problem.theta)
    other = build_problem(problem_config(ranges=True, scenarios=8, seed=4))
    assert not np.array_equal(other.theta, problem.theta)


# --------------------------------------------------------------------------------------------
# Monte Carlo: the bound is attained by a least-squares fit at high SNR
# --------------------------------------------------------------------------------------------


def test_least_squares_fits_attain_the_cramer_rao_bound():
    # Claim checked: at high SNR the spread of a nonlinear least-squares fit equals the
    # Cramér–Rao bound. Source: Kay, Fundamentals of Statistical Signal Processing, vol. 1,
    # §7.5 — the ML estimator is asymptotically efficient; with Gaussian noise of known
    # covariance ML is weighted least squares, and at high SNR the linearised model makes it
    # unbiased with covariance J⁻¹. A -20 C charge 6 km up gives readings of ~4–10 kV/m
    # against 20 V/m of noise (SNR ~ 200–500), so the linearisation holds.
    cfg = problem_config(count=7, center=(400.0, -300.0, 6000.0))
    problem = build_problem(cfg)
    ang = np.arange(6) * np.pi / 3.0
    ring = np.stack([5000.0 * np.cos(ang), 5000.0 * np.sin(ang), 0.0 * ang], axis=1)
    layout = np.concatenate([[[0.0, 0.0, 0.0]], ring])
    fisher = problem.score(layout).fisher[0]
    cov = np.linalg.inv(fisher)
    crb = np.sqrt(np.diag(cov))

    theta = problem.theta[0].copy()
    cols = problem.est_cols
    truth = theta[cols]
    axes = np.broadcast_to(problem.new_axes, (len(layout), *problem.new_axes.shape))
    gain = np.ones(len(layout))

    def model(est):
        full = theta.copy()
        full[cols] = est
        e, _ = problem.scene.evaluate(full[None], layout, jacobian=False)
        return readings(e, axes, gain)[0].ravel()

    clean = model(truth)
    sigma = problem.noise.sigma(clean)
    assert np.all(np.abs(clean) / sigma > 100.0)  # high SNR, as the claim requires

    rng = np.random.default_rng(2024)
    n = 400
    err = np.empty((n, truth.size))
    for k in range(n):  # one fit per trial: the trials are the experiment, not a hot path
        measured, saturated = draw_readings(clean, problem.noise, rng)
        assert not saturated.any()
        # Fit in units of the bound (well-conditioned), starting near the truth.
        start = rng.normal(0.0, 0.2, truth.size)
        fit = least_squares(
            lambda u, m=measured: (model(truth + crb * u) - m) / sigma,
            start,
            method="lm",
            xtol=1e-12,
            ftol=1e-12,
        )
        assert fit.success
        err[k] = crb * fit.x

    # Sample standard deviation vs the bound: the std of a sample std is ≈ σ/sqrt(2(n−1))
    # (Gaussian sampling theory); allow 4 of those.
    sd = err.std(axis=0, ddof=1)
    np.testing.assert_allclose(sd / crb, 1.0, atol=4.0 / math.sqrt(2 * (n - 1)))
    # Unbiased at high SNR: each mean within 4 standard errors of 0.
    assert np.all(np.abs(err.mean(axis=0)) / crb < 4.0 / math.sqrt(n))
    # Correlations vs J⁻¹: a sample correlation has std ≈ (1 − ρ²)/sqrt(n) (Fisher 1915).
    rho = cov / np.outer(crb, crb)
    r = np.corrcoef(err.T)
    assert np.all(np.abs(r - rho) <= 4.0 * (1.0 - rho**2) / math.sqrt(n) + 1e-12)
    # The whole covariance at once: with errors ~ N(0, J⁻¹), eᵀ J e ~ χ²_p, mean p, var 2p.
    p = truth.size
    maha = np.einsum("ni,ij,nj->n", err, fisher, err)
    assert abs(maha.mean() - p) < 4.0 * math.sqrt(2.0 * p / n)


def test_installed_meters_alone_are_scored_with_their_single_failures():
    # count = 0 is allowed when meters are installed (scoring what a site already has); the
    # single-failure values then drop one installed meter at a time. Reference: the finite-
    # difference Fisher information (Kay, §3.9) of the meters that remain.
    installed = tuple(
        {"position_m": [x, y, 0.0]}
        for x, y in ((-4000.0, -3500.0), (3500.0, -3000.0), (0.0, 500.0), (-3000.0, 4000.0))
    )
    cfg = problem_config(count=0, installed=installed, ground=False)
    problem = build_problem(cfg)
    score = problem.score(np.empty((0, 3)))
    assert score.failure_values.shape == (4,)
    full = fisher_by_differences(problem, np.empty((0, 3)), np.empty(0))
    assert_fisher_close(score.fisher, full)
    # the batched scorer agrees: three "layouts" of no new meter are the installed ones alone
    np.testing.assert_allclose(problem.layout_values(np.empty((3, 0, 3))), score.value, rtol=1e-12)


@pytest.mark.parametrize(
    ("noise", "relative", "reading"),
    [(20.0, 0.02, 1500.0), (1e160, 0.0, 1.0), (1.0, 0.1, 1e160), (1e-170, 0.0, 0.0)],
)
def test_meter_noise_is_the_quadrature_sum_at_any_scale(noise, relative, reading):
    # σ = sqrt(noise² + (relative × reading)²), the two independent errors added in quadrature
    # (common practice for independent error sources); numpy's hypot is the reference, which
    # neither overflows nor underflows where the plain squares would.
    from probeplan.probes import Noise

    grade = Noise(noise_v_per_m=noise, relative_noise=relative)
    got = grade.sigma(np.array([reading, -reading]))
    np.testing.assert_allclose(got, np.hypot(noise, relative * reading), rtol=1e-15)
