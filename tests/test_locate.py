"""Fitting the charge from recorded readings, checked against an independent model.

The site, storm and meters below are invented for the tests (a fictional site). The readings
are generated here, NOT by the package's kernels: a point charge over a grounded plane by the
method of images (Jackson, Classical Electrodynamics, §2.1),

    E(r) = k q [ (r − r_q)/|r − r_q|³ − (r − r_q*)/|r − r_q*|³ ],   r_q* = r_q mirrored in z = 0,

with k = 1/(4π ε₀) from scipy.constants, plus a uniform background field, and Gaussian noise of
each meter's grade.

References for the checks:

* Kay, Fundamentals of Statistical Signal Processing, vol. 1, ch. 7 (from memory): at high SNR
  the least-squares (= maximum-likelihood, Gaussian noise) estimate is efficient, unbiased and
  Gaussian with covariance J⁻¹, so each estimate lies within its reported 1-sigma with
  probability erf(1/√2) ≈ 0.683, and N mean((θ̂ − θ)²/σ²) is χ²_N.
* The residual sum of squares of a least-squares fit of n readings with p parameters, whitened
  by the true noise, is χ²_{n−p} (Kay vol. 1 §8.5, linear model; nonlinear at high SNR).
  Quantiles from scipy.stats, a general-purpose reference library.
* Jacobson & Krider 1976 (J. Atmos. Sci., point-charge fits of lightning charge centres over
  the Kennedy Space Center field-mill network — from memory): cloud charge centres of some
  −10 to −40 C at 6–9.5 km altitude; ground fields under a storm of several kV/m (common
  practice).
"""

from __future__ import annotations

import numpy as np
import pytest
import scipy.constants as sc
from scipy import stats
from sites import box, make_config, point_source, rectangle

from probeplan.errors import InputError
from probeplan.locate import Location, check_delivery, locate
from probeplan.problem import build_problem
from probeplan.readings import Readings, Truth, read_readings

K = 1.0 / (4.0 * np.pi * sc.epsilon_0)

# A storm-watch site (fictional): eleven new ground meters and an installed 3-axis meter on a
# mast, one storm charge and the fair-weather background as nuisance parameters.
SITE = {
    "seed": 4,
    "probes": {"count": 11, "noise_v_per_m": 20.0, "relative_noise": 0.01},
    "region": [rectangle(15000.0)],
    "source": [
        point_source(
            -20.0,
            (0.0, 0.0, 7000.0),
            charge_range_c=[-40.0, -10.0],
            center_range_m=box(6000.0, 5000.0, 9500.0),
        )
    ],
    "background": {"field_v_per_m": [0.0, 0.0, -120.0], "estimate": True},
}
MAST_TABLE = {"name": "mast", "position_m": [1500.0, -2000.0, 30.0], "component": "vector"}

# Eleven ground meters: an outer ring of 10 km, an inner ring of 4 km and one at the centre.
_A = np.linspace(0.0, 2.0 * np.pi, 6, endpoint=False)
_B = np.linspace(0.0, 2.0 * np.pi, 4, endpoint=False) + 0.4
GROUND = np.r_[
    np.c_[10000 * np.cos(_A), 10000 * np.sin(_A), np.zeros(6)],
    np.c_[4000 * np.cos(_B), 4000 * np.sin(_B), np.zeros(4)],
    [[0.0, 0.0, 0.0]],
]
MAST = np.array([[1500.0, -2000.0, 30.0]])
NAMES = ("mast", *(f"new-{k}" for k in range(11)))
BACKGROUND = np.array([0.0, 0.0, -120.0])


def site(range_v_per_m=1e5):
    probes = {"range_v_per_m": range_v_per_m, "installed": [MAST_TABLE]}
    problem = build_problem(make_config("<locate test>", SITE, probes=probes))
    return problem, problem.meters(GROUND)


def image_field(q_c, center_m, points_m):
    """E of point charges q over the grounded plane z = 0, by images: (n_times, n_points, 3)."""
    r = points_m[None] - center_m[:, None]
    ri = points_m[None] - center_m[:, None] * np.array([1.0, 1.0, -1.0])
    cube = np.linalg.norm(r, axis=-1, keepdims=True) ** 3
    cube_i = np.linalg.norm(ri, axis=-1, keepdims=True) ** 3
    return K * q_c[:, None, None] * (r / cube - ri / cube_i) + BACKGROUND


