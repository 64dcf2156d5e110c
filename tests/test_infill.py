"""The infill decisions as pure functions: what they propose, and why."""

from __future__ import annotations

import math

import numpy as np
import pytest

from sortie.infill import History, InfillSettings, Step, fit_models, optimize_surface, propose_infill

FAST = InfillSettings(models=("gp",), candidates=256, restarts=3)


def _quadratic(X: np.ndarray) -> np.ndarray:
    return np.sum((X - np.array([0.3, 0.7])) ** 2, axis=1)


def _history(X: np.ndarray, y: np.ndarray, margins: np.ndarray | None = None, succeeded: np.ndarray | None = None,
             pending: np.ndarray | None = None) -> History:
    n, d = X.shape
    return History(X, y, np.zeros((n, 0)) if margins is None else margins,
                   np.ones(n, bool) if succeeded is None else succeeded,
                   np.zeros((0, d)) if pending is None else pending)


def test_too_few_successful_designs_give_no_proposal() -> None:
    X = np.array([[0.1, 0.1], [0.9, 0.9], [0.5, 0.5]])
    history = _history(X, np.array([1.0, 2.0, np.nan]), succeeded=np.array([True, True, False]))
    assert propose_infill(history, FAST, seed=0) is None


def test_proposal_moves_towards_the_minimum_of_a_bowl() -> None:
    rng = np.random.default_rng(1)
    X = rng.random((12, 2))
    proposal = propose_infill(_history(X, _quadratic(X)), InfillSettings(models=("gp",), cycle=(Step(0.05),)), seed=3)
    assert proposal is not None
    assert np.linalg.norm(proposal.x - [0.3, 0.7]) < np.min(np.linalg.norm(X - [0.3, 0.7], axis=1))
    assert proposal.incumbent == pytest.approx(_quadratic(X).min())
    assert proposal.expected_improvement > 0 and proposal.chosen == {"objective": "gp"}


def test_pending_designs_push_the_next_proposal_away() -> None:
    rng = np.random.default_rng(2)
    X = rng.random((10, 2))
    alone = propose_infill(_history(X, _quadratic(X)), FAST, seed=5)
    assert alone is not None
    with_pending = propose_infill(_history(X, _quadratic(X), pending=alone.x[None, :]), FAST, seed=5)
    assert with_pending is not None
    assert np.linalg.norm(with_pending.x - alone.x) >= FAST.min_distance


def test_infeasible_region_is_avoided_by_the_constraint_model() -> None:
    rng = np.random.default_rng(4)
    X = rng.random((20, 2))
    y = _quadratic(X)
    margins = (0.5 - X[:, 0])[:, None]  # feasible only where x0 >= 0.5; the bowl's minimum is at x0 = 0.3
    proposal = propose_infill(_history(X, y, margins=margins), FAST, seed=0)
    assert proposal is not None
    assert proposal.x[0] >= 0.45
    assert proposal.probability_feasible > 0.5
    assert len(proposal.prediction.margins_mean) == 1


def test_without_a_feasible_design_the_search_looks_for_feasibility() -> None:
    rng = np.random.default_rng(6)
    X = rng.random((12, 2)) * 0.5  # every design in the infeasible lower-left quarter
    margins = (1.2 - X.sum(axis=1))[:, None]  # feasible only where x0 + x1 >= 1.2
    proposal = propose_infill(_history(X, _quadratic(X), margins=margins), FAST, seed=0)
    assert proposal is not None and proposal.incumbent is None
    assert "feasibility" in proposal.reason()
    assert proposal.x.sum() > X.sum(axis=1).max()  # it steps out towards the feasible side


def test_warm_kernels_are_returned_and_reused() -> None:
    rng = np.random.default_rng(7)
    X = rng.random((10, 2))  # 11 designs after one more: not a full-search step (every 5th)
    first = propose_infill(_history(X, _quadratic(X)), FAST, seed=1)
    assert first is not None and set(first.kernels) == {"objective"}
    X2 = np.vstack([X, first.x])
    models = fit_models(_history(X2, _quadratic(X2)), FAST, seed=2, warm=first.kernels)
    assert models is not None
    params = models.objective.get_params()
    # In between full searches: a local search from the previous kernel, no random restarts.
    assert params["n_restarts"] == 0
    assert np.array_equal(params["warm_kernel"].theta, first.kernels["objective"].theta)
    full = fit_models(_history(X[:5], _quadratic(X[:5])), FAST, seed=2, warm=first.kernels)  # 5 designs: restarts too
    assert full is not None and full.objective.get_params()["n_restarts"] == 2


