"""Properties of the acquisition functions, the success model and the search in sortie.acquisition.

Outside numbers come from the shared CHECKS.md (../shared/CHECKS.md beside the project) §3; each check names its source beside it. The
deep-tail reference for log EI is the asymptotic series of the Mills ratio, checked here against
the closed form where both are representable (no multi-precision library is needed).
"""

from __future__ import annotations

import dataclasses
import math

import numpy as np
import pytest
from scipy.special import log_ndtr, ndtr
from scipy.stats import norm, qmc
from sklearn.base import clone
from sklearn.exceptions import NotFittedError
from sklearn.gaussian_process import GaussianProcessRegressor
from sklearn.gaussian_process.kernels import Matern

from sortie.acquisition import (
    Proposal,
    SuccessModel,
    believer_values,
    expected_improvement,
    log_expected_improvement,
    log_probability_of_feasibility,
    maximize,
    probability_of_feasibility,
)

LOG_SQRT_2PI = 0.5 * math.log(2.0 * math.pi)


def log_h_series(z: np.ndarray, n_terms: int = 9) -> np.ndarray:
    """log(zΦ(z) + φ(z)) for z <= -30 from the Mills-ratio series.

    With x = -z: h = φ(x) Σ_{n>=0} (-1)^n (2n+1)!! / x^(2n+2); after 9 terms the first omitted
    term is below 1e-16 of the sum for x >= 30, so this is a double-precision reference.
    """
    x = -np.asarray(z, dtype=float)
    correction = np.zeros_like(x)
    double_factorial = 1.0
    for n in range(1, n_terms):
        double_factorial *= 2 * n + 1
        correction += (-1) ** n * double_factorial / x ** (2 * n)
    return -0.5 * x * x - LOG_SQRT_2PI - 2.0 * np.log(x) + np.log1p(correction)


# --------------------------------------------------------------------------- expected improvement


@pytest.mark.parametrize(
    ("mean", "std", "best", "expected"),
    [
        # Jones, Schonlau & Welch 1998, EI closed form; values recomputed in CHECKS.md §3.
        (0.0, 1.0, 0.0, 0.3989422804014327),
        (1.0, 1.0, 0.0, 0.08331547058768629),
        (-1.0, 1.0, 0.0, 1.0833154705876864),
        (0.0, 2.0, 1.0, 1.3955931148026122),
    ],
)
def test_ei_matches_the_recomputed_values(mean, std, best, expected):
    assert expected_improvement(mean, std, best) == pytest.approx(expected, rel=1e-14)
    assert log_expected_improvement(mean, std, best) == pytest.approx(math.log(expected), rel=1e-14)


def test_ei_is_never_negative_even_in_the_far_tail():
    mean = np.linspace(-50.0, 50.0, 2001)
    for std in (0.0, 1e-12, 1e-3, 1.0, 10.0):
        ei = expected_improvement(mean, std, 0.0)
        assert np.all(ei >= 0.0)
    assert expected_improvement(1e6, 1.0, 0.0) == 0.0  # underflows; the log form keeps it (below)


def test_ei_increases_with_std():
    # dEI/ds = φ(z) > 0. Near s = 0 the increase can be below one ulp of EI, so it is only
    # required not to decrease there.
    for mean in (-0.5, 0.0, 0.5, 3.0):
        assert np.all(np.diff(expected_improvement(mean, np.linspace(0.2, 5.0, 500), 0.0)) > 0)
    for mean in (-2.0, 0.0, 3.0):
        assert np.all(np.diff(expected_improvement(mean, np.linspace(0.0, 0.2, 500), 0.0)) >= 0)


def test_ei_obeys_put_call_parity_at_zero_best():
    # Derived, not quoted (CHECKS.md §3 lists it as a property): from the closed form of Jones, Schonlau &
    # Welch 1998, EI(μ, s) − EI(−μ, s) = −μ Φ(−μ/s) − μ Φ(μ/s) = −μ when f_min = 0, since φ is even.
    mean = np.linspace(-3.0, 3.0, 61)[:, None]
    std = np.array([0.1, 0.5, 1.0, 4.0])[None, :]
    parity = expected_improvement(mean, std, 0.0) - expected_improvement(-mean, std, 0.0)
    np.testing.assert_allclose(parity, np.broadcast_to(-mean, parity.shape), rtol=1e-12, atol=1e-14)


