"""Fisher stage: every criterion and aggregate against its contract definition, the
Cramér–Rao bounds against numpy, singular layouts, and the unresolved-direction report.

Every site, charge and number below is invented for the tests (a fictional site).
"""

from __future__ import annotations

import math

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st
from sites import ALL, make_config, point_source, rectangle

import probeplan.fisher as fisher_mod
from probeplan.fisher import (
    CRITERIA,
    Criterion,
    aggregate,
    covariance,
    crb_std,
    d_ratio,
    fisher_from_rows,
    log_det,
    parse_aggregate,
    unresolved_directions,
)
from probeplan.problem import build_problem

NAMES = ("s0.charge_c", "s0.x_m", "s0.y_m", "s0.z_m", "bg.z_v_per_m")


def spd(rng: np.random.Generator, n_scenarios: int, p: int = 5) -> np.ndarray:
    """Well-conditioned SPD matrices in mixed units (C, m, V/m): D A D, A near identity."""
    a = rng.normal(size=(n_scenarios, p, 2 * p))
    a = a @ np.swapaxes(a, -1, -2) / (2 * p) + 0.5 * np.eye(p)
    d = np.array([3e2, 1e-2, 2e-2, 5e-3, 1.0])[:p]  # 1/σ scales of the parameters
    return a * d[:, None] * d[None, :]


def fisher_config(
    path: str,
    layout_count: int = 1,
    estimate: tuple[str, ...] = ALL,
    criterion: str = "d",
    center: tuple[float, float, float] = (300.0, 200.0, 6000.0),
):
    """A single-scenario site: one point charge over a 400 km square of ground meters."""
    return make_config(
        path,
        seed=1,
        title=None,
        probes={"count": layout_count},
        region=[rectangle(200000.0)],
        source=[point_source(center_m=center, estimate=estimate)],
        design={"criterion": criterion, "scenarios": 1, "evaluations": None},
    )


# --------------------------------------------------------------------------------------------
# J, log det, the bounds
# --------------------------------------------------------------------------------------------


def test_fisher_from_rows_is_the_sum_of_outer_products():
    # J = Σ_r g_r g_rᵀ for whitened gradients g_r (Kay vol. 1, §3.9: J = Gᵀ Σ⁻¹ G, Σ = I).
    rows = np.random.default_rng(0).normal(size=(3, 7, 4))
    expected = np.stack([sum(np.outer(r, r) for r in s) for s in rows])
    np.testing.assert_allclose(fisher_from_rows(rows), expected, rtol=1e-12)


def test_log_det_and_bounds_match_numpy_in_mixed_units():
    j = spd(np.random.default_rng(1), 6)
    sign, ld = np.linalg.slogdet(j)
    assert np.all(sign > 0)
    np.testing.assert_allclose(log_det(j), ld, rtol=1e-12)
    inv = np.linalg.inv(j)
    # crb_std = sqrt(diag(J⁻¹)) — the 1-sigma Cramér–Rao bound (Kay vol. 1, §3.7).
    np.testing.assert_allclose(crb_std(j), np.sqrt(np.diagonal(inv, axis1=1, axis2=2)), rtol=1e-10)
    cov, singular = covariance(j)
    assert not singular.any()
    np.testing.assert_allclose(cov, inv, rtol=1e-9, atol=0.0)


def test_singular_information_gives_infinite_bounds():
    rng = np.random.default_rng(2)
    g = rng.normal(size=(3, 4))  # three readings, four parameters: rank 3
    j = (g.T @ g)[None]
    cov, singular = covariance(j)
    assert singular.tolist() == [True]
    assert np.all(np.isinf(np.diagonal(cov, axis1=1, axis2=2)))
    assert np.all(np.isinf(crb_std(j)))
    assert log_det(j)[0] == -np.inf
    # A parameter that no reading sees (zero row and column) is singular too.
    j2 = spd(rng, 1, 4)
    j2[:, 2, :] = 0.0
    j2[:, :, 2] = 0.0
    assert covariance(j2)[1].tolist() == [True]
    assert log_det(j2)[0] == -np.inf