def test_objective_for_infill_is_the_gp_even_when_the_quadratic_wins_leave_one_out() -> None:
    # An exact quadratic: the quadratic surface has zero PRESS and wins the LOO ranking, but its
    # standard error is not an uncertainty EI can use (fit_models docstring), so infill uses the GP.
    rng = np.random.default_rng(8)
    X = rng.random((15, 2))
    history = _history(X, _quadratic(X))
    ranked = fit_models(history, InfillSettings(models=("gp", "quadratic")), seed=0)
    assert ranked is not None and ranked.chosen == {"objective": "quadratic"}
    proposal = propose_infill(history, InfillSettings(models=("gp", "quadratic"), candidates=256), seed=0)
    assert proposal is not None and proposal.chosen == {"objective": "gp"}
    assert {s.name for s in proposal.model_scores["objective"]} == {"gp", "quadratic"}  # the ranking is still recorded


def test_a_design_that_improved_the_best_is_refined_locally() -> None:
    rng = np.random.default_rng(9)
    X = rng.random((10, 2))
    y = _quadratic(X)
    newest_best = np.vstack([np.delete(X, y.argmin(), axis=0), X[y.argmin()]])  # the best design last
    settings = InfillSettings(models=("gp",), candidates=256, restarts=3, cycle=(Step(1.0),))
    proposal = propose_infill(_history(newest_best, _quadratic(newest_best)), settings, seed=0)
    assert proposal is not None and proposal.local and proposal.reason().startswith("near the best design")
    assert np.all(np.abs(proposal.x - X[y.argmin()]) <= settings.local_radius + 1e-12)
    best_first = np.vstack([X[y.argmin()], np.delete(X, y.argmin(), axis=0)])  # same designs, best one long ago
    proposal = propose_infill(_history(best_first, _quadratic(best_first)), settings, seed=0)
    assert proposal is not None and not proposal.local


def test_best_predicted_incumbent_is_the_lowest_mean_at_a_feasible_design() -> None:
    # A noisy solver: one design came back far below what its neighbours say (a lucky draw).
    rng = np.random.default_rng(10)
    X = rng.random((30, 2))
    y = _quadratic(X) + 0.01 * rng.standard_normal(30)
    lucky = int(np.argmin(y))
    y[lucky] -= 0.04  # four noise stds below the truth
    margins = (X[:, :1] - 0.9)  # feasible where x0 <= 0.9
    assert margins[lucky, 0] <= 0
    history = _history(X, y, margins=margins)
    settings = InfillSettings(models=("gp",), candidates=256, restarts=2, incumbent="best-predicted")
    proposal = propose_infill(history, settings, seed=0)
    models = fit_models(history, settings, seed=0, for_infill=True)
    assert proposal is not None and models is not None
    feasible = margins[:, 0] <= 0
    assert proposal.incumbent == pytest.approx(models.objective.predict(X[feasible]).min())
    assert proposal.incumbent > y[feasible].min() + 0.01  # the lucky draw is not believed
    observed = propose_infill(history, InfillSettings(models=("gp",), candidates=256, restarts=2), seed=0)
    assert observed is not None and observed.incumbent == pytest.approx(y[feasible].min())
    with pytest.raises(ValueError, match="incumbent must be one of best-observed, best-predicted"):
        InfillSettings(incumbent="best-ever")


def test_stop_rule_fires_when_improvement_is_negligible() -> None:
    X = np.array([[i / 6, j / 6] for i in range(7) for j in range(7)])
    settings = InfillSettings(models=("gp",), candidates=256, restarts=2, stop_below=0.5)
    proposal = propose_infill(_history(X, _quadratic(X)), settings, seed=0)
    assert proposal is not None and proposal.converged


def test_classic_surface_optimum_of_an_exact_quadratic_is_its_minimum() -> None:
    # a face-centred 3x3 grid fits the quadratic exactly, so SLSQP lands on its minimiser
    X = np.array([[i / 2, j / 2] for i in range(3) for j in range(3)])
    proposal = optimize_surface(_history(X, _quadratic(X)), InfillSettings(models=("quadratic",)), seed=0)
    assert proposal is not None and proposal.chosen == {"objective": "quadratic"}
    assert proposal.x == pytest.approx([0.3, 0.7], abs=1e-4)
    assert proposal.prediction.objective_mean == pytest.approx(0.0, abs=1e-8)


def test_classic_optimum_respects_a_predicted_constraint() -> None:
    X = np.array([[i / 2, j / 2] for i in range(3) for j in range(3)])
    margins = (0.5 - X[:, 0])[:, None]  # x0 >= 0.5 required; the bowl would rather sit at 0.3
    proposal = optimize_surface(_history(X, _quadratic(X), margins=margins), InfillSettings(models=("quadratic",)), seed=0)
    assert proposal is not None
    assert proposal.x[0] == pytest.approx(0.5, abs=1e-4) and proposal.x[1] == pytest.approx(0.7, abs=1e-3)
    assert math.isclose(proposal.prediction.margins_mean[0], 0.0, abs_tol=1e-6)