def storm(n_times, dt_s=10.0):
    """A charge drifting and growing through the published range: (time, q, centre)."""
    t = np.arange(n_times) * dt_s
    q = -25.0 - 10.0 * np.sin(t / 3000.0)
    c = np.c_[-3000.0 + 0.5 * t, 1000.0 * np.cos(t / 2000.0), 7500.0 + 1000.0 * np.sin(t / 1500.0)]
    return t, q, c


def record(meters, q, c, rng, *, noise_scale=1.0):
    """Readings (n_times, 12, 3) of the mast (3 axes) and the ground meters (E_z), noisy."""
    e = image_field(q, c, np.r_[MAST, GROUND])
    clean = np.zeros((q.size, 12, 3))
    clean[:, 0] = e[:, 0]
    clean[:, 1:, 0] = e[:, 1:, 2]
    sigma = np.hypot(20.0, 0.01 * clean)
    noisy = clean + noise_scale * sigma * rng.standard_normal(clean.shape)
    return np.where(meters.used, noisy, 0.0)


def readings_of(t, values, meters):
    present = np.broadcast_to(meters.used, values.shape).copy()
    return Readings("<test>", t, False, values, present, NAMES, ())


def truth_of(q, c):
    # Parameter order of the result: s0.charge_c, s0.x_m, s0.y_m, s0.z_m, bg.x, bg.y, bg.z.
    return np.c_[q, c, np.tile(BACKGROUND, (q.size, 1))]


@pytest.fixture(scope="module")
def fitted():
    problem, meters = site()
    assert problem.names == (
        "s0.charge_c",
        "s0.x_m",
        "s0.y_m",
        "s0.z_m",
        "bg.x_v_per_m",
        "bg.y_v_per_m",
        "bg.z_v_per_m",
    )
    t, q, c = storm(240)
    values = record(meters, q, c, np.random.default_rng(21))
    loc = locate(problem, meters, readings_of(t, values, meters))
    return problem, meters, loc, truth_of(q, c)


def test_estimates_lie_within_their_sigmas_at_the_expected_rate(fitted):
    # Kay vol. 1 ch. 7: at high SNR the fit is efficient; coverage of ±1 sigma is 68.3 %.
    _, _, loc, truth = fitted
    assert loc.converged.all()
    assert np.all(np.isfinite(loc.std)) and np.all(loc.std > 0)
    assert np.all(loc.std[:, 0] / np.abs(truth[:, 0]) < 0.05)  # high SNR indeed
    z = (loc.estimate - truth) / loc.std
    n = z.shape[0]
    inside = np.abs(z) < 1.0
    # Pooled over 7 parameters (correlated within a step, so judged per step: the binomial
    # standard error of a per-parameter rate from n steps is sqrt(0.683 * 0.317 / n)).
    assert abs(inside.mean() - 0.683) < 4.0 * np.sqrt(0.683 * 0.317 / n)
    # Per parameter: n mean(z^2) is chi-square with n degrees of freedom.
    lo, hi = stats.chi2.ppf([5e-4, 1 - 5e-4], n)
    ss = (z**2).sum(axis=0)
    assert np.all((ss > lo) & (ss < hi)), ss / n


def test_chi_square_of_the_fits_has_its_degrees_of_freedom(fitted):
    # 3 + 11 readings, 7 parameters: dof 7 each step; the sum over steps is chi-square with
    # the summed degrees of freedom (Kay vol. 1 §8.5).
    _, _, loc, _ = fitted
    # (A good reading beyond 4 sigma, p ~ 6e-5 each, may be flagged now and then.)
    assert np.mean(loc.dof == 14 - 7) > 0.99
    total = loc.dof.sum()
    lo, hi = stats.chi2.ppf([5e-4, 1 - 5e-4], total)
    assert lo < loc.chi2.sum() < hi, loc.chi2.mean()
    assert not loc.outliers.any() or loc.outliers.mean() < 0.01
    assert not loc.suspect.any()


def test_plausible_against_published_charge_centres(fitted):
    # Jacobson & Krider 1976 (from memory): -10 to -40 C at 6-9.5 km. The storm of the test lies
    # in that range; its fitted charge and height must too, and the ground field under it is
    # several kV/m (common practice).
    _, _, loc, truth = fitted
    q, z = loc.estimate[:, 0], loc.estimate[:, 3]
    assert np.all((q > -40.0) & (q < -10.0))
    assert np.all((z > 6000.0) & (z < 9500.0))
    e0 = image_field(truth[:, 0], truth[:, 1:4], GROUND[-1:])[:, 0, 2]
    assert np.all((np.abs(e0) > 1e3) & (np.abs(e0) < 2e4))