def test_one_matrix_without_a_batch_axis_keeps_its_shape():
    # Outputs keep their rank: one (n, n) matrix gives a 0-d flag. A nearly collinear pair
    # (correlation 1 - 1e-13) must take the eigenvalue test without failing on the 0-d flag.
    near = np.array([[1.0, 1.0 - 1e-13], [1.0 - 1e-13, 1.0]])
    cov, singular = covariance(near)
    assert singular.shape == () and bool(singular)
    assert np.all(np.isinf(np.diagonal(cov)))
    assert np.all(np.isinf(crb_std(near)))


# --------------------------------------------------------------------------------------------
# Criteria (contract: exact definitions)
# --------------------------------------------------------------------------------------------


def test_criteria_per_scenario_match_their_definitions():
    rng = np.random.default_rng(3)
    j = spd(rng, 5)
    theta = np.column_stack([rng.uniform(-30, -10, 5), rng.normal(size=(5, 4))])
    inv = np.linalg.inv(j)
    d = Criterion("d").per_scenario(j, theta)
    np.testing.assert_allclose(d, np.linalg.slogdet(j)[1], rtol=1e-12)
    loc = Criterion("location", x_index=1, y_index=2).per_scenario(j, theta)
    np.testing.assert_allclose(loc, np.sqrt(inv[:, 1, 1] + inv[:, 2, 2]), rtol=1e-10)
    q = Criterion("charge", charge_index=0).per_scenario(j, theta)
    np.testing.assert_allclose(q, np.sqrt(inv[:, 0, 0]) / np.abs(theta[:, 0]), rtol=1e-10)
    # Batched over layouts: (n_layouts, n_scenarios, p, p) → (n_layouts, n_scenarios).
    both = np.stack([j, 4.0 * j])
    out = Criterion("location", x_index=1, y_index=2).per_scenario(both, theta)
    assert out.shape == (2, 5)
    np.testing.assert_allclose(out[1], loc / 2.0, rtol=1e-10)  # 4× information, ½ the error


def test_criterion_rejects_unknown_names():
    with pytest.raises(ValueError, match="criterion must be one of d, location, charge; got 'e'"):
        Criterion("e")


@pytest.mark.parametrize("criterion", CRITERIA)
def test_a_single_probe_cannot_resolve_four_parameters(criterion):
    # One reading, four unknowns: J has rank 1, so the contract gives −inf (d) or +inf.
    problem = build_problem(fisher_config("one.toml", criterion=criterion))
    score = problem.score(np.array([[1000.0, 0.0, 0.0]]))
    assert score.singular.tolist() == [True]
    assert score.value == (-math.inf if criterion == "d" else math.inf)
    assert np.all(np.isinf(score.crb_std))
    assert score.unresolved and all(d.singular for d in score.unresolved)


# --------------------------------------------------------------------------------------------
# Aggregates over scenarios
# --------------------------------------------------------------------------------------------

# A hand-made per-scenario array: 1..10 in shuffled order.
TEN = np.array([7.0, 3.0, 10.0, 1.0, 5.0, 9.0, 2.0, 8.0, 4.0, 6.0])


def test_mean_and_worst():
    assert aggregate(TEN, "mean", maximise=True) == pytest.approx(5.5)
    assert aggregate(TEN, "mean", maximise=False) == pytest.approx(5.5)
    assert aggregate(TEN, "worst", maximise=True) == 1.0  # d: the smallest log det
    assert aggregate(TEN, "worst", maximise=False) == 10.0  # errors: the largest
    batched = aggregate(np.stack([TEN, 2 * TEN]), "worst", maximise=False)
    np.testing.assert_array_equal(batched, [10.0, 20.0])