def test_ei_agrees_with_the_textbook_closed_form_down_to_z_minus_37():
    # Jones, Schonlau & Welch 1998 (CHECKS.md §3): (f_min − μ)Φ(z) + sφ(z), evaluated here with
    # scipy.stats.norm. That form cancels for z < −1 and loses ~z²·eps, hence rtol 1e-9.
    z = np.linspace(-37.0, 5.0, 4201)
    for std in (1e-4, 1.0, 30.0):
        mean = -z * std
        textbook = -mean * norm.cdf(z) + std * norm.pdf(z)
        np.testing.assert_allclose(expected_improvement(mean, std, 0.0), textbook, rtol=1e-9)


def test_ei_is_zero_where_std_is_zero_and_mean_is_not_below_best():
    ei = expected_improvement([0.0, 0.5, 2.0], 0.0, 0.0)
    assert np.array_equal(ei, [0.0, 0.0, 0.0])
    log_ei = log_expected_improvement([0.0, 0.5, 2.0], 0.0, 0.0)
    assert np.all(log_ei == -np.inf)


def test_ei_is_the_plain_gap_where_std_is_zero_and_mean_is_below_best():
    ei = expected_improvement([-1.0, -0.25], [0.0, 0.0], 0.0)
    np.testing.assert_array_equal(ei, [1.0, 0.25])
    np.testing.assert_allclose(log_expected_improvement([-1.0, -0.25], 0.0, 0.0), np.log([1.0, 0.25]))


def test_ei_margin_xi_acts_as_a_lower_best():
    mean, std = np.linspace(-1, 1, 11), 0.7
    np.testing.assert_allclose(expected_improvement(mean, std, 0.3, xi=0.1), expected_improvement(mean, std, 0.2))
    np.testing.assert_allclose(
        log_expected_improvement(mean, std, 0.3, xi=0.1), log_expected_improvement(mean, std, 0.2)
    )


def test_ei_broadcasts_mean_std_and_best():
    ei = expected_improvement(np.zeros((3, 1)), np.ones((1, 4)), np.array([0.0, 0.0, 1.0, 1.0]))
    assert ei.shape == (3, 4)


def test_ei_rejects_negative_std():
    with pytest.raises(ValueError, match="std must be >= 0"):
        expected_improvement(0.0, -1e-9, 0.0)
    with pytest.raises(ValueError, match="std must be >= 0"):
        log_expected_improvement(0.0, [1.0, -1.0], 0.0)


# --------------------------------------------------------------------------- log expected improvement


def test_log_ei_matches_log_of_ei_where_ei_is_representable():
    z = np.concatenate([np.linspace(-37.0, 5.0, 4201), [-1.0 - 1e-12, -1.0, -1.0 + 1e-12]])
    for std in (1e-4, 1.0, 30.0):
        mean = -z * std  # best = 0, so z = -mean/std
        ei = expected_improvement(mean, std, 0.0)
        assert np.all(ei > 0)
        np.testing.assert_allclose(log_expected_improvement(mean, std, 0.0), np.log(ei), rtol=1e-10)


def test_log_ei_is_finite_and_increasing_from_z_5_down_to_minus_1e6():
    z = np.concatenate([np.linspace(5.0, -1.0, 601), -np.geomspace(1.0 + 1e-3, 1e6, 4000)])
    log_ei = log_expected_improvement(-z, 1.0, 0.0)  # descending z
    assert np.all(np.isfinite(log_ei))
    assert np.all(np.diff(log_ei) < 0)


def test_log_ei_stays_finite_and_monotone_near_the_tail_cut_off():
    # A dense sweep through 1e6 <= -z <= 1e9, where the middle branch's bracket 1 − |z|√(π/2)erfcx
    # is about 1/z² and can round to zero just above −1/sqrt(eps).
    z = -np.sort(np.exp(np.random.default_rng(0).uniform(np.log(1e6), np.log(1e9), 200_000)))
    log_ei = log_expected_improvement(-z, 1.0, 0.0)
    assert np.all(np.isfinite(log_ei))
    assert np.all(np.diff(log_ei) < 0)
    np.testing.assert_allclose(log_ei, log_h_series(z), rtol=1e-14)


