"""Properties of the initial-design samplers in sortie.sampling.

Outside numbers come from the shared CHECKS.md (../shared/CHECKS.md beside the project); each check names its source beside it.
"""

from __future__ import annotations

import itertools
import math
import warnings

import numpy as np
import pytest
from scipy.stats import qmc

from sortie.sampling import (
    SamplingWarning,
    central_composite,
    coded_to_unit,
    design_resolution,
    fractional_factorial,
    full_factorial,
    latin_hypercube,
    n_quadratic_terms,
    one_at_a_time,
    rotatable_alpha,
    sobol,
)

# Computed columns, not a published table (CHECKS.md §1 [N]): k, fraction, n_F = 2^k (2^(k−1) for the
# half fraction), n_A = 2k, α rotatable = n_F^(1/4) to 4 d.p., N = n_F + n_A without centre points,
# p = (k+1)(k+2)/2. Only the α formula is confirmed in a source: Penn State STAT 503 §11.2.1.
CCD_TABLE = [
    (2, None, 4, 4, 1.4142, 8, 6),
    (3, None, 8, 6, 1.6818, 14, 10),
    (4, None, 16, 8, 2.0000, 24, 15),
    (5, None, 32, 10, 2.3784, 42, 21),
    (5, "half", 16, 10, 2.0000, 26, 21),
    (6, None, 64, 12, 2.8284, 76, 28),
    (6, "half", 32, 12, 2.3784, 44, 28),
]
CCD_IDS = [f"k{k}-{frac or 'full'}" for k, frac, *_ in CCD_TABLE]


def _split_ccd(design: np.ndarray, n_factorial: int, n_dims: int):
    """Return (factorial, axial, centre) blocks of a CCD in the order the module stacks them."""
    n_axial = 2 * n_dims
    return (
        design[:n_factorial],
        design[n_factorial : n_factorial + n_axial],
        design[n_factorial + n_axial :],
    )


# --------------------------------------------------------------------------- central composite


@pytest.mark.parametrize(
    ("k", "fraction", "n_f", "n_a", "alpha", "n_no_centre", "p"), CCD_TABLE, ids=CCD_IDS
)
def test_ccd_run_counts_and_alpha_match_the_computed_table(
    k, fraction, n_f, n_a, alpha, n_no_centre, p
):
    design = central_composite(k, fraction=fraction, center_points=0)
    # CHECKS.md §1, computed [N]: N = n_F + 2k.
    assert design.shape == (n_no_centre, k)
    assert n_f + n_a == n_no_centre
    # α = n_F^(1/4): Penn State STAT 503 §11.2.1 (CHECKS.md §1); the values are [N] to 4 d.p.
    assert rotatable_alpha(n_f) == pytest.approx(alpha, abs=5e-5)
    assert np.max(np.abs(design)) == pytest.approx(alpha, abs=5e-5)
    # CHECKS.md §1 last column: p = (k+1)(k+2)/2 quadratic terms, and a CCD has enough runs.
    assert n_quadratic_terms(k) == p
    assert n_no_centre + 1 >= p


@pytest.mark.parametrize(
    ("k", "n_factorial", "n_centre", "total"),
    # Penn State STAT 503 §11.2.1 example table (CHECKS.md §1): 4/8/16/32 cube, 4/6/8/10 star,
    # 5/5/6/6 centre points → 13, 19, 30, 48 runs.
    [(2, 4, 5, 13), (3, 8, 5, 19), (4, 16, 6, 30), (5, 32, 6, 48)],
)
def test_ccd_with_centre_points_matches_psu_example_totals(k, n_factorial, n_centre, total):
    design = central_composite(k, center_points=n_centre)
    assert design.shape == (total, k)
    _, _, centre = _split_ccd(design, n_factorial, k)
    assert centre.shape == (n_centre, k)
    assert np.all(centre == 0.0)