@pytest.mark.parametrize("q", [0.5, 0.8, 0.9])
def test_quantile_reads_q_of_scenarios_do_at_least_this_well(q):
    # Contract: "quantile:q" aggregates the q-quantile of how badly a scenario does; read as
    # "a fraction q of the scenarios do at least this well", for every criterion.
    err = aggregate(TEN, f"quantile:{q}", maximise=False)
    assert err in TEN and np.mean(TEN <= err) >= q - 1e-12
    assert err == np.sort(TEN)[math.ceil(q * TEN.size - 1e-9) - 1]  # the smallest such value
    d = aggregate(TEN, f"quantile:{q}", maximise=True)
    assert d in TEN and np.mean(TEN >= d) >= q - 1e-12
    assert d == np.sort(TEN)[::-1][math.ceil(q * TEN.size - 1e-9) - 1]  # the largest such
    # One definition for both directions: d is scored by its badness −log det.
    assert d == -aggregate(-TEN, f"quantile:{q}", maximise=False)


@settings(max_examples=40, deadline=None)
@given(
    values=st.lists(st.floats(-50.0, 50.0), min_size=1, max_size=30),
    q=st.floats(0.01, 0.99),
)
def test_quantile_property(values, q):
    v = np.array(values)
    for maximise in (True, False):
        out = aggregate(v, f"quantile:{q}", maximise)
        better = v >= out if maximise else v <= out
        assert out in v and np.mean(better) >= q - 1e-12
        # ... and no better value of v has that property (the tightest such value).
        strictly = v[v > out] if maximise else v[v < out]
        for w in strictly:
            assert np.mean(v >= w if maximise else v <= w) < q + 1e-12
        assert aggregate(v, "worst", maximise) == (v.min() if maximise else v.max())


def test_aggregates_with_singular_scenarios():
    d = TEN.copy()
    d[3] = -np.inf  # one scenario the layout cannot resolve
    assert aggregate(d, "mean", maximise=True) == -np.inf
    assert aggregate(d, "worst", maximise=True) == -np.inf
    assert np.isfinite(aggregate(d, "quantile:0.8", maximise=True))
    e = TEN.copy()
    e[3] = np.inf
    assert aggregate(e, "mean", maximise=False) == np.inf
    assert aggregate(e, "worst", maximise=False) == np.inf
    assert np.isfinite(aggregate(e, "quantile:0.8", maximise=False))


@pytest.mark.parametrize(
    ("text", "message"),
    [
        ("median", "aggregate must be one of mean, worst, quantile:q"),
        ("quantile:1.5", "q must be a number between 0 and 1"),
        ("quantile:x", "q must be a number between 0 and 1"),
    ],
)
def test_bad_aggregates_are_rejected(text, message):
    with pytest.raises(ValueError, match=message):
        parse_aggregate(text)
    with pytest.raises(ValueError, match=message):
        aggregate(TEN, text, maximise=True)


def test_d_ratio_is_per_parameter_information_ratio():
    # D-ratio exp((a − b)/p): doubling J (every reading twice) adds p·ln 2 to log det.
    p = 4
    assert d_ratio(10.0 + p * math.log(2.0), 10.0, p) == pytest.approx(2.0)
    assert d_ratio(1.0, -math.inf, p) == math.inf


# --------------------------------------------------------------------------------------------
# Unresolved directions
# --------------------------------------------------------------------------------------------


def _far_cluster(distance_m: float) -> np.ndarray:
    return np.array(
        [
            [distance_m, 0.0, 0.0],
            [distance_m + 10.0, 0.0, 0.0],
            [distance_m, 10.0, 0.0],
            [distance_m + 10.0, 10.0, 0.0],
        ]
    )