def test_log_ei_is_continuous_across_its_branch_points():
    # z = -1 splits the direct and erfcx branches; z = -1/sqrt(eps) splits erfcx and asymptote.
    for z0 in (-1.0, -1.0 / math.sqrt(np.finfo(float).eps)):
        z = np.array([z0 * (1 - 1e-12), z0, z0 * (1 + 1e-12)])
        log_ei = log_expected_improvement(-z, 1.0, 0.0)
        assert np.all(np.diff(log_ei) < 0)
        np.testing.assert_allclose(log_ei, log_ei[1], rtol=1e-10)


def test_tail_series_reference_agrees_with_closed_form_where_both_hold():
    # Validates the reference used below: Mills-ratio series vs log of the closed form.
    z = np.linspace(-37.0, -30.0, 71)
    np.testing.assert_allclose(log_h_series(z), np.log(expected_improvement(-z, 1.0, 0.0)), rtol=1e-13)


def test_log_ei_matches_high_precision_tail_reference_down_to_minus_1e9():
    z = -np.geomspace(30.0, 1e9, 400)
    np.testing.assert_allclose(log_expected_improvement(-z, 1.0, 0.0), log_h_series(z), rtol=1e-14)
    # With std != 1, log EI = log std + log h(z).
    np.testing.assert_allclose(
        log_expected_improvement(-z * 0.01, 0.01, 0.0), math.log(0.01) + log_h_series(z), rtol=1e-14
    )


def test_log_ei_follows_the_asymptote_for_z_below_minus_1e3():
    # Ament et al. 2023 (arXiv:2310.20708), gp.md §3: log h → −z²/2 − log(2π)/2 − 2 log|z|;
    # the next term of the series is −3/z², hence the absolute allowance.
    z = -np.geomspace(1e3, 1e9, 200)
    asymptote = -0.5 * z**2 - LOG_SQRT_2PI - 2.0 * np.log(-z)
    log_ei = log_expected_improvement(-z, 1.0, 0.0)
    assert np.all(np.abs(log_ei - asymptote) <= 4.0 / z**2 + 1e-15 * np.abs(asymptote))


def test_log_ei_is_minus_inf_only_where_std_is_zero_and_there_is_no_gap():
    mean = np.array([1e150, 1e6, 40.0, 0.0, 0.0, 5.0])
    std = np.array([1.0, 1.0, 1.0, 1e-300, 0.0, 0.0])
    log_ei = log_expected_improvement(mean, std, 0.0)
    assert np.all(np.isfinite(log_ei[:4]))
    assert np.all(log_ei[4:] == -np.inf)


# --------------------------------------------------------------------------- feasibility


def test_probability_of_feasibility_matches_the_recomputed_value():
    # CHECKS.md §3: ĝ = −0.5, s_g = 1 → Φ(0.5), recomputed [N]; the formula P = Φ(−ĝ/s_g) is Schonlau,
    # Welch & Jones 1998 from memory (only their abstract was seen).
    assert probability_of_feasibility(-0.5, 1.0) == pytest.approx(0.6914624612740131, rel=1e-14)
    assert log_probability_of_feasibility(-0.5, 1.0) == pytest.approx(math.log(0.6914624612740131), rel=1e-14)


def test_probability_of_feasibility_is_exactly_one_or_zero_where_std_is_zero():
    mean = np.array([-1.0, 0.0, 1e-12, 3.0])
    np.testing.assert_array_equal(probability_of_feasibility(mean, 0.0), [1.0, 1.0, 0.0, 0.0])
    np.testing.assert_array_equal(log_probability_of_feasibility(mean, 0.0), [0.0, 0.0, -np.inf, -np.inf])


def test_log_probability_of_feasibility_stays_finite_deep_in_the_infeasible_tail():
    mean = np.array([0.3, 5.0, 30.0, 1e3, 1e6])
    log_pf = log_probability_of_feasibility(mean, 1.0)
    assert np.all(np.isfinite(log_pf)) and np.all(np.diff(log_pf) < 0)
    np.testing.assert_allclose(log_pf[:3], np.log(ndtr(-mean[:3])), rtol=1e-12)
    assert probability_of_feasibility(1e3, 1.0) == 0.0


# --------------------------------------------------------------------------- success model


def _failure_band_data(n_points: int = 40, seed: int = 2):
    X = qmc.LatinHypercube(2, rng=seed).random(n_points)
    return X, X[:, 0] <= 0.7  # runs with x0 > 0.7 fail


