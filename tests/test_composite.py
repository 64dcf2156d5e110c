"""Composite infill: the goal composed from per-output models, and the problems that benchmark it."""

from __future__ import annotations

import math

import numpy as np
import pytest
from scipy.stats import norm

from benchmarks.problems import make_target, oblique_shock_beta, oblique_shock_pressure_ratio
from sortie.acquisition import (
    expected_improvement,
    mc_expected_improvement,
    mc_log_expected_improvement,
    mc_log_probability_of_feasibility,
    mc_probability_of_feasibility,
    normal_base_samples,
)
from sortie.goal import Composition, Constraint, Expression, Goal, composition_problem, model_rule, read_outputs
from sortie.infill import (
    History,
    InfillSettings,
    _CompositeAcquisition,
    fit_composite,
    optimize_surface,
    propose_infill,
)

FAST = InfillSettings(models=("gp",), candidates=256, restarts=3)


def _composition(objective: str, constraints: tuple[str, ...] = (), conditions: tuple[dict[str, float], ...] = ({"k": 1.0},),
                 quantities: tuple[str, ...] = ("y",)) -> Composition:
    goal = Goal("minimize", Expression.parse(objective, where="goal.minimize"),
                tuple(Constraint.parse(c, where=f"goal.subject_to[{i}]") for i, c in enumerate(constraints)))
    return Composition(goal, quantities, conditions, None, read_outputs(goal, quantities, conditions))


# Jones, Schonlau & Welch 1998 closed form; values from shared CHECKS.md §3 (recomputed with scipy there).
@pytest.mark.parametrize(("mu", "s", "best", "published"), [
    (0.0, 1.0, 0.0, 0.3989422804014327),
    (1.0, 1.0, 0.0, 0.08331547058768629),
    (-1.0, 1.0, 0.0, 1.0833154705876864),
    (0.0, 2.0, 1.0, 1.3955931148026122),
])
def test_mc_ei_of_one_gaussian_output_through_an_identity_goal_is_the_closed_form(mu: float, s: float, best: float,
                                                                               published: float) -> None:
    comp = _composition("y")
    Z = normal_base_samples(1, 512, seed=0)
    g = comp.objective(mu + s * Z)
    improvement = np.maximum(best - g, 0.0)
    tolerance = 4.0 * improvement.std() / math.sqrt(len(g))  # 4 Monte-Carlo standard errors
    ei = mc_expected_improvement(g[None, :], best)[0]
    assert abs(ei - published) <= tolerance
    assert float(expected_improvement(mu, s, best)) == pytest.approx(published, rel=1e-12)
    # the smoothed log form the search maximises is the same number to a part in 10^5
    assert math.exp(mc_log_expected_improvement(g[None, :], best, tau=1e-6)[0]) == pytest.approx(ei, rel=1e-5)


def test_mc_probability_of_feasibility_of_a_linear_constraint_is_phi_of_the_closed_form() -> None:
    # margin = 2 y[k=1] - y[k=2] - 0.5 with independent outputs is N(2 mu1 - mu2 - 0.5, 4 s1^2 + s2^2), so
    # P(feasible) = Phi(-mean/std) (Schonlau, Welch & Jones 1998). mean/std = -0.5 here, and CHECKS.md §3
    # gives Phi(0.5) = 0.6914624612740131.
    conditions = ({"k": 1.0}, {"k": 2.0})
    comp = _composition("y[k=1]", ("2*y[k=1] - y[k=2] <= 0.5",), conditions)
    s = np.array([0.25, 0.5])
    std = math.sqrt(4 * s[0] ** 2 + s[1] ** 2)
    mu = np.array([0.2, 0.4 - 0.5 + 0.5 * std])
    assert (2 * mu[0] - mu[1] - 0.5) / std == pytest.approx(-0.5, rel=1e-12)
    Z = normal_base_samples(2, 1024, seed=0)
    margins = comp.margins(mu + s * Z)[None, :, :]
    pf = mc_probability_of_feasibility(margins)[0]
    assert norm.cdf(0.5) == pytest.approx(0.6914624612740131, rel=1e-12)
    assert abs(pf - 0.6914624612740131) <= 4.0 * math.sqrt(0.6914624612740131 * (1 - 0.6914624612740131) / 1024)
    smooth = math.exp(mc_log_probability_of_feasibility(margins, tau=1e-3 * std)[0])
    assert smooth == pytest.approx(pf, abs=2e-3)