def test_network_delivers_its_bound_and_an_overstated_grade_does_not(fitted):
    problem, meters, loc, truth = fitted
    good = check_delivery(problem, meters, loc, _truth(loc.time_s, truth))
    assert good.names == loc.names and np.all(good.steps == loc.n_times)
    assert good.all_deliver, good.ratio
    assert np.all(np.abs(good.ratio - 1.0) < 0.25)
    # The same storm recorded with twice the noise the grade promises: errors twice the bound.
    t, q, c = storm(120)
    values = record(meters, q, c, np.random.default_rng(5), noise_scale=2.0)
    truth2 = _truth(t, truth_of(q, c))
    bad = locate(problem, meters, readings_of(t, values, meters), truth=truth2).delivery
    assert bad is not None and not bad.all_deliver
    assert np.all(bad.ratio > 1.5)


def _truth(t, values):
    names = ("s0.charge_c", "s0.x_m", "s0.y_m", "s0.z_m", "bg.x_v_per_m", "bg.y_v_per_m")
    return Truth("<truth>", t, False, (*names, "bg.z_v_per_m"), values, values == values)


def test_a_stuck_meter_is_flagged_named_and_left_out():
    problem, meters = site()
    t, q, c = storm(80, dt_s=150.0)
    values = record(meters, q, c, np.random.default_rng(8))
    stuck = NAMES.index("new-7")  # an inner-ring meter stops updating after its first reading
    values[:, stuck, 0] = values[0, stuck, 0]
    loc = locate(problem, meters, readings_of(t, values, meters))
    assert [n for n, s in zip(loc.meter_names, loc.suspect, strict=True) if s] == ["new-7"]
    assert loc.flag_counts[stuck] > 0.5 * loc.n_times
    # Where the stuck reading is far off the true field (independent model) it is flagged;
    # where it happens to be right it is not.
    true = image_field(q, c, GROUND)[:, stuck - 1, 2]
    off = np.abs(values[:, stuck, 0] - true) / np.hypot(20.0, 0.01 * true)
    assert loc.outliers[off > 8.0, stuck].all()
    assert not loc.outliers[off < 2.0, stuck].any()
    # The stuck reading leaves the fit where flagged (now and then a second one with it).
    assert np.mean(loc.dof[loc.outliers[:, stuck]] == 14 - 1 - 7) > 0.85
    # Left out where flagged, the other meters keep the fit honest.
    z = (loc.estimate - truth_of(q, c)) / loc.std
    assert 0.55 < (np.abs(z) < 1).mean() < 0.8
    assert loc.flag_counts.sum() - loc.flag_counts[stuck] <= 0.05 * loc.n_times


def test_cold_starts_from_the_prior_find_the_same_fits(fitted):
    problem, meters, warm, truth = fitted
    t, q, c = storm(240)
    values = record(meters, q, c, np.random.default_rng(21))
    sub = slice(0, 240, 40)
    cold = locate(problem, meters, readings_of(t[sub], values[sub], meters), warm=False, starts=3)
    assert cold.converged.all()
    assert np.all(np.abs(cold.estimate - warm.estimate[sub]) < 0.05 * warm.std[sub])


def test_missing_saturated_and_too_few_readings():
    problem, meters = site(range_v_per_m=11700.0)
    t, q, c = storm(6)
    q[:] = -30.0
    # |E_z| = 2 k |q| h / (h^2 + r^2)^1.5 + 120 V/m (images): 12.9 kV/m at the centre meter
    # (saturated), 10.5 kV/m at the mast, 7.9 kV/m on the inner ring.
    c[:] = [0.0, 0.0, 6500.0]
    values = np.clip(record(meters, q, c, np.random.default_rng(2)), -11700.0, 11700.0)
    r = readings_of(t, values, meters)
    present = r.present.copy()
    present[1, 3, 0] = False  # one reading missing
    present[2, 1:, 0] = False  # only the mast: 3 readings for 7 unknowns
    present[3, 1:, 0] = False  # the mast and four ground meters: 7 readings, 7 unknowns
    present[3, [6, 7, 8, 9], 0] = True  # new-5 (outer ring), new-6 … new-8 (inner ring)
    loc = locate(problem, meters, Readings("<t>", t, False, values, present, NAMES, ()))
    centre = NAMES.index("new-10")
    # Saturated wherever the centre meter reported (not in steps 2 and 3).
    np.testing.assert_array_equal(loc.saturated[:, centre], [1, 1, 0, 0, 1, 1])
    assert loc.saturated.sum() == loc.n_times - 2
    assert loc.dof[0] == 14 - 1 - 7 and loc.dof[1] == 14 - 2 - 7
    assert not loc.converged[2] and loc.dof[2] == 0 and np.all(np.isinf(loc.std[2]))
    assert loc.converged[[0, 1, 3, 4, 5]].all()
    # No redundancy: the fit passes (nearly) through every reading and is still resolved.
    assert loc.dof[3] == 0 and loc.chi2[3] < 1.0 and np.all(np.isfinite(loc.std[3]))
    for name in ("estimate", "std", "chi2"):
        assert not np.isnan(getattr(loc, name)).any()