def test_a_pending_design_is_believed_so_the_next_proposal_goes_elsewhere_without_any_exclusion() -> None:
    # Kriging believer (Ginsbourger, Le Riche & Carraro 2010): a pending design's predicted value is
    # taken as observed, so the std, and with it EI, vanish there. With min_distance 0 nothing else
    # keeps the next proposal off the pending design: without the believer it would be the same point.
    rng = np.random.default_rng(2)
    X = np.vstack([rng.random((10, 2)), [0.3, 0.7]])  # the bowl's minimum is observed: f_min = 0
    settings = InfillSettings(models=("gp",), candidates=256, restarts=3, min_distance=0.0, cycle=(Step(1.0),),
                              refine_improvements=False)
    alone = propose_infill(_history(X, _quadratic(X)), settings, seed=5)
    assert alone is not None and alone.incumbent == 0.0
    # An exploratory proposal: its mean is above f_min, so its EI comes from the std alone.
    assert alone.prediction.objective_mean > alone.incumbent and alone.expected_improvement > 1e-3
    after = propose_infill(_history(X, _quadratic(X), pending=alone.x[None, :]), settings, seed=5)
    assert after is not None
    assert np.linalg.norm(after.x - alone.x) > 0.05
    assert after.expected_improvement < 0.2 * alone.expected_improvement
    # Pending designs on a grid over the whole square leave almost no std, hence almost no EI, anywhere.
    grid = np.array([[i / 10, j / 10] for i in range(11) for j in range(11)])
    covered = propose_infill(_history(X, _quadratic(X), pending=grid), settings, seed=5)
    assert covered is not None and covered.expected_improvement < 0.05 * alone.expected_improvement


@pytest.mark.parametrize("rule", ["best-observed", "best-predicted"])
def test_an_infeasible_design_better_than_every_feasible_one_is_not_the_incumbent(rule: str) -> None:
    # f_min is taken over feasible designs only (Schonlau, Welch & Jones 1998, constrained EI).
    rng = np.random.default_rng(4)
    X = np.vstack([rng.random((14, 2)) * [0.5, 1.0] + [0.5, 0.0], [0.3, 0.7]])  # the last one: the bowl's minimum
    y = _quadratic(X)
    margins = (0.45 - X[:, 0])[:, None]  # feasible only where x0 >= 0.45: the minimum design is infeasible
    assert margins[-1, 0] > 0 and (margins[:-1, 0] <= 0).all() and y[-1] < y[:-1].min() - 0.03
    settings = InfillSettings(models=("gp",), candidates=256, restarts=3, incumbent=rule)
    proposal = propose_infill(_history(X, y, margins=margins), settings, seed=0)
    assert proposal is not None and proposal.incumbent is not None
    if rule == "best-observed":
        assert proposal.incumbent == pytest.approx(y[:-1].min(), abs=1e-12)
    else:
        assert proposal.incumbent > y[:-1].min() - 0.01  # the GP mean at feasible designs, near their values


@pytest.mark.parametrize("seed", [0, 2, 4, 6])
def test_a_failed_design_lowers_expected_improvement_as_a_pessimistic_value_would(seed: int) -> None:
    # Penalised imputation (Forrester, Sóbester & Keane 2006): the objective model is conditioned
    # on the mean plus one std at a failed design, which raises the mean near it and lowers the std,
    # so the best EI left is below the best EI before the failure (an optimistic value raises it).
    rng = np.random.default_rng(seed)
    X = rng.random((12, 2))
    settings = InfillSettings(models=("gp",), candidates=256, restarts=3, cycle=(Step(1.0),), refine_improvements=False)
    before = propose_infill(_history(X, _quadratic(X)), settings, seed=5)
    assert before is not None
    failed = np.vstack([X, before.x])  # the design EI wanted most, and the solver failed on it
    after = propose_infill(_history(failed, np.append(_quadratic(X), np.nan),
                                    succeeded=np.append(np.ones(len(X), bool), False)), settings, seed=5)
    assert after is not None
    assert after.expected_improvement < before.expected_improvement


@pytest.mark.parametrize("towards", ["lower", "upper"])
def test_a_local_step_stays_in_its_box_even_when_the_minimum_lies_outside(towards: str) -> None:
    # The designs lie on one side of the bowl (x0 >= 0.55, or its mirror x0 <= 0.45) and the newest is
    # the best, so the next step is local; EI would rather go towards the bowl's minimum, out of the box.
    rng = np.random.default_rng(3)
    X = rng.random((12, 2)) * [0.45, 1.0] + [0.55, 0.0]
    centre = np.array([0.3, 0.7])
    if towards == "upper":
        X, centre = 1.0 - X, 1.0 - centre
    y = np.sum((X - centre) ** 2, axis=1)
    order = np.argsort(-y)  # the best design last: it has just improved the best
    X, y = X[order], y[order]
    settings = InfillSettings(models=("gp",), candidates=256, restarts=3, cycle=(Step(1.0),), local_radius=0.05)
    proposal = propose_infill(_history(X, y), settings, seed=0)
    assert proposal is not None and proposal.local
    assert np.all(np.abs(proposal.x - X[-1]) <= settings.local_radius + 1e-12)