def test_far_charge_over_ground_only_the_product_is_seen():
    # Far from the probes a charge q at height h and its image −q form a dipole 2qh: the
    # ground field is −2kqh/R³ (image method; e.g. any electrostatics text), so only q·h is
    # seen — charge and height are not separable.
    far = fisher_config("far.toml", 4, estimate=("charge", "z"), center=(0.0, 0.0, 2000.0))
    problem = build_problem(far)
    score = problem.score(_far_cluster(100_000.0))
    assert score.value == -math.inf
    [direction] = score.unresolved
    assert direction.singular
    assert "charge and height of s0" in direction.text
    assert "only their product is seen" in direction.text
    # The direction mixes both parameters equally (in correlation-scaled units).
    np.testing.assert_allclose(np.abs(direction.weights), [math.sqrt(0.5)] * 2, rtol=1e-3)


def test_moderately_far_charge_is_named_as_poorly_resolved():
    # At 5 km from a 2 km-high charge the 1/R³ law is not yet exact: resolvable, but the
    # errors of charge and height are strongly correlated.
    far = fisher_config("far.toml", 4, estimate=("charge", "z"), center=(0.0, 0.0, 2000.0))
    problem = build_problem(far)
    score = problem.score(_far_cluster(5000.0))
    assert np.isfinite(score.value)
    [direction] = score.unresolved
    assert not direction.singular
    assert 0.0 < direction.relative_eigenvalue < 1e-6
    assert "charge and height of s0" in direction.text
    assert "hard to tell apart: mainly their product is seen" in direction.text


def test_a_well_spread_layout_leaves_nothing_unresolved():
    problem = build_problem(fisher_config("spread.toml", layout_count=6))
    ang = np.arange(5) * 2 * np.pi / 5
    ring = np.stack([5000 * np.cos(ang), 5000 * np.sin(ang), 0 * ang], axis=1)
    score = problem.score(np.concatenate([[[0.0, 0.0, 0.0]], ring]))
    assert np.isfinite(score.value)
    assert score.unresolved == []


def test_a_parameter_no_reading_sees_is_named():
    j = spd(np.random.default_rng(4), 1)[0]
    j[4, :] = 0.0
    j[:, 4] = 0.0
    out = unresolved_directions(j, NAMES)
    assert len(out) == 1
    assert out[0].singular and out[0].relative_eigenvalue == 0.0
    assert out[0].text.startswith("bg.z_v_per_m is not seen by any reading")
    np.testing.assert_array_equal(out[0].weights, [0, 0, 0, 0, 1.0])


def test_many_parameters_with_a_tiny_determinant_are_not_singular():
    # Nine parameters whose scaled information has eigenvalues 1 … 1e-7: the determinant of the
    # scaled matrix (the Hadamard ratio) is ~1e-28, yet the condition number is 1e7 ≪ 1/eps,
    # so J⁻¹ exists and is accurate (numerical linear algebra: relative error ~ κ·eps;
    # Golub & Van Loan, Matrix Computations, §2.6). Only λ_min/λ_max decides singularity.
    rng = np.random.default_rng(4)
    q, _ = np.linalg.qr(rng.normal(size=(9, 9)))
    lam = np.logspace(0, -7, 9)
    core = q @ np.diag(lam) @ q.T
    d = 1.0 / np.sqrt(np.diag(core))
    corr = core * d[:, None] * d[None, :]  # unit diagonal, same conditioning order
    scales = np.logspace(-3, 4, 9)  # parameters in very different units
    fisher = corr * scales[:, None] * scales[None, :]
    assert not fisher_mod._is_singular(fisher[None])[0]
    assert np.isfinite(fisher_mod.log_det(fisher[None])[0])
    np.testing.assert_allclose(
        fisher_mod.crb_std(fisher[None])[0], np.sqrt(np.diag(np.linalg.inv(fisher))), rtol=1e-6
    )
    # A genuinely rank-deficient one still is singular.
    v = rng.normal(size=(9, 8))
    assert fisher_mod._is_singular((v @ v.T)[None])[0]


