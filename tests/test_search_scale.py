"""The search at scale: pruned picks, the bounds they rest on, the thinned-grid (multilevel)
exchange and the working-set relaxation, each against an exhaustive reference on small grids.

Every site and number below is invented for the tests (a fictional site).
"""

from __future__ import annotations

import itertools

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st
from test_search import FAIR_WEATHER, all_subset_values, grid_problem

import probeplan.search.bound as bound
import probeplan.search.forms as forms_module
import probeplan.search.grid as grid
from probeplan.search import GridObjective, exchange, greedy, relaxation_bound
from probeplan.search.forms import Forms, addition_terms, pick, removal_terms


@pytest.fixture(params=["numpy", "compiled"])
def sweeps(request, monkeypatch):
    """Both ways of the sweeps: numpy's products (small grids) and the compiled loops (large
    ones, forced here by a threshold of 0)."""
    if request.param == "compiled":
        monkeypatch.setattr(forms_module, "COMPILED_MIN", 0)
    return request.param


def _forms(obj: GridObjective, chosen: np.ndarray) -> Forms:
    return Forms.of(obj.rows, chosen, obj.matrix(chosen), grid.candidate_chunks)


def _exact_added(obj: GridObjective, chosen: np.ndarray) -> np.ndarray:
    """Value of ``chosen`` plus each candidate from its matrix, one slogdet each: the
    exhaustive reference (no lemma, no update)."""
    vals = [obj.value(np.append(chosen, c)) for c in range(obj.rows.shape[1])]
    return np.array(vals)


@pytest.mark.parametrize("seed", [0, 3])
@pytest.mark.parametrize("component", ["z", "vector"])
def test_pruned_pick_is_the_exhaustive_argmax(seed, component, sweeps):
    # Reference: every candidate valued from its own matrix (slogdet of M + A_c), first index
    # on ties; the pick must choose the same candidate with the same value.
    probes = {"component": component} if component != "z" else None
    problem, cand, rows = grid_problem(seed, count=4, probes=probes)
    obj = GridObjective(problem, rows, prior=True)
    rng = np.random.default_rng(seed)
    chosen = rng.choice(cand.n_candidates, 3, replace=False)
    allowed = rng.random(cand.n_candidates) < 0.7
    allowed[chosen] = False
    exact = _exact_added(obj, chosen)
    want = int(np.flatnonzero(allowed)[np.argmax(exact[allowed])])
    c, value = pick(*addition_terms(_forms(obj, chosen)), allowed, "mean")
    assert c == want
    assert value == pytest.approx(exact[want], abs=1e-9)


