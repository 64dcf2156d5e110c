"""Properties of the screening methods in sortie.screening.

Outside numbers come from the shared CHECKS.md (../shared/CHECKS.md beside the project); each check names its source beside it.
"""

from __future__ import annotations

import itertools

import numpy as np
import pytest

from sortie.sampling import one_at_a_time
from sortie.screening import (
    combine_importance,
    morris_delta,
    morris_effects,
    morris_trajectories,
    select_parameters,
    select_trajectories,
    sweep_effects,
    trajectory_spread,
)

# --------------------------------------------------------------------------- Morris design


@pytest.mark.parametrize(("levels", "delta"), [(4, 2 / 3), (6, 0.6), (8, 4 / 7)])
def test_morris_delta_is_p_over_2_p_minus_1(levels, delta):
    # Morris 1991, Technometrics 33(2): Δ = p/[2(p − 1)], so Δ = 2/3 for p = 4 (CHECKS.md §5, from memory).
    assert morris_delta(levels) == pytest.approx(delta, abs=1e-15)


@pytest.mark.parametrize("levels", [3, 1, 0])
def test_morris_delta_rejects_odd_or_too_few_levels(levels):
    with pytest.raises(ValueError, match="levels"):
        morris_delta(levels)


@pytest.mark.parametrize(("k", "r", "levels"), [(1, 3, 4), (5, 6, 4), (7, 4, 6), (3, 5, 2)])
def test_morris_design_moves_each_coordinate_once_by_delta_on_the_grid(k, r, levels):
    X = morris_trajectories(k, r, levels=levels, seed=3)
    # Cost r(k + 1) runs: CHECKS.md §5 (the JRC screening description; Morris 1991, from memory).
    assert X.shape == (r * (k + 1), k)
    grid = np.arange(levels) / (levels - 1)
    assert np.all(np.min(np.abs(X[:, :, None] - grid), axis=2) < 1e-12)
    steps = np.diff(X.reshape(r, k + 1, k), axis=1)
    moved = np.abs(steps) > 1e-12
    assert np.all(moved.sum(axis=2) == 1)  # one coordinate per step
    assert np.all(moved.sum(axis=1) == 1)  # each coordinate once per trajectory
    np.testing.assert_allclose(np.abs(steps[moved]), morris_delta(levels), atol=1e-12)


def test_morris_design_is_deterministic_for_a_seed():
    a = morris_trajectories(4, 5, seed=11)
    np.testing.assert_array_equal(a, morris_trajectories(4, 5, seed=11))
    assert not np.array_equal(a, morris_trajectories(4, 5, seed=12))


def test_morris_design_rejects_a_pool_smaller_than_r():
    with pytest.raises(ValueError, match="pool must be at least n_trajectories"):
        morris_trajectories(3, 5, pool=4, seed=0)


# --------------------------------------------------------------------------- trajectory spread


def _pool(k: int, count: int, seed: int) -> np.ndarray:
    """``count`` plain random trajectories (no selection), shape (count, k + 1, k)."""
    return morris_trajectories(k, count, pool=count, seed=seed).reshape(count, k + 1, k)


def test_spread_selection_beats_random_choice_from_the_same_pool():
    # Campolongo, Cariboni & Saltelli 2007 (citation from memory): choosing r of M trajectories for spread (CHECKS.md §5).
    k, r, m = 6, 8, 60
    pool = _pool(k, m, seed=5)
    chosen = select_trajectories(pool, r)
    best = trajectory_spread(pool[chosen])
    rng = np.random.default_rng(0)
    random_spreads = [trajectory_spread(pool[rng.choice(m, r, replace=False)]) for _ in range(50)]
    assert best > max(random_spreads)
    # The designs a user gets: selected from a pool versus Morris's plain random draw.
    selected = [trajectory_spread(morris_trajectories(k, r, pool=10 * r, seed=s)) for s in range(5)]
    plain = [trajectory_spread(morris_trajectories(k, r, pool=r, seed=s)) for s in range(5)]
    assert min(selected) > max(plain)


def test_exact_selection_matches_brute_force_on_a_small_pool():
    pool = _pool(4, 12, seed=2)
    r = 4
    brute = max(itertools.combinations(range(12), r), key=lambda c: trajectory_spread(pool[list(c)]))
    assert select_trajectories(pool, r).tolist() == list(brute)


def test_greedy_selection_is_a_local_optimum_for_single_swaps():
    # C(40, 8) > 20 000 subsets, so the greedy-plus-exchange search runs.
    pool = _pool(3, 40, seed=4)
    chosen = select_trajectories(pool, 8)
    best = trajectory_spread(pool[chosen])
    others = np.setdiff1d(np.arange(40), chosen)
    for out, into in itertools.product(chosen, others):
        swapped = np.where(chosen == out, into, chosen)
        assert trajectory_spread(pool[swapped]) <= best * (1 + 1e-12)


def test_spread_of_one_trajectory_is_zero():
    assert trajectory_spread(morris_trajectories(3, 1, seed=0)) == 0.0


# --------------------------------------------------------------------------- Morris effects