def test_compiled_log_det_matches_numpy_and_keeps_the_singularity_rule():
    # The compiled Cholesky path against numpy's LU (numpy.linalg.slogdet, a reference
    # library) on a batch mixing well-conditioned matrices in mixed units, rank-deficient ones
    # (−inf by the contract), a zero diagonal (a parameter nothing sees: −inf), an
    # ill-conditioned but regular one (finite: only λ_min/λ_max decides) and a matrix with a
    # tiny determinant that no Cholesky pivot proves regular (the eigenvalue fallback).
    rng = np.random.default_rng(11)
    good = spd(rng, 40)
    v = rng.normal(size=(3, 5, 4))
    deficient = v @ np.swapaxes(v, -1, -2)
    zero = spd(rng, 1)
    zero[0, 2, :] = zero[0, :, 2] = 0.0
    q, _ = np.linalg.qr(rng.normal(size=(5, 5)))
    ill = (q @ np.diag(np.logspace(0, -10, 5)) @ q.T)[None]
    batch = np.concatenate([good, deficient, zero, ill])
    out = log_det(batch)
    sign, ref = np.linalg.slogdet(good)
    assert np.all(sign > 0)
    np.testing.assert_allclose(out[:40], ref, rtol=1e-12, atol=1e-10)
    assert np.all(out[40:44] == -np.inf)
    assert np.isfinite(out[44])
    np.testing.assert_allclose(out[44], np.linalg.slogdet(ill[0])[1], rtol=1e-9)
    # 13 parameters, well conditioned (κ ~ 1e6) but correlated: proven regular from the
    # Cholesky factor's inverse, where no determinant proves anything at this size
    q, _ = np.linalg.qr(rng.normal(size=(30, 13, 13)))
    many = np.einsum("nij,nj,nkj->nik", q, np.logspace(0, -6, 13)[None].repeat(30, 0), q)
    many = 0.5 * (many + np.swapaxes(many, -1, -2))
    np.testing.assert_allclose(log_det(many), np.linalg.slogdet(many)[1], rtol=1e-10)
    proven = np.empty(30, dtype=bool)
    fisher_mod._log_det_loop(many, 0.0, 1e3 * 1e-12 * 13, np.empty(30), proven)
    assert proven.all()
    # parameters in wildly different units (J entries from 1e-300 to 1e300): no overflow
    wide = np.array([1e150, 1e-150, 1e100, 1.0, 1e-100])
    extreme = good[:3] / np.diagonal(good[:3], axis1=-2, axis2=-1)[:, :, None] ** 0.5
    extreme = extreme / np.diagonal(good[:3], axis1=-2, axis2=-1)[:, None, :] ** 0.5
    extreme = extreme * wide[:, None] * wide[None, :]
    np.testing.assert_allclose(log_det(extreme), np.linalg.slogdet(extreme)[1], rtol=1e-12)
    # the same values one matrix at a time, and in a (2, 2, p, p) batch shape
    np.testing.assert_array_equal([log_det(m) for m in batch], out)
    np.testing.assert_array_equal(log_det(good[:4].reshape(2, 2, 5, 5)), out[:4].reshape(2, 2))
    # NaN information stays NaN, as numpy's path gives it (never a finite number)
    bad = good[:1].copy()
    bad[0, 1, 1] = np.nan
    with np.errstate(invalid="ignore"):  # (numpy's LU warns of the NaN)
        assert not np.isfinite(log_det(bad)[0])
        upper = good[:1].copy()
        upper[0, 0, 3] = np.nan  # above the diagonal only: the Cholesky never reads it
        assert not np.isfinite(log_det(upper)[0])