@pytest.mark.parametrize(("k", "fraction", "n_f"), [row[:3] for row in CCD_TABLE], ids=CCD_IDS)
def test_every_axial_point_lies_at_distance_alpha(k, fraction, n_f):
    design = central_composite(k, fraction=fraction, center_points=2)
    alpha = rotatable_alpha(n_f)
    cube, axial, _ = _split_ccd(design, n_f, k)
    np.testing.assert_allclose(np.linalg.norm(axial, axis=1), alpha)
    # Each axial point moves along exactly one axis.
    assert np.all(np.count_nonzero(axial, axis=1) == 1)
    # Factorial points are the ±1 cube corners.
    assert np.all(np.abs(cube) == 1.0)


def _fourth_moments(points: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Pure Σx_i⁴ per column and mixed Σx_i²x_j² per column pair."""
    pure = np.sum(points**4, axis=0)
    mixed = np.array(
        [
            np.sum(points[:, i] ** 2 * points[:, j] ** 2)
            for i, j in itertools.combinations(range(points.shape[1]), 2)
        ]
    )
    return pure, mixed


@pytest.mark.parametrize("variant", ["circumscribed", "inscribed"])
@pytest.mark.parametrize(("k", "fraction"), [(k, frac) for k, frac, *_ in CCD_TABLE], ids=CCD_IDS)
def test_rotatable_alpha_satisfies_fourth_moment_condition(k, fraction, variant):
    # Rotatable iff Σx_i⁴ = 3Σx_i²x_j² over the non-centre points, i.e. n_F + 2α⁴ = 3n_F (CHECKS.md §1;
    # attributed to Box & Hunter 1957, Ann. Math. Stat. 28:195–241, from memory).
    design = central_composite(k, variant=variant, fraction=fraction, center_points=3)
    non_centre = design[np.any(design != 0.0, axis=1)]
    pure, mixed = _fourth_moments(non_centre)
    np.testing.assert_allclose(pure, 3.0 * mixed[0], rtol=1e-12)
    np.testing.assert_allclose(mixed, mixed[0], rtol=1e-12)
    # Odd moments up to order three and the cross products vanish (first-order orthogonality).
    np.testing.assert_allclose(non_centre.sum(axis=0), 0.0, atol=1e-12)
    np.testing.assert_allclose((non_centre**3).sum(axis=0), 0.0, atol=1e-12)
    gram = non_centre.T @ non_centre
    np.testing.assert_allclose(gram - np.diag(np.diag(gram)), 0.0, atol=1e-12)


@pytest.mark.parametrize("k", [2, 3, 4, 5, 6])
def test_face_centred_ccd_has_three_levels_per_factor(k):
    # CHECKS.md §1: α = 1 gives the face-centred CCD (3 levels per factor).
    design = central_composite(k, variant="face")
    for column in design.T:
        assert set(np.unique(column)) == {-1.0, 0.0, 1.0}


def test_inscribed_ccd_is_circumscribed_scaled_into_the_unit_cube():
    k = 3
    circ = central_composite(k)
    insc = central_composite(k, variant="inscribed")
    alpha = rotatable_alpha(8)
    np.testing.assert_allclose(insc, circ / alpha)
    assert np.max(np.abs(insc)) == pytest.approx(1.0)
    cube = insc[:8]
    np.testing.assert_allclose(np.abs(cube), 1.0 / alpha)


def test_coded_to_unit_puts_outermost_points_on_the_bounds():
    design = central_composite(3)
    unit = coded_to_unit(design)
    assert unit.shape == design.shape
    assert unit.min() == pytest.approx(0.0)
    assert unit.max() == pytest.approx(1.0)
    # Axial points touch the faces; the centre maps to the middle of the cube.
    np.testing.assert_allclose(unit[-1], 0.5)
    alpha = rotatable_alpha(8)
    np.testing.assert_allclose(np.abs(unit[:8] - 0.5), 1.0 / (2.0 * alpha))
    # Circumscribed and inscribed designs map to the same unit points (one scale per design).
    np.testing.assert_allclose(coded_to_unit(central_composite(3, variant="inscribed")), unit)


def test_coded_to_unit_maps_a_centre_only_design_to_the_middle():
    np.testing.assert_array_equal(coded_to_unit(np.zeros((2, 3))), 0.5)


# --------------------------------------------------------------------------- factorial designs


def test_half_fraction_k5_is_sixteen_runs_of_resolution_five():
    # CHECKS.md §1 table: 2^{5-1} half fraction (res V) has n_F = 16.
    design = fractional_factorial(5)
    assert design.shape == (16, 5)
    assert design_resolution(design) == 5
    assert len({tuple(row) for row in design}) == 16


def test_half_fraction_k5_keeps_main_effects_and_two_factor_interactions_unaliased():
    # Resolution V (Montgomery, Design and Analysis of Experiments, fractional factorial chapter;
    # from memory, edition and section not checked): no main effect or 2FI is
    # aliased with another main effect or 2FI, so their columns are mutually orthogonal.
    design = fractional_factorial(5)
    mains = [design[:, i] for i in range(5)]
    two_fi = [design[:, i] * design[:, j] for i, j in itertools.combinations(range(5), 2)]
    model = np.column_stack(mains + two_fi)
    assert model.shape == (16, 15)
    np.testing.assert_array_equal(model.T @ model, 16.0 * np.eye(15))
    # Every effect column is also balanced (orthogonal to the intercept).
    np.testing.assert_array_equal(model.sum(axis=0), 0.0)


@pytest.mark.parametrize("k", [3, 4, 5, 6, 7])
def test_half_fraction_has_defining_relation_of_all_factors(k):
    design = fractional_factorial(k)
    assert design.shape == (2 ** (k - 1), k)
    np.testing.assert_array_equal(np.prod(design, axis=1), 1.0)  # I = AB...K
    assert design_resolution(design) == k


def test_full_two_level_factorial_has_no_defining_word():
    cube = central_composite(4, center_points=0)[:16]
    assert design_resolution(cube) == math.inf


@pytest.mark.parametrize(
    ("levels", "n_runs"), [([2], 2), ([3], 3), ([2, 2], 4), ([2, 3, 4], 24), ([5, 1, 2], 10)]
)
def test_full_factorial_has_every_combination_once(levels, n_runs):
    design = full_factorial(levels)
    assert design.shape == (n_runs, len(levels))
    assert len({tuple(row) for row in design}) == n_runs
    for column, n_levels in zip(design.T, levels, strict=True):
        expected = [0.5] if n_levels == 1 else np.linspace(0.0, 1.0, n_levels)
        np.testing.assert_allclose(np.unique(column), expected)
        # Balanced: every level appears equally often.
        _, counts = np.unique(column, return_counts=True)
        assert np.all(counts == n_runs // n_levels)


def test_full_factorial_is_in_standard_order():
    # Standard (Yates) order: the first factor alternates fastest (common practice; Montgomery, Design and
    # Analysis of Experiments, from memory, edition and table not checked).
    np.testing.assert_array_equal(
        full_factorial([2, 2]), [[0.0, 0.0], [1.0, 0.0], [0.0, 1.0], [1.0, 1.0]]
    )


# --------------------------------------------------------------------------- space filling


@pytest.mark.parametrize("optimization", [None, "random-cd"])
@pytest.mark.parametrize(("n", "d"), [(1, 1), (7, 3), (50, 6)])
def test_lhs_has_one_point_per_stratum(n, d, optimization):
    # CHECKS.md §8 (definition as in scipy's qmc.LatinHypercube docs; McKay, Beckman & Conover 1979 cited
    # from memory): floor(n·x[:,j]) is a permutation of 0..n−1.
    x = latin_hypercube(n, d, seed=3, optimization=optimization)
    assert x.shape == (n, d)
    assert x.dtype == np.float64
    for column in x.T:
        np.testing.assert_array_equal(np.sort(np.floor(n * column)), np.arange(n))


def test_lhs_points_lie_at_random_places_inside_their_strata_not_at_the_centres():
    # Each point is drawn uniformly inside its stratum (scipy's qmc.LatinHypercube docs, scramble=True;
    # McKay, Beckman & Conover 1979, from memory); the offsets
    # n·x − floor(n·x) of 200 points should then look uniform on [0, 1), not all sit at 0.5.
    offsets = np.modf(200 * latin_hypercube(200, 2, seed=8))[0].ravel()
    assert offsets.std() > 0.2 and abs(offsets.mean() - 0.5) < 0.1


def test_lhs_with_random_cd_has_lower_discrepancy_than_uniform_random_points():
    n, d = 20, 3
    for seed in range(5):
        optimized = latin_hypercube(n, d, seed=seed, optimization="random-cd")
        uniform = np.random.default_rng(seed).random((n, d))
        assert qmc.discrepancy(optimized, method="CD") < qmc.discrepancy(uniform, method="CD")


def test_discrepancy_of_scipy_documented_example():
    # scipy.stats.qmc.discrepancy docs example, CD = 0.008142039609053464 (CHECKS.md §8, [S]).
    space = np.array([[1, 3], [2, 6], [3, 2], [4, 5], [5, 1], [6, 4]], dtype=float)
    unit = qmc.scale(space, [0.5, 0.5], [6.5, 6.5], reverse=True)
    assert qmc.discrepancy(unit) == pytest.approx(0.008142039609053464, rel=1e-12)
    # The documented points are themselves a Latin hypercube on 6 strata.
    for column in unit.T:
        np.testing.assert_array_equal(np.sort(np.floor(6 * column)), np.arange(6))


@pytest.mark.parametrize(("n", "d"), [(1, 2), (8, 2), (32, 5)])
def test_sobol_points_equal_scipy_engine_for_same_seed(n, d):
    # Reference library: scipy.stats.qmc.Sobol (scrambled, random_base2).
    expected = qmc.Sobol(d, scramble=True, rng=11).random_base2(int(math.log2(n)))
    np.testing.assert_array_equal(sobol(n, d, seed=11), expected)


def test_unscrambled_sobol_first_eight_points_in_two_dims():
    # CHECKS.md §8 [N]: unscrambled Sobol' (Joe–Kuo) first 8 points in 2-D; checked against the
    # scipy engine directly, since sortie always scrambles.
    expected = [
        [0.0, 0.0],
        [0.5, 0.5],
        [0.75, 0.25],
        [0.25, 0.75],
        [0.375, 0.375],
        [0.875, 0.875],
        [0.625, 0.125],
        [0.125, 0.625],
    ]
    points = qmc.Sobol(2, scramble=False).random_base2(3)
    np.testing.assert_array_equal(points, expected)


def test_sobol_warns_when_n_is_not_a_power_of_two():
    with pytest.warns(SamplingWarning, match=r"n_points=10 is not a power of two.* 8 and 16"):
        points = sobol(10, 3, seed=5)
    assert points.shape == (10, 3)
    # The truncated points are the head of the next power-of-two design.
    np.testing.assert_array_equal(points, sobol(16, 3, seed=5)[:10])


def test_sobol_does_not_warn_for_a_power_of_two():
    with warnings.catch_warnings():
        warnings.simplefilter("error")
        sobol(64, 4, seed=0)


def test_sobol_points_stratify_dyadic_intervals():
    # Balance of a (t, m, s)-net: each of the 2^m equal intervals in every coordinate holds one
    # of the first 2^m points (Sobol' 1967, from memory; holds after LMS + digital-shift scrambling).
    n = 32
    x = sobol(n, 4, seed=9)
    for column in x.T:
        np.testing.assert_array_equal(np.sort(np.floor(n * column)), np.arange(n))


@pytest.mark.parametrize("sampler", [latin_hypercube, sobol])
def test_samplers_are_deterministic_for_a_seed(sampler):
    a = sampler(16, 3, seed=2024)
    b = sampler(16, 3, seed=2024)
    c = sampler(16, 3, seed=2025)
    np.testing.assert_array_equal(a, b)
    assert not np.array_equal(a, c)
    assert np.all((a >= 0.0) & (a < 1.0))


def test_lhs_optimizations_are_deterministic_for_a_seed():
    for optimization in ("random-cd", "lloyd"):
        a = latin_hypercube(12, 2, seed=1, optimization=optimization)
        b = latin_hypercube(12, 2, seed=1, optimization=optimization)
        np.testing.assert_array_equal(a, b)


# --------------------------------------------------------------------------- one at a time


@pytest.mark.parametrize(
    ("baseline", "levels", "n_duplicates"),
    [
        ([0.5, 0.5, 0.5], 3, 3),  # 0.5 is on the 3-level grid in every dimension
        ([0.5, 0.5, 0.5], 4, 0),  # grid 0, 1/3, 2/3, 1 misses 0.5
        ([0.0, 0.3, 1.0], 5, 2),  # 0 and 1 are grid ends; 0.3 is not on the grid
        ([0.2], 2, 0),
    ],
)
def test_one_at_a_time_count_and_single_coordinate_moves(baseline, levels, n_duplicates):
    base = np.array(baseline)
    design = one_at_a_time(base, levels)
    assert design.shape == (1 + len(baseline) * levels - n_duplicates, len(baseline))
    np.testing.assert_array_equal(design[0], base)
    moved = design[1:] != base
    assert np.all(moved.sum(axis=1) == 1)
    assert len({tuple(row) for row in design}) == design.shape[0]
    # Each sweep covers the grid in its dimension.
    grid = np.linspace(0.0, 1.0, levels)
    for i in range(len(baseline)):
        values = np.concatenate([[base[i]], design[1:][moved[:, i], i]])
        assert set(grid) <= set(values)


# --------------------------------------------------------------------------- argument errors


@pytest.mark.parametrize(
    ("call", "message"),
    [
        (lambda: latin_hypercube(0, 2, seed=0), "n_points must be a positive integer, got 0"),
        (lambda: latin_hypercube(4, 0, seed=0), "n_dims must be a positive integer, got 0"),
        (lambda: latin_hypercube(4.0, 2, seed=0), "n_points must be a positive integer, got 4.0"),
        (lambda: latin_hypercube(4, 2, seed=-1), "seed must be a non-negative integer"),
        (lambda: latin_hypercube(4, 2, seed=0, optimization="cd"), "optimization must be one of"),
        (lambda: sobol(True, 2, seed=0), "n_points must be a positive integer, got True"),
        (lambda: sobol(8, 21202, seed=0), "n_dims must be at most 21201"),
        (lambda: full_factorial([]), "levels must be a non-empty sequence"),
        (lambda: full_factorial([2, 0]), r"levels\[1\] must be a positive integer, got 0"),
        (lambda: full_factorial(3), "levels must be a non-empty sequence"),
        (lambda: fractional_factorial(2), "n_dims must be an integer >= 3, got 2"),
        (lambda: central_composite(1), "n_dims must be an integer >= 2, got 1"),
        (lambda: central_composite(3, variant="cube"), "variant must be one of"),
        (lambda: central_composite(3, center_points=-1), "center_points must be an integer >= 0"),
        (lambda: central_composite(3, fraction="quarter"), "fraction must be one of"),
        (lambda: central_composite(4, fraction="half"), "n_dims must be at least 5"),
        (lambda: rotatable_alpha(0), "n_factorial must be a positive integer, got 0"),
        (lambda: coded_to_unit(np.zeros(3)), "coded must be a non-empty 2-D array"),
        (lambda: coded_to_unit([[np.nan]]), "coded must contain only finite values"),
        (lambda: design_resolution([[1.0, 0.0]]), "coded must be a non-empty 2-D array"),
        (lambda: one_at_a_time(np.array([0.5, 1.5]), 3), "baseline_unit must lie in"),
        (lambda: one_at_a_time(np.zeros((2, 2)), 3), "baseline_unit must be a non-empty 1-D"),
        (lambda: one_at_a_time(np.array([0.5]), 1), "levels must be an integer >= 2, got 1"),
        (lambda: n_quadratic_terms(0), "n_dims must be a positive integer, got 0"),
    ],
)
def test_bad_arguments_raise_one_sentence_value_errors(call, message):
    with pytest.raises(ValueError, match=message) as info:
        call()
    text = str(info.value)
    assert "\n" not in text
    assert text.count(". ") == 0