def test_morris_on_a_linear_model_gives_mu_c_mu_star_abs_c_sigma_zero():
    # Linear model y = Σ cᵢ xᵢ: μᵢ = cᵢ, μ*ᵢ = |cᵢ|, σᵢ = 0 exactly, c = (1, −2, 0.5) (CHECKS.md §5;
    # Morris 1991 and Campolongo et al. 2007 definitions of μ, μ*, σ).
    c = np.array([1.0, -2.0, 0.5])
    X = morris_trajectories(3, 10, seed=0)
    res = morris_effects(X, X @ c, names=["a", "b", "c"])
    np.testing.assert_allclose(res.mu[:, 0], c, rtol=0, atol=1e-12)
    np.testing.assert_allclose(res.mu_star[:, 0], np.abs(c), rtol=0, atol=1e-12)
    np.testing.assert_allclose(res.sigma[:, 0], 0.0, rtol=0, atol=1e-12)
    assert res.n_effects.tolist() == [[10], [10], [10]]
    assert res.names == ("a", "b", "c")


def test_morris_effects_are_per_output_column_and_scaled_to_the_unit_step():
    X = morris_trajectories(4, 6, levels=6, seed=1)
    c1, c2 = np.array([3.0, 0.0, -1.0, 2.0]), np.array([0.0, 5.0, 0.0, 0.0])
    res = morris_effects(X, np.column_stack([X @ c1, X @ c2]), output_names=["drag", "margin"])
    np.testing.assert_allclose(res.mu, np.column_stack([c1, c2]), atol=1e-12)
    assert res.output_names == ("drag", "margin")
    assert res.effects.shape == (6, 4, 2)


def test_morris_sees_curvature_and_interaction_in_sigma():
    X = morris_trajectories(3, 12, seed=2)
    y = X[:, 0] ** 2 + X[:, 1] * X[:, 2]
    res = morris_effects(X, y)
    assert np.all(res.sigma[:, 0] > 0.05)


def test_morris_drops_only_the_effects_of_a_failed_run_and_counts_them():
    k, r = 3, 5
    c = np.array([2.0, -1.0, 4.0])
    X = morris_trajectories(k, r, seed=6)
    y = np.column_stack([X @ c, X @ c])
    y[1 * (k + 1) + 2, 0] = np.nan  # middle of trajectory 1: two effects lost, output 0 only
    y[3 * (k + 1), 0] = np.inf  # first row of trajectory 3: one effect lost
    res = morris_effects(X, y)
    assert res.n_effects[:, 1].tolist() == [r] * k
    assert res.n_effects[:, 0].sum() == r * k - 3
    assert res.n_dropped[:, 0].sum() == 3
    np.testing.assert_allclose(res.mu[:, 0], c, atol=1e-12)  # the remaining effects are still exact
    assert np.isnan(res.effects[:, :, 0]).sum() == 3


def test_morris_with_every_run_failed_gives_nan_not_an_error():
    X = morris_trajectories(2, 3, seed=0)
    res = morris_effects(X, np.full(X.shape[0], np.nan))
    assert np.all(np.isnan(res.mu_star)) and np.all(res.n_effects == 0)


def test_morris_rejects_a_design_that_is_not_made_of_trajectories():
    X = morris_trajectories(3, 2, seed=0)
    with pytest.raises(ValueError, match="multiple of 4 rows"):
        morris_effects(X[:-1], np.zeros(X.shape[0] - 1))
    bad = X.copy()
    bad[1] = bad[0] + [2 / 3, 2 / 3, 0.0]
    with pytest.raises(ValueError, match="differ in 2 coordinates"):
        morris_effects(bad, np.zeros(X.shape[0]))
    with pytest.raises(ValueError, match=r"y must have shape \(8, n_outputs\)"):
        morris_effects(X, np.zeros(7))


# --------------------------------------------------------------------------- one-at-a-time sweeps


def test_sweep_effects_give_the_slope_of_a_linear_output_and_its_range():
    base = np.array([0.3, 0.5, 0.8])
    X = one_at_a_time(base, levels=5)
    c = np.array([2.0, -3.0, 0.0])
    y = np.column_stack([X @ c, (X[:, 1] - 0.5) ** 2])
    eff = sweep_effects(X, y, names=["tail_angle", "flare", "fin_gap"])
    np.testing.assert_allclose(eff.slope[:, 0], c, atol=1e-12)
    np.testing.assert_allclose(eff.span[:, 0], np.abs(c), atol=1e-12)  # sweeps run from 0 to 1
    assert eff.span[1, 1] == pytest.approx(0.25)  # (u - 0.5)^2 over [0, 1]
    assert eff.slope[1, 1] == pytest.approx(0.0, abs=1e-12)  # symmetric sweep: no linear trend
    np.testing.assert_array_equal(eff.baseline, base)
    # 5 levels plus the baseline, except where the baseline is a level (0.5 for "flare").
    assert eff.n_points[:, 0].tolist() == [6, 5, 6]
    u, ys = eff.sweeps[0]
    assert np.all(np.diff(u) > 0) and ys.shape == (6, 2)