def test_log_det_classifies_near_the_threshold_as_the_singularity_test_does():
    # The contract's rule (λ_min/λ_max of the scaled J below 1e-12: singular, −inf) must give
    # the same answer in log_det as in the bounds (_is_singular, covariance). Matrices built
    # with eigenvalue ratios straddling 1e-12, p = 2 … 6 and 13; and one a review found
    # straddling the determinant proof (Cholesky above it, LU below; its computed ratio is
    # within rounding of 1e-12, on one side or the other depending on the machine's LAPACK).
    j = np.array(
        [[0.00114439984444802, 0.0079702413187132], [0.0079702413187132, 0.05550922344752444]]
    )
    assert np.isneginf(log_det(j[None])[0]) == fisher_mod._is_singular(j[None])[0]
    rng = np.random.default_rng(12)
    # p = 2: a unit-diagonal [[1, ρ], [ρ, 1]] has eigenvalues 1 ± ρ, so a ratio near 1e-12 puts
    # its determinant right at the proof's threshold 1e-12 · 2²; then mixed units
    rho = 1.0 - 2e-12 * 10.0 ** rng.uniform(-1e-4, 1e-4, 20000)
    two = np.stack([np.ones_like(rho), rho, rho, np.ones_like(rho)], axis=-1).reshape(-1, 2, 2)
    scale = np.exp(rng.uniform(-20, 20, (20000, 2)))
    two = two * scale[:, :, None] * scale[:, None, :]
    np.testing.assert_array_equal(np.isneginf(log_det(two)), fisher_mod._is_singular(two))
    for p in (2, 3, 4, 5, 6, 13):
        q, _ = np.linalg.qr(rng.normal(size=(400, p, p)))
        lam = np.ones((400, p))
        lam[:, -1] = 10.0 ** rng.uniform(-12.3, -11.7, 400)
        lam[:, 1:-1] = 10.0 ** rng.uniform(-6, 0, (400, p - 2))
        mats = np.einsum("nij,nj,nkj->nik", q, lam, q)
        mats = mats * np.exp(rng.uniform(-10, 10, (400, p)))[:, :, None]
        mats = 0.5 * (mats + np.swapaxes(mats, -1, -2))
        mats = mats * np.exp(rng.uniform(-10, 10, (400, p)))[:, None, :]
        mats = 0.5 * (mats + np.swapaxes(mats, -1, -2))
        np.testing.assert_array_equal(np.isneginf(log_det(mats)), fisher_mod._is_singular(mats))


def test_layout_information_is_base_plus_each_layouts_outer_products():
    # J of a layout = J_installed + Σ over its meters' readings of r rᵀ with
    # r = (gain/σ) · (axis · ∂E/∂θ): Kay, Fundamentals of Statistical Signal Processing I,
    # §3.9, summed here with numpy's einsum. Three-axis meters on skew axes, a saturated
    # reading (weight 0) and 70 scenarios (past one block of 64 summed side by side).
    rng = np.random.default_rng(5)
    n_s, n_l, n_p, n_a, p = 70, 3, 4, 3, 5
    jac = rng.normal(size=(n_s, n_l * n_p, 3, p))
    axes = rng.normal(size=(n_l * n_p, n_a, 3))
    axes /= np.linalg.norm(axes, axis=-1, keepdims=True)
    axes[1, 2] = 0.0  # a narrower meter: an unused axis
    weights = rng.uniform(0.5, 2.0, (n_s, n_l * n_p, n_a))
    weights[3, 5, 1] = 0.0
    base = spd(rng, n_s)
    out = fisher_mod.layout_information(jac, axes, weights, base, n_l)
    rows = np.einsum("smip,mai->smap", jac, axes) * weights[..., None]
    rows = rows.reshape(n_s, n_l, n_p * n_a, p)
    ref = base[:, None] + np.einsum("slrp,slrq->slpq", rows, rows)
    assert out.shape == (n_l, n_s, p, p)
    np.testing.assert_allclose(
        out, np.moveaxis(ref, 1, 0), rtol=1e-12, atol=1e-12 * np.abs(ref).max()
    )
    np.testing.assert_array_equal(out, np.swapaxes(out, -1, -2))
    # layouts of no new probe (scoring installed meters only): the base information each
    empty = fisher_mod.layout_information(jac[:, :0], axes[:0], weights[:, :0], base, 4)
    np.testing.assert_allclose(empty, np.broadcast_to(base, (4, n_s, p, p)), rtol=1e-14)