@pytest.mark.parametrize("source", [
    "max(lift) - min(lift)",
    "abs(p[mach=2.0] - 2.0) + 0.1 * sqrt(abs(drag[mach=1.1]))",
    "mean(drag) / baseline.drag[mach=0.6] - lift[mach=1.1] ** 2",
    "max(lift - mean(lift), drag) [mach=0.6] * 3" .replace(" [", "["),
    "sum((lift - baseline.lift) ** 2)",
    "min(lift[mach=0.6], drag[mach=2.0], 0.5)",
])
def test_vectorised_goal_equals_the_scalar_goal_on_random_values(source: str) -> None:
    # common practice, no source: the batch path must reproduce what scores every design
    conditions = [{"mach": m} for m in (0.6, 1.1, 2.0)]
    names = ["lift", "drag", "p"]
    expr = Expression.parse(source, where="goal.minimize")
    rng = np.random.default_rng(7)
    values = {q: rng.normal(size=(50, 3)) + 1.5 for q in names}
    base = {q: rng.normal(size=3) + 1.5 for q in names}
    batch = expr.evaluate_batch(values, base, conditions)
    for i in range(50):
        scalar = expr.evaluate({q: v[i] for q, v in values.items()}, base, conditions)
        np.testing.assert_allclose(np.broadcast_to(batch, (50, np.size(scalar)))[i], np.ravel(scalar), rtol=1e-12)
    con = Constraint.parse("drag - 0.2 * lift >= baseline.drag", where="goal.subject_to[0]")
    margins = con.margin_batch(values, base, conditions)
    assert margins.shape == (50,)
    for i in range(50):
        assert margins[i] == pytest.approx(con.margin({q: v[i] for q, v in values.items()}, base, conditions), rel=1e-12)


def test_the_goal_reads_only_the_outputs_it_names_and_the_mode_rule_says_why() -> None:
    conditions = [{"mach": 2.0}, {"mach": 3.0}]
    target = Goal("minimize", Expression.parse("abs(p[mach=2.0] - 2.0)", where="goal.minimize"), ())
    assert read_outputs(target, ["p", "q"], conditions) == (("p", 0),)
    assert model_rule(target, ["p", "q"], conditions) == ("composite", "it uses abs")
    swing = Goal("minimize", Expression.parse("max(lift) - min(lift)", where="goal.minimize"),
                 (Constraint.parse("drag <= baseline.drag", where="goal.subject_to[0]"),))
    mode, why = model_rule(swing, ["lift", "drag"], conditions)
    assert mode == "composite" and "lift at 2 conditions" in why and "max/min" in why
    plain = Goal("maximize", Expression.parse("lift[mach=2.0] - 2 * drag[mach=2.0]", where="goal.maximize"), ())
    assert model_rule(plain, ["lift", "drag"], conditions)[0] == "direct"
    assert composition_problem(swing, ["lift", "drag"], conditions) is None
    constant = Goal("minimize", Expression.parse("2.0", where="goal.minimize"), ())
    assert "reads at least one quantity" in (composition_problem(constant, ["lift"], conditions) or "")


# NACA Report 1135 (Ames Research Staff 1953) theta-beta-M and oblique-shock pressure ratios, gamma = 1.4;
# values from shared CHECKS.md §7 (M 2, theta 10 deg also in Cengel & Cimbala's worked example).
@pytest.mark.parametrize(("theta", "mach", "beta", "ratio"), [
    (10.0, 2.0, 39.3139, 1.70658),
    (20.0, 2.0, 53.4229, 2.84286),
    (10.0, 3.0, 27.3827, 2.05447),
    (10.0, 1.5, 56.6787, 1.66619),
])
def test_oblique_shock_relations_match_naca_1135(theta: float, mach: float, beta: float, ratio: float) -> None:
    assert oblique_shock_beta(theta, mach) == pytest.approx(beta, abs=5e-4)
    assert oblique_shock_pressure_ratio(theta, mach) == pytest.approx(ratio, abs=5e-5)


def test_target_problem_optimum_puts_the_pressure_ratio_exactly_on_two() -> None:
    problem = make_target()
    assert problem.optimum is not None
    theta = problem.optimum["ramp_angle"]
    # between the NACA 1135 rows theta = 10 deg (1.70658) and 20 deg (2.84286) at M 2
    assert 10.0 < theta < 20.0
    values = problem.solve({"ramp_angle": theta})
    assert values["p_ratio"][0] == pytest.approx(2.0, abs=1e-10)
    assert problem.goal.score(values, None, list(problem.conditions)).objective == pytest.approx(0.0, abs=1e-10)


def _target_history(thetas: list[float], pending: list[float] | None = None) -> tuple[History, object]:
    problem = make_target()
    comp = Composition(problem.goal, problem.quantities, problem.conditions, None,
                       read_outputs(problem.goal, problem.quantities, problem.conditions))
    values = [problem.solve({"ramp_angle": t}) for t in thetas]
    X = np.array(thetas)[:, None] / 20.0
    objective = np.array([problem.goal.score(v, None, list(problem.conditions)).objective for v in values])
    outputs = np.array([[v["p_ratio"][0]] for v in values])
    p = np.array(pending or [], dtype=float).reshape(-1, 1) / 20.0
    return History(X, objective, np.zeros((len(thetas), 0)), np.ones(len(thetas), bool), p, outputs, comp), problem


