"""Surrogate models: closed-form leave-one-out against brute-force refits, and the properties
infill relies on (interpolation, std behaviour, Kriging believer, model choice)."""

from __future__ import annotations

import math

import numpy as np
import pytest
from scipy.stats import qmc
from sklearn.base import clone
from sklearn.exceptions import NotFittedError
from sklearn.gaussian_process import GaussianProcessRegressor

from sortie.models import (
    GaussianProcessSurrogate,
    ModelScore,
    QuadraticSurface,
    RadialBasisSurrogate,
    choose_surrogate,
    make_surrogate,
)
from sortie.models.gp import _neg_log_posterior

SEED = 20240611


def _lhs(n: int, d: int, seed: int = SEED) -> np.ndarray:
    return qmc.LatinHypercube(d, rng=seed).random(n)


def _smooth(X: np.ndarray) -> np.ndarray:
    """A smooth, non-polynomial test response."""
    return np.sin(5.0 * X[:, 0]) + X[:, 1] ** 2 + 0.5 * np.cos(3.0 * X[:, 0] * X[:, 1])


def _branin_unit(U: np.ndarray) -> np.ndarray:
    """Branin on [-5, 10] x [0, 15] mapped from the unit square (formula: CHECKS.md section 2)."""
    x1, x2 = -5.0 + 15.0 * U[:, 0], 15.0 * U[:, 1]
    return (x2 - 5.1 * x1**2 / (4 * np.pi**2) + 5 * x1 / np.pi - 6) ** 2 + 10 * (1 - 1 / (8 * np.pi)) * np.cos(x1) + 10