@pytest.fixture(scope="module")
def band_model() -> SuccessModel:
    """Default SuccessModel fitted once on 40 runs that fail where x0 > 0.7."""
    return SuccessModel(random_state=0).fit(*_failure_band_data())


def test_success_model_with_no_failures_returns_one_everywhere_without_a_classifier():
    X = qmc.LatinHypercube(3, rng=0).random(12)
    model = SuccessModel().fit(X, np.ones(12, dtype=bool))
    assert model.gp_ is None
    grid = qmc.Sobol(3, rng=1).random_base2(6)
    np.testing.assert_array_equal(model.predict_proba(grid), 1.0)
    np.testing.assert_array_equal(model.log_predict_proba(grid), 0.0)


def test_success_model_with_no_successes_returns_a_small_constant_prior():
    X = qmc.LatinHypercube(2, rng=0).random(8)
    model = SuccessModel(floor=1e-3).fit(X, np.zeros(8, dtype=bool))
    p = model.predict_proba(np.random.default_rng(0).random((5, 2)))
    assert model.gp_ is None
    np.testing.assert_array_equal(p, 0.1)  # rule of succession 1/(n + 2), n = 8


def test_success_model_learns_a_failure_region(band_model):
    grid = qmc.Sobol(2, rng=3).random_base2(10)
    p = band_model.predict_proba(grid)
    inside, outside = p[grid[:, 0] > 0.7].mean(), p[grid[:, 0] <= 0.7].mean()
    assert inside < 0.3 < 0.7 < outside
    assert p.min() >= band_model.floor and p.max() <= 1.0


def test_success_model_respects_the_floor_and_its_log_agrees():
    model = SuccessModel(floor=0.05, n_restarts=0, random_state=0).fit(*_failure_band_data())
    grid = qmc.Sobol(2, rng=3).random_base2(10)
    p = model.predict_proba(grid)
    assert p.min() == 0.05 and p.max() <= 1.0  # deep in the failure region the floor binds
    # log_ndtr is the more accurate side where P is near 1, hence the tolerance.
    np.testing.assert_allclose(model.log_predict_proba(grid), np.log(p), rtol=1e-9, atol=1e-15)


def test_success_model_std_factor_sharpens_the_log_probability(band_model):
    # Weighted EI scales the objective's std; the success term must be sharpened alike (see
    # log_predict_proba), i.e. log Phi(ratio / factor), the floor still binding.
    X = np.array([[0.5, 0.5], [0.62, 0.5], [0.9, 0.5]])
    plain = band_model.log_predict_proba(X)
    sharp = band_model.log_predict_proba(X, std_factor=0.3)
    ratio = band_model._latent_ratio(X)
    np.testing.assert_allclose(sharp, np.maximum(log_ndtr(ratio / 0.3), math.log(band_model.floor)))
    assert np.all(sharp[ratio < 0] <= plain[ratio < 0]) and np.all(sharp[ratio > 0] >= plain[ratio > 0])
    with pytest.raises(ValueError, match="std_factor must be a positive number"):
        band_model.log_predict_proba(X, std_factor=0.0)


def test_success_model_follows_the_estimator_contract():
    model = SuccessModel(floor=-1.0, n_restarts=0, random_state=3)  # __init__ stores, does not check
    assert model.get_params() == {"floor": -1.0, "n_restarts": 0, "random_state": 3}
    X, ok = _failure_band_data(20)
    with pytest.raises(ValueError, match="floor"):
        model.fit(X, ok)
    fitted = clone(model).set_params(floor=1e-3)
    assert fitted.fit(X, ok) is fitted
    again = clone(fitted).fit(X, ok)
    np.testing.assert_array_equal(fitted.predict_proba(X), again.predict_proba(X))  # same seed, same fit


def test_success_model_refuses_bad_input():
    with pytest.raises(NotFittedError):
        SuccessModel().predict_proba(np.zeros((1, 2)))
    X, ok = _failure_band_data(20)
    model = SuccessModel(n_restarts=0, random_state=0).fit(X, ok)
    with pytest.raises(ValueError, match=r"shape \(n_points, 2\)"):
        model.predict_proba(np.zeros((3, 3)))
    with pytest.raises(ValueError, match="booleans"):
        SuccessModel().fit(X, np.full(20, 0.5))
    with pytest.raises(ValueError, match="to match X"):
        SuccessModel().fit(X, ok[:-1])