@settings(max_examples=25, deadline=None)
@given(seed=st.integers(0, 10_000), i=st.integers(0, 3))
def test_removal_bounds_are_above_the_exact_terms(seed, i):
    # Concavity of log (the tangent inequality log(1 + q + t) ≤ log(1 + q) + t/(1 + q)) and the
    # float32 logs' margin: the bound of every candidate is at least its exact sum.
    problem, cand, rows = grid_problem(seed % 8, count=4)
    obj = GridObjective(problem, rows, prior=True)
    chosen = np.random.default_rng(seed).choice(cand.n_candidates, 4, replace=False)
    forms = _forms(obj, chosen)
    ld, upper, terms = removal_terms(
        forms, obj.rows, int(chosen[i]), obj.matrix(np.delete(chosen, i))
    )
    exact = terms(np.arange(cand.n_candidates)).sum(axis=0)
    assert np.all(upper >= exact - 1e-12 * np.abs(exact))
    # And the terms are those of the matrices themselves (Sherman–Morrison–Woodbury).
    rest = np.delete(chosen, i)
    for c in (0, cand.n_candidates // 2):
        direct = np.linalg.slogdet(obj.matrix(np.append(rest, c)))[1]
        np.testing.assert_allclose(ld + terms(np.array([c]))[:, 0], direct, atol=1e-8)


def test_swapped_forms_match_forms_swept_afresh(sweeps):
    problem, cand, rows = grid_problem(2, count=4)
    obj = GridObjective(problem, rows, prior=True)
    chosen = np.array([3, 17, 30, 44])
    new = chosen.copy()
    new[1] = 25
    forms = _forms(obj, chosen).swapped(
        obj.rows,
        new,
        obj.matrix(np.delete(chosen, 1)),
        obj.matrix(new),
        17,
        25,
        grid.candidate_chunks,
    )
    np.testing.assert_allclose(forms.q, _forms(obj, new).q, rtol=1e-9, atol=1e-12)


def _one_swap_optimal(obj, chosen, positions, min_spacing):
    """True when no single swap of a probe for a candidate the rules allow improves the value
    (checked exhaustively, every value from its own matrix)."""
    current = obj.value(chosen)
    for i, c in itertools.product(range(chosen.size), range(positions.shape[0])):
        if c in chosen:
            continue
        trial = chosen.copy()
        trial[i] = c
        d = np.linalg.norm(positions[trial][:, None] - positions[trial][None], axis=-1)
        if np.any(d[np.triu_indices(trial.size, 1)] < min_spacing * (1 - 1e-12)):
            continue
        if obj.value(trial) > current + 1e-10 * max(1.0, abs(current)):
            return False
    return True


@pytest.mark.parametrize("seed", [1, 4])
def test_multilevel_exchange_ends_one_swap_optimal_on_the_whole_grid(seed, monkeypatch, sweeps):
    # Thinned grids from 30 candidates on (the production threshold is 6,000): the greedy
    # runs on the coarsest, the exchange on every level; the end must still be a layout that
    # no single swap on the whole grid improves (exhaustive check).
    monkeypatch.setattr(grid, "MULTILEVEL_MIN", 30)
    monkeypatch.setattr(grid, "COARSE_MAX", 20)
    problem, cand, rows = grid_problem(seed, spacing_m=1000.0, count=4)
    pos = cand.positions_m
    levels = grid._levels(pos)
    assert len(levels) >= 2 and levels[-1].size == cand.n_candidates
    for coarse, fine in itertools.pairwise(levels):
        assert np.all(np.isin(coarse, fine))  # nested
    obj = GridObjective(problem, rows, prior=True)
    chosen = greedy(obj, 4, pos, 1500.0, problem.installed_m)
    assert np.all(np.isin(chosen, levels[0]))
    swapped = exchange(obj, chosen, pos, 1500.0, problem.installed_m)
    assert obj.value(swapped) >= obj.value(chosen)
    assert _one_swap_optimal(obj, swapped, pos, 1500.0)


def test_working_set_bound_is_above_every_subset_and_close_to_the_plain_one(monkeypatch, sweeps):
    # The working-set ascent (column generation) on a 49-candidate grid, forced by a small
    # threshold: its bound must still be above every subset (exhaustive enumeration) and
    # agree with the plain ascent's within their certified gaps.
    problem, cand, rows = grid_problem(0, background=FAIR_WEATHER)
    exact = GridObjective(problem, rows, prior=False)
    plain = relaxation_bound(exact.rows, problem.fisher_installed, 3)
    monkeypatch.setattr(bound, "WORKING_SET_MIN", 10)
    sets = relaxation_bound(exact.rows, problem.fisher_installed, 3)
    _, vals = all_subset_values(exact, 3, problem)
    assert sets.bound >= vals.max()
    assert abs(sets.bound - plain.bound) <= sets.gap + plain.gap + 1e-9
    assert sets.weights.sum() == pytest.approx(3.0)


def test_a_bound_read_against_a_plan_stops_at_a_gap_fitting_the_distance():
    # With the plan's value given, the gap need only be a fraction of the bound's distance
    # to it; the bound stays above every subset (exhaustive enumeration).
    problem, cand, rows = grid_problem(2, background=FAIR_WEATHER)
    exact = GridObjective(problem, rows, prior=False)
    _, vals = all_subset_values(exact, 3, problem)
    far = vals.max() - 5.0  # a plan well below the optimum: a loose reading is enough
    relax = relaxation_bound(exact.rows, problem.fisher_installed, 3, plan_value=far)
    assert relax.bound >= vals.max()
    assert (
        relax.gap
        <= max(
            problem.n_params * bound.BOUND_GAP_PER_PARAM,
            bound.BOUND_GAP_FRACTION * (relax.bound - far),
        )
        + 1e-12
    )


def test_compiled_loops_give_numpys_values(monkeypatch):
    # The same quantities by numpy's products and by the compiled loops (threshold 0), to
    # round-off: the tiny prior leaves some forms at 1e5–1e6, where sums in another order
    # differ in the eighth digit.
    problem, cand, rows = grid_problem(2, count=4)
    obj = GridObjective(problem, rows, prior=True)
    chosen = np.array([3, 11, 30, 44])
    w = np.random.default_rng(0).random(cand.n_candidates)

    def quantities():
        f = _forms(obj, chosen)
        up = removal_terms(f, obj.rows, 11, obj.matrix(np.delete(chosen, 1)))[1]
        new = chosen.copy()
        new[1] = 25
        sw = f.swapped(
            obj.rows,
            new,
            obj.matrix(np.delete(chosen, 1)),
            obj.matrix(new),
            11,
            25,
            grid.candidate_chunks,
        )
        val, grad = bound._relaxed(w, obj.rows, obj.matrix(chosen))
        return f.q, up, sw.q, val, grad

    plain = quantities()
    monkeypatch.setattr(forms_module, "COMPILED_MIN", 0)
    for a, b in zip(plain, quantities(), strict=True):
        np.testing.assert_allclose(a, b, rtol=1e-6, atol=1e-12)