def _quadratic_in_coded_units(X: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """An exact quadratic in z = 2x - 1 (d = 3) and its coefficients in QuadraticSurface's term order."""
    coef = np.array([1.5, -2.0, 0.7, 3.1, 0.4, -1.2, 2.2, 0.9, -0.6, 1.8])  # 1, z0..z2, z0²..z2², z0z1, z0z2, z1z2
    z = 2.0 * X - 1.0
    y = (
        coef[0] + z @ coef[1:4] + (z**2) @ coef[4:7]
        + coef[7] * z[:, 0] * z[:, 1] + coef[8] * z[:, 0] * z[:, 2] + coef[9] * z[:, 1] * z[:, 2]
    )
    return y, coef


# --------------------------------------------------------------------------- quadratic surface


def test_quadratic_press_residuals_equal_explicit_leave_one_out_refits():
    # Myers & Montgomery 2002 pp. 46–47 via CHECKS.md §6 (Allen 1974 from memory): e_i/(1 − h_ii) = y_i − ŷ_(i) exactly.
    X = _lhs(16, 2)
    y = _smooth(X) + 0.05 * np.random.default_rng(SEED).standard_normal(16)
    model = QuadraticSurface().fit(X, y)
    brute = np.array([
        y[i] - QuadraticSurface().fit(np.delete(X, i, axis=0), np.delete(y, i)).predict(X[i:i + 1])[0]
        for i in range(len(y))
    ])
    np.testing.assert_allclose(model.loo_residuals(), brute, rtol=0, atol=1e-10)
    assert model.press_ == pytest.approx(float(brute @ brute), rel=1e-10)


def test_quadratic_recovers_an_exact_quadratic_and_has_zero_press():
    X = _lhs(20, 3)
    y, coef = _quadratic_in_coded_units(X)
    model = QuadraticSurface().fit(X, y)
    np.testing.assert_allclose(model.coef_, coef, rtol=0, atol=1e-10)
    X_new = _lhs(50, 3, seed=SEED + 1)
    np.testing.assert_allclose(model.predict(X_new), _quadratic_in_coded_units(X_new)[0], rtol=0, atol=1e-10)
    assert model.press_ < 1e-20
    np.testing.assert_array_equal(model.powers_[:4], [[0, 0, 0], [1, 0, 0], [0, 1, 0], [0, 0, 1]])


def test_quadratic_std_is_the_standard_error_of_the_fitted_mean():
    # Myers & Montgomery 2002, from memory: se(ŷ(x)) = sqrt(s² x (XᵀX)⁻¹ xᵀ), here with an explicit inverse as the reference.
    X = _lhs(14, 2)
    y = _smooth(X)
    model = QuadraticSurface().fit(X, y)
    X_new = _lhs(7, 2, seed=SEED + 2)

    def features(A: np.ndarray) -> np.ndarray:
        z = 2 * A - 1
        return np.column_stack([np.ones(len(A)), z, z**2, z[:, 0] * z[:, 1]])

    F = features(X)
    s2 = np.sum((y - F @ np.linalg.lstsq(F, y, rcond=None)[0]) ** 2) / (14 - 6)
    expected = np.sqrt(s2 * np.einsum("ij,jk,ik->i", features(X_new), np.linalg.inv(F.T @ F), features(X_new)))
    _, std = model.predict(X_new, return_std=True)
    np.testing.assert_allclose(std, expected, rtol=1e-9)


def test_quadratic_says_how_many_designs_it_needs():
    # p = (k+1)(k+2)/2 = 10 for k = 3 (CHECKS.md §1 table).
    with pytest.raises(ValueError, match=r"needs at least 10 designs for 3 parameters, got 9\.$"):
        QuadraticSurface().fit(_lhs(9, 3), np.arange(9.0))


def test_quadratic_with_as_many_designs_as_terms_interpolates_and_warns():
    X = _lhs(6, 2)
    y = _smooth(X)
    model = QuadraticSurface().fit(X, y)
    mean, std = model.predict(X, return_std=True)
    np.testing.assert_allclose(mean, y, atol=1e-10)
    np.testing.assert_array_equal(std, 0.0)
    assert any(w.startswith("NoResidualDOF") for w in model.warnings_)
    assert np.all(np.isnan(model.loo_residuals()))


def test_quadratic_rejects_a_two_level_design_that_cannot_see_curvature():
    corners = np.array([[0.0, 0.0], [1.0, 0.0], [0.0, 1.0], [1.0, 1.0]])
    with pytest.raises(ValueError, match="three or more levels"):
        QuadraticSurface().fit(np.vstack([corners, corners]), np.arange(8.0))


# --------------------------------------------------------------------------- radial basis functions


@pytest.mark.parametrize(("kernel", "smoothing"), [("thin_plate_spline", 0.0), ("cubic", 0.0), ("linear", 0.0),
                                                   ("thin_plate_spline", 1e-3)])
def test_rbf_rippa_loo_equals_brute_force_refits(kernel: str, smoothing: float):
    # Rippa 1999: e_i = c_i / (M⁻¹)_ii for the saddle-point system (gp.md §5).
    X = _lhs(20, 2)
    y = _smooth(X)
    model = RadialBasisSurrogate(kernel=kernel, smoothing=smoothing).fit(X, y)
    brute = np.array([
        y[i] - RadialBasisSurrogate(kernel=kernel, smoothing=smoothing)
        .fit(np.delete(X, i, axis=0), np.delete(y, i)).predict(X[i:i + 1])[0]
        for i in range(len(y))
    ])
    np.testing.assert_allclose(model.loo_residuals(), brute, rtol=0, atol=1e-8)


def test_rbf_interpolates_and_reports_nan_std():
    X = _lhs(15, 2)
    y = _smooth(X)
    model = RadialBasisSurrogate().fit(X, y)
    mean, std = model.predict(X, return_std=True)
    np.testing.assert_allclose(mean, y, atol=1e-9)
    assert np.all(np.isnan(std))
    assert (RadialBasisSurrogate.has_std, QuadraticSurface.has_std, GaussianProcessSurrogate.has_std) == (False, True, True)


def test_rbf_rejects_unknown_kernels_and_duplicate_designs():
    X = _lhs(10, 2)
    with pytest.raises(ValueError, match="kernel must be one of"):
        RadialBasisSurrogate(kernel="gaussian").fit(X, _smooth(X))
    with pytest.raises(ValueError, match="singular"):
        RadialBasisSurrogate().fit(np.vstack([X, X[:1]]), np.r_[_smooth(X), 0.0])


# --------------------------------------------------------------------------- Gaussian process


@pytest.fixture(scope="module")
def gp_2d() -> tuple[GaussianProcessSurrogate, np.ndarray, np.ndarray]:
    X = _lhs(18, 2)
    y = _smooth(X)
    return GaussianProcessSurrogate(n_restarts=1, random_state=0).fit(X, y), X, y


def test_gp_loo_closed_form_equals_refits_with_the_kernel_held_fixed(gp_2d):
    # Rasmussen & Williams 2006 eq. 5.12 (gp.md §5; eqs. 5.10–5.11 from memory), fixed hyper-parameters and normalisation.
    gp, X, y = gp_2d
    y_norm = (y - gp.y_mean_) / gp.y_std_
    resid, var = [], []
    for i in range(len(y)):
        ref = GaussianProcessRegressor(gp.kernel_, alpha=gp.alpha_, optimizer=None, normalize_y=False)
        ref.fit(np.delete(X, i, axis=0), np.delete(y_norm, i))
        mu, sd = ref.predict(X[i:i + 1], return_std=True)
        resid.append(y[i] - (mu[0] * gp.y_std_ + gp.y_mean_))
        var.append(sd[0] ** 2 + gp.alpha_)  # sklearn's std includes the WhiteKernel noise but not alpha (gp.md §1)
    np.testing.assert_allclose(gp.loo_residuals(), resid, rtol=1e-6, atol=1e-12 * gp.y_std_)
    np.testing.assert_allclose(gp.loo_std(), np.sqrt(var) * gp.y_std_, rtol=1e-6)


def test_gp_reproduces_training_data_within_noise_level(gp_2d):
    gp, X, y = gp_2d
    noise_std = math.sqrt(gp.kernel_.k2.noise_level + gp.alpha_) * gp.y_std_
    assert np.max(np.abs(gp.predict(X) - y)) <= 3 * noise_std + 1e-6 * np.ptp(y)


def test_gp_std_is_small_at_data_and_grows_away_from_it():
    X = np.linspace(0.0, 0.5, 6)[:, None]
    gp = GaussianProcessSurrogate(n_restarts=0, random_state=0).fit(X, np.sin(6 * X[:, 0]))
    _, at_data = gp.predict(X, return_std=True)
    _, halfway = gp.predict(X[:-1] + 0.05, return_std=True)
    assert np.all(at_data[:-1] < 0.1 * halfway)
    _, away = gp.predict(np.array([[0.55], [0.7], [0.85], [1.0]]), return_std=True)
    assert np.all(np.diff(away) > 0)
    assert np.all(at_data > 0)  # floored, so EI stays defined


def test_gp_std_leaves_out_the_fitted_white_noise():
    X = _lhs(30, 2)
    y = _smooth(X) + 0.05 * np.random.default_rng(SEED).standard_normal(30)
    gp = GaussianProcessSurrogate(n_restarts=0, random_state=0).fit(X, y)
    noise = gp.kernel_.k2.noise_level
    assert noise > 1e-6  # the noise was actually fitted
    X_new = _lhs(10, 2, seed=SEED + 3)
    mean, std = gp.predict(X_new, return_std=True)
    sk_mean, sk_std = gp.model_.predict(X_new, return_std=True)
    np.testing.assert_allclose(mean, sk_mean * gp.y_std_ + gp.y_mean_, rtol=1e-10)
    np.testing.assert_allclose(std**2, (sk_std**2 - noise) * gp.y_std_**2, rtol=1e-8)


def test_gp_length_scales_flag_an_inactive_input():
    X = _lhs(20, 3)
    gp = GaussianProcessSurrogate(n_restarts=0, random_state=0).fit(X, np.sin(4 * X[:, 0]))
    scales = gp.length_scales_
    assert scales.shape == (3,)
    assert scales[1] > 10 * scales[0] and scales[2] > 10 * scales[0]


def test_gp_on_constant_y_predicts_the_constant_with_negligible_std():
    X = _lhs(8, 2)
    gp = GaussianProcessSurrogate(random_state=0).fit(X, np.full(8, 2.5))
    mean, std = gp.predict(_lhs(5, 2, seed=SEED + 4), return_std=True)
    np.testing.assert_allclose(mean, 2.5)
    assert np.all((std > 0) & (std < 1e-4))
    assert any(w.startswith("ConstantTarget") for w in gp.warnings_)
    np.testing.assert_array_equal(gp.loo_residuals(), 0.0)


def test_gp_keeps_convergence_warnings_instead_of_printing_them(recwarn):
    # A length-scale at its upper bound warns on every fit (gp.md §1); here x1 is inactive.
    X = _lhs(12, 2)
    gp = GaussianProcessSurrogate(n_restarts=0, random_state=0).fit(X, np.sin(4 * X[:, 0]))
    assert any(w.startswith("ConvergenceWarning") for w in gp.warnings_)
    assert not recwarn.list


def test_gp_retries_a_failed_cholesky_with_more_jitter(monkeypatch):
    # The project's own rule (sortie.models.gp): a failed Cholesky is retried with alpha x 100 up to 1e-4,
    # then reported. gp.md §1 suggests x 10 up to about 1e-4, after scikit-learn's LinAlgError advice;
    # no outside number is checked here.
    import sortie.models.gp as gp_module

    class FailsBelow(GaussianProcessRegressor):
        threshold = 1e-6

        def fit(self, X, y):
            if self.alpha < self.threshold:
                raise np.linalg.LinAlgError("not positive definite")
            return super().fit(X, y)

    monkeypatch.setattr(gp_module, "GaussianProcessRegressor", FailsBelow)
    X = _lhs(10, 2)
    gp = GaussianProcessSurrogate(n_restarts=0, random_state=0).fit(X, _smooth(X))
    assert gp.alpha_ == pytest.approx(1e-6)
    assert sum(w.startswith("LinAlgError") for w in gp.warnings_) == 2  # 1e-10 and 1e-8 failed
    FailsBelow.threshold = 1.0
    with pytest.raises(np.linalg.LinAlgError, match="duplicate or near-duplicate design points"):
        GaussianProcessSurrogate(n_restarts=0).fit(X, _smooth(X))


@pytest.mark.parametrize("noise", [True, False])
def test_gp_likelihood_and_gradient_equal_scikit_learns(noise):
    # The hand-written gradient (Rasmussen & Williams 2006 eq. 5.9, from memory; contracted without the n x n x p tensor) must
    # equal scikit-learn's generic one for the same kernel; without a prior the value is -LML.
    rng = np.random.default_rng(SEED)
    X = _lhs(30, 3)
    y = _smooth(X) + 0.3 * X[:, 2]
    y = (y - y.mean()) / y.std()
    kernel = GaussianProcessSurrogate(noise=noise)._initial_kernel(3, (1e-2, 1e2))
    for _ in range(3):
        theta = np.clip(kernel.theta + rng.normal(0.0, 0.7, kernel.theta.size), *kernel.bounds.T)
        ref = GaussianProcessRegressor(kernel.clone_with_theta(theta), alpha=1e-8, optimizer=None).fit(X, y)
        lml, grad = ref.log_marginal_likelihood(theta, eval_gradient=True)
        value, mine = _neg_log_posterior(theta, X, y, 1e-8, noise, None)
        assert value == pytest.approx(-lml, rel=1e-10)
        np.testing.assert_allclose(mine, -grad, rtol=1e-7, atol=1e-9 * np.abs(grad).max())
        with_prior, prior_grad = _neg_log_posterior(theta, X, y, 1e-8, noise, (0.0, 1.0))
        assert with_prior == pytest.approx(value + 0.5 * np.sum(theta[1:4] ** 2))
        np.testing.assert_allclose(prior_grad[1:4] - mine[1:4], theta[1:4], rtol=1e-10)


def test_gp_length_scale_prior_stops_six_designs_from_calling_an_active_input_inactive():
    # Branin through the baseline and a five-point LHS (the benchmark's start, seed 5): by maximum
    # likelihood x1 looks inactive (length-scale at the bound 100) although Branin depends on it
    # strongly; EI then crawled along one edge of the space. The weak prior keeps it in range.
    from sortie.sampling import latin_hypercube

    X = np.vstack([[0.5, 0.5], latin_hypercube(5, 2, seed=5)])
    y = _branin_unit(X)
    ml = GaussianProcessSurrogate(length_scale_prior=None, random_state=0).fit(X, y)
    assert ml.length_scales_.max() > 50
    assert any("upper bound" in w for w in ml.warnings_)
    map_ = GaussianProcessSurrogate(random_state=0).fit(X, y)
    assert map_.length_scales_.max() < 10


def test_gp_fits_hyper_parameters_on_a_subset_and_conditions_on_every_design():
    X = _lhs(80, 2)
    y = _smooth(X)
    gp = GaussianProcessSurrogate(max_fit_points=25, n_restarts=0, random_state=1).fit(X, y)
    assert gp.X_.shape == (80, 2) and gp.model_.X_train_.shape == (80, 2)
    assert np.max(np.abs(gp.predict(X) - y)) < 1e-3 * np.ptp(y)  # interpolates all 80, not only 25
    again = GaussianProcessSurrogate(max_fit_points=25, n_restarts=0, random_state=1).fit(X, y)
    np.testing.assert_array_equal(gp.kernel_.theta, again.kernel_.theta)
    # hyper-parameters from 25 designs predict new points as well as the full likelihood's do
    X_new = _lhs(200, 2, seed=SEED + 8)
    full = GaussianProcessSurrogate(max_fit_points=None, n_restarts=0, random_state=1).fit(X, y)
    assert np.max(np.abs(gp.predict(X_new) - _smooth(X_new))) < 0.01 * np.ptp(y)
    assert np.max(np.abs(full.predict(X_new) - _smooth(X_new))) < 0.01 * np.ptp(y)


# --------------------------------------------------------------------------- Kriging believer


def test_believer_keeps_the_mean_and_collapses_std_at_pending_points(gp_2d):
    gp, X, _ = gp_2d
    pending = np.array([[0.33, 0.71], [0.9, 0.15]])
    elsewhere = _lhs(40, 2, seed=SEED + 5)
    before_mean = gp.predict(elsewhere)
    _, before_std = gp.predict(pending, return_std=True)
    kb = gp.believer(pending)
    # Ginsbourger, Le Riche & Carraro 2010 (KB); gp.md §2 measured a mean change of 2e-9 with fixed normalisation.
    assert np.max(np.abs(kb.predict(elsewhere) - before_mean)) < 1e-6 * np.ptp(gp.y_)
    _, after_std = kb.predict(pending, return_std=True)
    assert np.all(after_std < 1e-3 * before_std)
    # Cheap because nothing is re-optimised: identical hyper-parameters, jitter and normalisation.
    np.testing.assert_array_equal(kb.kernel_.theta, gp.kernel_.theta)
    assert (kb.alpha_, kb.y_mean_, kb.y_std_, kb.n_pending_) == (gp.alpha_, gp.y_mean_, gp.y_std_, 2)
    assert kb.model_.optimizer is None
    assert gp.X_.shape == X.shape and gp.n_pending_ == 0  # the original is untouched


def test_condition_adds_imputed_values_with_the_kernel_held_fixed(gp_2d):
    # Infill imputes a pessimistic value where the solver failed (Forrester, Sóbester & Keane 2006):
    # the model must pass through it, lose its uncertainty there, and keep its hyper-parameters.
    gp, _, _ = gp_2d
    failed = np.array([[0.95, 0.05], [0.05, 0.95]])
    mean, std = gp.predict(failed, return_std=True)
    imputed = gp.condition(failed, mean + std)
    new_mean, new_std = imputed.predict(failed, return_std=True)
    np.testing.assert_allclose(new_mean, mean + std, rtol=1e-6)
    assert np.all(new_std < 1e-3 * std)
    np.testing.assert_array_equal(imputed.kernel_.theta, gp.kernel_.theta)
    assert imputed.n_pending_ == 2 and gp.n_pending_ == 0
    with pytest.raises(ValueError, match="y_new must hold 2 finite values"):
        gp.condition(failed, [1.0, np.nan])


def test_believer_with_no_pending_points_is_an_equivalent_copy(gp_2d):
    gp, _, _ = gp_2d
    copy = gp.believer(np.empty((0, 2)))
    assert copy is not gp
    X_new = _lhs(10, 2, seed=SEED + 6)
    np.testing.assert_array_equal(copy.predict(X_new, return_std=True), gp.predict(X_new, return_std=True))


# --------------------------------------------------------------------------- model choice


def test_choose_surrogate_picks_the_quadratic_for_an_exact_quadratic():
    X = _lhs(25, 3)
    best, scores = choose_surrogate(X, _quadratic_in_coded_units(X)[0], random_state=0)
    assert best.name == "quadratic"
    assert [s.name for s in scores] == ["gp", "quadratic", "rbf"]
    assert all(isinstance(s, ModelScore) and math.isfinite(s.loo_rmse) for s in scores)
    assert scores[1].loo_rmse < 1e-9 and scores[1].loo_r2 == pytest.approx(1.0)


def test_choose_surrogate_prefers_an_interpolator_for_branin():
    # Branin–Hoo (CHECKS.md §2) is far from quadratic over its domain.
    X = _lhs(30, 2)
    best, scores = choose_surrogate(X, _branin_unit(X), random_state=0)
    assert best.name in {"gp", "rbf"}
    by_name = {s.name: s for s in scores}
    assert set(by_name) == {"gp", "quadratic", "rbf"}
    assert by_name[best.name].loo_rmse < by_name["quadratic"].loo_rmse
    assert by_name[best.name].loo_r2 > 0.9


def test_choose_surrogate_notes_a_skipped_candidate():
    X = _lhs(8, 3)
    best, scores = choose_surrogate(X, np.sin(3 * X).sum(axis=1), random_state=0)
    quad = next(s for s in scores if s.name == "quadratic")
    assert quad.loo_rmse == math.inf and math.isnan(quad.loo_r2)
    assert "needs at least 10 designs for 3 parameters, got 8" in quad.note
    assert best.name != "quadratic" and len(scores) == 3 and all(s.n_points == 8 for s in scores)


def test_choose_surrogate_rejects_unknown_candidates_and_make_surrogate_builds_each_kind():
    X = _lhs(10, 2)
    with pytest.raises(ValueError, match="Unknown surrogate 'kriging'"):
        choose_surrogate(X, _smooth(X), candidates=("gp", "kriging"))
    for name, cls in [("gp", GaussianProcessSurrogate), ("quadratic", QuadraticSurface), ("rbf", RadialBasisSurrogate)]:
        model = make_surrogate(name, random_state=1)
        assert isinstance(model, cls) and model.name == name


# --------------------------------------------------------------------------- contract and validation


def test_same_random_state_gives_the_same_fit():
    X = _lhs(15, 2)
    y = _smooth(X)
    first = GaussianProcessSurrogate(n_restarts=2, random_state=7).fit(X, y)
    second = GaussianProcessSurrogate(n_restarts=2, random_state=7).fit(X, y)
    np.testing.assert_array_equal(first.kernel_.theta, second.kernel_.theta)
    X_new = _lhs(10, 2, seed=SEED + 7)
    np.testing.assert_array_equal(first.predict(X_new, return_std=True), second.predict(X_new, return_std=True))
    assert choose_surrogate(X, y, random_state=7)[1] == choose_surrogate(X, y, random_state=7)[1]


def test_surrogates_follow_the_estimator_contract():
    bounds = [0.05, 20.0]
    gp = GaussianProcessSurrogate(length_scale_bounds=bounds, random_state=3)
    assert gp.get_params()["length_scale_bounds"] is bounds  # stored unchanged, validated in fit
    assert clone(gp).get_params() == gp.get_params()
    assert RadialBasisSurrogate(kernel="cubic").get_params() == {"kernel": "cubic", "smoothing": 0.0}
    for model in (gp, QuadraticSurface(), RadialBasisSurrogate()):
        with pytest.raises(NotFittedError):
            model.predict(_lhs(3, 2))
        X = _lhs(12, 2)
        assert model.fit(X, _smooth(X)) is model


_BAD_INPUTS = [
    ("X of one dimension", np.linspace(0, 1, 12), np.zeros(12), r"X must have shape \(n_points, n_dims\)"),
    ("y of two dimensions", _lhs(12, 2), np.zeros((12, 1)), r"y must have shape \(n_points,\)"),
    ("lengths differ", _lhs(12, 2), np.zeros(11), "same number of points"),
    ("NaN in y", _lhs(12, 2), np.r_[np.zeros(11), np.nan], r"y contains NaN .* rows \[11\]"),
    ("NaN in X", np.vstack([_lhs(11, 2), [[np.nan, 0.5]]]), np.zeros(12), "X contains NaN"),
    ("outside the cube", 10.0 * _lhs(12, 2), np.zeros(12), "unit cube"),
]


@pytest.mark.parametrize("name", ["gp", "quadratic", "rbf"])
@pytest.mark.parametrize(("case", "X", "y", "match"), _BAD_INPUTS, ids=[c[0] for c in _BAD_INPUTS])
def test_invalid_inputs_raise_a_one_sentence_value_error(name, case, X, y, match):
    with pytest.raises(ValueError, match=match) as info:
        make_surrogate(name).fit(X, y)
    message = str(info.value)
    assert "\n" not in message and message.endswith(".")


@pytest.mark.parametrize("name", ["gp", "quadratic", "rbf"])
def test_predict_rejects_the_wrong_number_of_dims(name):
    X = _lhs(12, 2)
    model = make_surrogate(name, random_state=0).fit(X, _smooth(X))
    with pytest.raises(ValueError, match=r"must have 2 columns .* got 3\.$"):
        model.predict(_lhs(4, 3))


def test_gp_rejects_invalid_settings_at_fit_time():
    X = _lhs(10, 2)
    with pytest.raises(ValueError, match="length_scale_bounds must satisfy"):
        GaussianProcessSurrogate(length_scale_bounds=(1.0, 0.1)).fit(X, _smooth(X))
    with pytest.raises(ValueError, match="n_restarts must be a non-negative integer"):
        GaussianProcessSurrogate(n_restarts=-1).fit(X, _smooth(X))
    with pytest.raises(ValueError, match="max_iter must be a positive integer"):
        GaussianProcessSurrogate(max_iter=0).fit(X, _smooth(X))
    with pytest.raises(ValueError, match="max_fit_points must be None or an integer >= 2"):
        GaussianProcessSurrogate(max_fit_points=1).fit(X, _smooth(X))
    with pytest.raises(ValueError, match="length_scale_prior must have a positive median"):
        GaussianProcessSurrogate(length_scale_prior=(1.0, -1.0)).fit(X, _smooth(X))