def test_composite_infill_on_the_target_lands_next_to_the_exact_angle() -> None:
    history, problem = _target_history([2.0, 8.0, 16.0, 19.0])
    proposal = propose_infill(history, FAST, seed=0)
    assert proposal is not None
    assert abs(20.0 * proposal.x[0] - problem.optimum["ramp_angle"]) < 0.2  # a direct GP of |p - 2| is off by degrees
    assert set(proposal.prediction.outputs) == {"p_ratio[mach=2]"}
    surface = optimize_surface(history, FAST, seed=0)
    assert surface is not None and abs(20.0 * surface.x[0] - problem.optimum["ramp_angle"]) < 0.2


def test_a_pending_design_has_no_std_and_no_improvement_left_in_composite_mode() -> None:
    # Kriging believer (Ginsbourger, Le Riche & Carraro 2010): the believed value counts as observed,
    # the incumbent included, so EI at the pending design itself is 0.
    history, _ = _target_history([2.0, 5.0, 18.0, 19.0], pending=[12.0])
    models = fit_composite(history, FAST, seed=0, for_infill=True)
    assert models is not None
    acq = _CompositeAcquisition(models, history, FAST)
    x = history.pending
    _, std = models.predict(x, acq.outputs)
    _, before = models.predict(x)
    assert std[0, 0] < 1e-2 * before[0, 0]
    alone, _ = _target_history([2.0, 5.0, 18.0, 19.0])
    without = _CompositeAcquisition(models, alone, FAST).improvement(x)[0]
    assert acq.improvement(x)[0] < 1e-2 * without


def test_an_infeasible_design_better_than_every_feasible_one_is_not_the_incumbent_in_composite_mode() -> None:
    conditions = ({"k": 1.0}, {"k": 2.0})
    comp = _composition("y[k=1]", ("y[k=2] <= 0",), conditions)
    X = np.array([[0.1], [0.3], [0.5], [0.7], [0.9]])
    outputs = np.column_stack([np.array([3.0, 2.0, -5.0, 1.0, 4.0]), np.array([-1.0, -1.0, 1.0, -1.0, -1.0])])
    margins = outputs[:, 1:]
    history = History(X, outputs[:, 0], margins, np.ones(5, bool), np.zeros((0, 1)), outputs, comp)
    proposal = propose_infill(history, FAST, seed=0)
    assert proposal is not None and proposal.incumbent == pytest.approx(1.0)


def test_a_design_that_failed_at_one_condition_still_trains_the_other_conditions_model() -> None:
    conditions = ({"k": 1.0}, {"k": 2.0})
    comp = _composition("max(y)", (), conditions)
    X = np.linspace(0.05, 0.95, 6)[:, None]
    outputs = np.column_stack([np.sin(4 * X[:, 0]), np.cos(3 * X[:, 0])])
    outputs[2, 1] = np.nan  # the case at k=2 failed, so the design failed
    succeeded = np.isfinite(outputs).all(axis=1)
    objective = np.where(succeeded, outputs.max(axis=1), np.nan)
    history = History(X, objective, np.zeros((6, 0)), succeeded, np.zeros((0, 1)), outputs, comp)
    models = fit_composite(history, FAST, seed=0, for_infill=True)
    assert models is not None
    assert len(models.outputs[0].X_) == 6 and len(models.outputs[1].X_) == 5
    assert propose_infill(history, FAST, seed=0) is not None


def test_config_mode_is_composite_for_the_demo_direct_when_asked_and_an_uncomposable_goal_is_refused(tmp_path) -> None:
    # common practice, no source: the rule of plan.infill.model and its one-line refusal
    import yaml

    from sortie.config import parse_config
    from sortie.errors import ConfigError
    from tests.conftest import ROOT

    raw = yaml.safe_load((ROOT / "configs" / "sled-aftbody.yaml").read_text())
    cfg = parse_config(yaml.safe_dump(raw), base_dir=ROOT / "configs")
    mode, why = cfg.surrogate_mode()
    assert mode == "composite" and "lift at 4 conditions" in why
    raw["plan"]["infill"] = {"model": "direct"}
    assert parse_config(yaml.safe_dump(raw), base_dir=ROOT / "configs").surrogate_mode() == ("direct", "set by plan.infill.model")
    raw["plan"]["infill"] = {"model": "composite"}
    raw["goal"] = {"minimize": "2.0"}
    with pytest.raises(ConfigError) as err:
        parse_config(yaml.safe_dump(raw), base_dir=ROOT / "configs")
    lines = [line for line in str(err.value).splitlines() if "plan.infill.model" in line]
    assert len(lines) == 1 and "reads at least one quantity" in lines[0]