def test_sweep_effects_leave_out_failed_runs():
    X = one_at_a_time(np.array([0.5, 0.5]), levels=3)
    y = X @ np.array([1.0, 1.0])
    y[1] = np.nan  # first point of the first sweep
    eff = sweep_effects(X, y)
    assert eff.n_points[:, 0].tolist() == [2, 3]
    assert eff.slope[0, 0] == pytest.approx(1.0)


def test_sweep_effects_reject_rows_that_move_two_coordinates():
    X = np.array([[0.5, 0.5], [0.0, 0.5], [1.0, 1.0]])
    with pytest.raises(ValueError, match="row 2 differs from the baseline"):
        sweep_effects(X, np.zeros(3))


# --------------------------------------------------------------------------- selection

NAMES = ["tail_angle", "flare", "fin_gap", "skid_height", "nose_radius"]
# mu_star per parameter (rows) for two outputs: drag (objective) and a base-pressure margin.
MU_STAR = np.array(
    [
        [8.0, 0.1],
        [4.0, 0.2],
        [0.2, 0.05],
        [0.1, 0.9],  # irrelevant to drag, drives the constraint
        [0.4, 0.0],
    ]
)


def test_combine_importance_normalises_each_output_by_its_max_then_takes_the_max():
    score, driver = combine_importance(MU_STAR)
    np.testing.assert_allclose(score, [1.0, 0.5, 0.05 / 0.9, 1.0, 0.05])
    assert driver.tolist() == [0, 0, 1, 1, 0]


def test_select_top_k_keeps_a_constraint_driver_the_objective_ignores():
    sel = select_parameters(MU_STAR, NAMES, top=3, output_names=["drag", "margin"])
    assert sel.selected == ("tail_angle", "flare", "skid_height")
    assert sel.fixed == ("fin_gap", "nose_radius")
    assert sel.rule == "top 3"
    assert list(sel.reasons) == NAMES
    assert sel.reasons["skid_height"].startswith("selected: score 1 (rank 2 of 5; μ* 0.9 on margin")
    assert sel.reasons["nose_radius"].startswith("fixed: score 0.05 (rank 5 of 5; μ* 0.4 on drag, whose largest is 8)")
    assert sel.reasons["nose_radius"].endswith("rule top 3 keeps ranks 1-3")


def test_select_fraction_keeps_scores_above_the_threshold():
    sel = select_parameters(MU_STAR, NAMES, fraction=0.1)
    assert sel.selected == ("tail_angle", "flare", "skid_height")
    assert "below fraction 0.1 of the largest" in sel.reasons["fin_gap"]
    assert select_parameters(MU_STAR, NAMES, fraction=0.04).selected == tuple(NAMES)


def test_select_named_list_overrides_the_numbers():
    sel = select_parameters(MU_STAR, NAMES, keep=["fin_gap", "tail_angle"])
    assert sel.selected == ("tail_angle", "fin_gap")
    assert sel.reasons["fin_gap"].endswith("named in the list")
    assert sel.reasons["flare"].startswith("fixed: score 0.5") and sel.reasons["flare"].endswith(
        "not in the named list"
    )
    without = select_parameters(None, NAMES, keep=["flare"])
    assert without.selected == ("flare",) and without.scores is None
    assert without.reasons["flare"] == "selected: no screening numbers; named in the list"


def test_select_unknown_name_raises_a_value_error_listing_the_allowed_names():
    with pytest.raises(
        ValueError, match=r"unknown parameters \['fin_angle'\]; allowed names are \['tail_angle', 'flare'"
    ):
        select_parameters(MU_STAR, NAMES, keep=["tail_angle", "fin_angle"])


@pytest.mark.parametrize(
    ("kwargs", "message"),
    [
        ({}, "exactly one selection rule"),
        ({"top": 2, "fraction": 0.5}, "exactly one selection rule"),
        ({"top": 0}, "top must be an integer >= 1"),
        ({"top": 6}, "top must be at most the number of parameters"),
        ({"fraction": 0.0}, r"fraction must be in \(0, 1\]"),
        ({"fraction": 1.5}, r"fraction must be in \(0, 1\]"),
    ],
)
def test_select_rejects_bad_rules(kwargs, message):
    with pytest.raises(ValueError, match=message):
        select_parameters(MU_STAR, NAMES, **kwargs)


def test_select_keeps_a_parameter_whose_effects_all_failed():
    mu = MU_STAR.copy()
    mu[4] = np.nan
    sel = select_parameters(mu, NAMES, top=2)
    assert sel.selected == ("tail_angle", "skid_height", "nose_radius")
    assert sel.reasons["nose_radius"].startswith("selected: no usable effect")


def test_select_from_morris_ranks_the_dominant_parameters_first():
    # End to end: screening a model whose first two of six inputs dominate.
    X = morris_trajectories(6, 10, seed=0)
    y = 5 * X[:, 0] + 3 * X[:, 1] ** 2 + 0.05 * X[:, 2:].sum(axis=1)
    res = morris_effects(X, y, names=[f"p{i}" for i in range(6)])
    assert select_parameters(res.mu_star, res.names, fraction=0.2).selected == ("p0", "p1")