def test_same_seed_same_result_and_progress_is_reported(tmp_path):
    problem, meters = site()
    t, q, c = storm(30)
    values = record(meters, q, c, np.random.default_rng(3))
    # Through a CSV file, as a user gives it.
    header = ["time_s", "mast.x", "mast.y", "mast.z", *NAMES[1:]]
    rows = np.c_[t, values[:, 0], values[:, 1:, 0]]
    path = tmp_path / "readings.csv"
    np.savetxt(path, rows, delimiter=",", header=",".join(header), comments="", fmt="%.17g")
    table = read_readings(path, NAMES, meters.axes)
    np.testing.assert_array_equal(table.values_v_per_m, values)
    calls = []
    a = locate(problem, meters, table, progress=lambda done, total: calls.append((done, total)))
    b = locate(problem, meters, table)
    for name in ("estimate", "std", "chi2", "dof", "converged", "outliers"):
        np.testing.assert_array_equal(getattr(a, name), getattr(b, name))
    assert isinstance(a, Location) and a.estimate.shape == (30, 7) and a.outliers.shape == (30, 12)
    assert calls == [(k, 30) for k in range(1, 31)]


def test_chains_in_parallel_give_the_same_result(monkeypatch):
    from concurrent.futures import ThreadPoolExecutor

    import probeplan.locate as locate_module

    monkeypatch.setattr(locate_module, "CHUNK_STEPS", 10)  # 3 chains of 10 steps
    problem, meters = site()
    t, q, c = storm(30)
    table = readings_of(t, record(meters, q, c, np.random.default_rng(6)), meters)
    here = locate(problem, meters, table)
    calls = []
    with ThreadPoolExecutor(2) as pool:
        threads = locate(problem, meters, table, executor=pool, progress=lambda *a: calls.append(a))
    processes = locate(problem, meters, table, workers=2)
    for other in (threads, processes):
        for name in ("estimate", "std", "chi2", "dof", "converged", "outliers"):
            np.testing.assert_array_equal(getattr(here, name), getattr(other, name))
    assert sorted(calls) == [(10, 30), (20, 30), (30, 30)]


def test_truth_must_meet_the_readings_in_time(fitted):
    problem, meters, loc, truth = fitted
    shifted = _truth(loc.time_s + 0.5, truth)
    with pytest.raises(InputError, match=r"<truth>: no time of the truth matches"):
        check_delivery(problem, meters, loc, shifted)
    iso = Truth("<truth>", loc.time_s, True, shifted.names, truth, truth == truth)
    with pytest.raises(InputError, match=r"use the same time column in both"):
        check_delivery(problem, meters, loc, iso)


@pytest.mark.parametrize(
    ("kwargs", "match"),
    [
        ({"starts": 0}, r"`starts` must be a whole number >= 1"),
        ({"threshold": -1.0}, r"`threshold` must be a finite number of sigmas > 0"),
        ({"alpha": 1.0}, r"`alpha` must lie strictly between 0 and 1"),
        ({"suspect_fraction": 2.0}, r"`suspect_fraction` must lie in \[0, 1\]"),
        ({"workers": 0}, r"`workers` must be a whole number >= 1"),
    ],
)
def test_bad_settings(kwargs, match):
    problem, meters = site()
    t, q, c = storm(2)
    r = readings_of(t, record(meters, q, c, np.random.default_rng(0)), meters)
    with pytest.raises(ValueError, match=match):
        locate(problem, meters, r, **kwargs)