# --------------------------------------------------------------------------- maximize


CENTRE = np.array([0.31, 0.62, 0.83])


def log_bump(X: np.ndarray) -> np.ndarray:
    """Log of a Gaussian bump with its maximum (0) at CENTRE."""
    return -((X - CENTRE) ** 2).sum(axis=1) / (2 * 0.15**2)


def test_maximize_finds_the_peak_of_a_smooth_function():
    proposal = maximize(log_bump, 3, seed=0)
    assert proposal.source == "polished"
    assert np.linalg.norm(proposal.x - CENTRE) < 1e-3
    assert proposal.log_score == pytest.approx(log_bump(proposal.x[None])[0])
    assert proposal.log_score > -1e-6


def test_maximize_finds_a_peak_on_the_boundary():
    proposal = maximize(lambda X: -((X - [1.2, 0.4]) ** 2).sum(axis=1), 2, seed=1)
    np.testing.assert_allclose(proposal.x, [1.0, 0.4], atol=1e-3)


def test_maximize_in_a_box_stays_inside_it_and_finds_the_box_optimum():
    # The bump's peak (CENTRE) lies outside the box: the best point of the box is CENTRE clipped to it.
    lower, upper = np.array([0.5, 0.1, 0.1]), np.array([0.7, 0.3, 0.9])
    seen = []

    def recording(X):
        seen.append(X.copy())
        return log_bump(X)

    proposal = maximize(recording, 3, seed=2, lower=lower, upper=upper)
    assert all(np.all((rows >= lower) & (rows <= upper)) for rows in seen)
    np.testing.assert_allclose(proposal.x, np.clip(CENTRE, lower, upper), atol=1e-4)
    with pytest.raises(ValueError, match="0 <= lower < upper <= 1"):
        maximize(log_bump, 3, seed=0, lower=upper, upper=lower)


def test_maximize_is_deterministic_for_a_seed():
    a = maximize(log_bump, 3, seed=11)
    b = maximize(log_bump, 3, seed=11)
    np.testing.assert_array_equal(a.x, b.x)
    assert (a.log_score, a.n_evaluations, a.source) == (b.log_score, b.n_evaluations, b.source)


def test_maximize_polishing_never_loses_to_the_best_candidate():
    def wavy(X):
        return np.sin(9 * X[:, 0]) * np.cos(7 * X[:, 1]) - X[:, 0]

    raw = maximize(wavy, 2, seed=4, n_starts=0)
    polished = maximize(wavy, 2, seed=4)
    assert raw.source == "candidate"
    assert polished.log_score >= raw.log_score


def test_maximize_keeps_min_distance_from_an_excluded_optimum():
    proposal = maximize(log_bump, 3, seed=0, exclude=CENTRE[None, :], min_distance=0.05)
    assert np.linalg.norm(proposal.x - CENTRE) >= 0.05
    # Every polished run climbs back to the excluded peak, so a raw candidate is returned.
    assert proposal.source == "candidate"


def test_maximize_keeps_a_better_raw_candidate_over_a_worse_polished_point_elsewhere():
    # Two bumps: the higher one's peak is excluded, so every start near it polishes back into the
    # exclusion; starts near the lower bump reach that bump's peak, which is far enough but lower
    # than the raw candidates at the edge of the exclusion. The better raw candidate must win.
    high, low = np.array([0.3, 0.3]), np.array([0.8, 0.8])

    def two_bumps(X):
        return np.log(np.exp(-((X - high) ** 2).sum(axis=1) / 0.02) + 0.5 * np.exp(-((X - low) ** 2).sum(axis=1) / 0.02))

    proposal = maximize(two_bumps, 2, seed=0, exclude=high[None, :], min_distance=0.05, n_starts=256)
    assert np.linalg.norm(proposal.x - high) >= 0.05
    assert proposal.source == "candidate" and proposal.log_score > math.log(0.6)


def test_maximize_ignores_exclusions_far_from_the_optimum():
    proposal = maximize(log_bump, 3, seed=0, exclude=np.array([[0.9, 0.1, 0.1], [0.0, 0.0, 0.0]]), min_distance=0.05)
    assert proposal.source == "polished"
    assert np.linalg.norm(proposal.x - CENTRE) < 1e-3


def test_maximize_raises_one_sentence_when_nothing_is_far_enough():
    with pytest.raises(ValueError, match="min_distance") as err:
        maximize(log_bump, 3, seed=0, exclude=np.full((1, 3), 0.5), min_distance=2.0)
    message = str(err.value)
    assert message.endswith(".") and message.count(". ") == 0 and "\n" not in message


def test_maximize_draws_a_power_of_two_of_candidates_in_bounded_chunks():
    rows_per_call = []

    def recording(X):
        rows_per_call.append(X.shape[0])
        return -X.sum(axis=1)

    proposal = maximize(recording, 2, seed=0, n_candidates=20_000, n_starts=0)
    assert sum(rows_per_call) == proposal.n_evaluations == 2**15
    assert max(rows_per_call) == 10_000
    assert proposal.source == "candidate"


def test_maximize_survives_minus_inf_plateaus():
    def half_dead(X):
        with np.errstate(divide="ignore"):
            return np.where(X[:, 0] < 0.5, -np.inf, np.log(X[:, 0] * (1.0 - X[:, 1])))

    proposal = maximize(half_dead, 2, seed=5)
    assert np.isfinite(proposal.log_score)
    np.testing.assert_allclose(proposal.x, [1.0, 0.0], atol=1e-3)


def test_maximize_rejects_a_score_with_the_wrong_shape_or_nan():
    with pytest.raises(ValueError, match="must return shape"):
        maximize(lambda X: X, 2, seed=0)
    with pytest.raises(ValueError, match="NaN"):
        maximize(lambda X: np.full(X.shape[0], np.nan), 2, seed=0)


def test_proposal_is_frozen_and_its_point_read_only():
    proposal = Proposal(x=[0.1, 0.2], log_score=-1.0, n_evaluations=3, source="candidate")
    with pytest.raises(dataclasses.FrozenInstanceError):
        proposal.log_score = 0.0
    with pytest.raises(ValueError, match="read-only"):
        proposal.x[0] = 0.5


# --------------------------------------------------------------------------- Kriging believer


def test_believer_values_are_the_posterior_mean_at_pending_points():
    X_pending = np.array([[0.2, 0.3], [0.7, 0.1]])
    values = believer_values(lambda X: X.sum(axis=1) * 2.0, X_pending)
    np.testing.assert_allclose(values, [1.0, 1.6], rtol=1e-15)
    assert believer_values(lambda X: pytest.fail("not called"), np.empty((0, 2))).shape == (0,)
    with pytest.raises(ValueError, match="must return shape"):
        believer_values(lambda X: X, X_pending)


def test_believer_refit_keeps_the_mean_and_removes_ei_at_the_pending_point():
    # Ginsbourger, Le Riche & Carraro 2010 via CHECKS.md §4 and gp.md §2: refitting on the
    # believed value with fixed hyperparameters leaves μ in place and collapses σ there.
    X = np.array([[0.05], [0.3], [0.55], [0.95]])
    y = np.sin(6.0 * X[:, 0])
    gp = GaussianProcessRegressor(Matern(0.3, nu=2.5), alpha=1e-10, optimizer=None).fit(X, y)
    x_pending = np.array([[0.75]])
    y_pending = believer_values(gp.predict, x_pending)
    believer = GaussianProcessRegressor(gp.kernel_, alpha=1e-10, optimizer=None).fit(
        np.vstack([X, x_pending]), np.r_[y, y_pending]
    )
    grid = np.linspace(0, 1, 101)[:, None]
    np.testing.assert_allclose(believer.predict(grid), gp.predict(grid), atol=1e-6)
    _, std_before = gp.predict(x_pending, return_std=True)
    mean_after, std_after = believer.predict(x_pending, return_std=True)
    assert std_after[0] < 1e-3 * std_before[0]
    # What is left of EI there is the believed gain (best − μ)⁺; the exploration term is gone.
    best = y.min()
    ei_before = expected_improvement(y_pending, std_before, best)[0]
    ei_after = expected_improvement(mean_after, std_after, best)[0]
    assert ei_after == pytest.approx(max(best - y_pending[0], 0.0), abs=1e-3 * ei_before)
    assert ei_after < ei_before
