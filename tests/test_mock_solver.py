"""Tests of the analytic mock solver: published compressible-flow rules, the calibrated sled
physics, and the program's behaviour as a real subprocess (output, failures, logs, children).

Every comparison with an outside number names its source beside the check; "CHECKS.md §7"
refers to the shared CHECKS.md (../shared/CHECKS.md beside the project), which records where each value comes from.
"""

from __future__ import annotations

import ast
import math
import os
import signal
import subprocess
import sys
import time
from collections.abc import Mapping
from pathlib import Path

import numpy as np
import pytest

from sortie.mock_solver import cli, deck, physics

ROOT = Path(__file__).resolve().parents[1]
PACKAGE_DIR = ROOT / "mock_solver"
TEMPLATE = ROOT / "configs" / "cases" / "template" / "case.in"
BASELINE_DECK = {**{k: repr(v) for k, v in physics.BASELINE.items()}, "fin_count": "3"}


# --------------------------------------------------------------------------------------------
# helpers
# --------------------------------------------------------------------------------------------


def write_deck(folder: Path, name: str = "case.in", drop: tuple[str, ...] = (), **keys: object) -> Path:
    """Write a baseline deck at Mach 0.9 with ``keys`` added or replaced and ``drop`` removed."""
    entries: dict[str, object] = {**BASELINE_DECK, "mach": "0.9", **keys}
    lines = ["# test deck", *(f"{k} = {v}" for k, v in entries.items() if k not in drop)]
    path = folder / name
    path.write_text("\n".join(lines) + "\n")
    return path


def clean_env(**extra: str) -> dict[str, str]:
    """The current environment without stray SORTIE_MOCK_* knobs, plus ``extra``."""
    env = {k: v for k, v in os.environ.items() if not k.startswith(deck.ENV_PREFIX)}
    env.update(extra)
    return env


def run_solver(
    deck_path: Path, out: Path, env: Mapping[str, str] | None = None, timeout: float = 30
) -> subprocess.CompletedProcess[str]:
    """Run the mock exactly as an orchestrator would: a separate interpreter, files only."""
    return subprocess.run(
        [sys.executable, "-m", "sortie.mock_solver", str(deck_path), str(out)],
        capture_output=True,
        text=True,
        env=dict(env) if env is not None else clean_env(),
        timeout=timeout,
    )


def read_output(path: Path) -> dict[str, str]:
    entries = {}
    for line in path.read_text().splitlines():
        if line.strip() and not line.startswith("#"):
            key, value = (part.strip() for part in line.split("=", 1))
            entries[key] = value
    return entries


def alive(pid: int) -> bool:
    """True if ``pid`` runs and is not a zombie (a container's init may never reap zombies)."""
    try:
        stat = Path(f"/proc/{pid}/stat").read_text()
    except (FileNotFoundError, ProcessLookupError):
        return False
    return stat.rsplit(")", 1)[1].split()[0] != "Z"


def random_designs(n: int, seed: int) -> dict[str, np.ndarray]:
    rng = np.random.default_rng(seed)
    designs = {}
    for name in physics.ACTIVE_PARAMETERS:
        lo, hi = physics.BOUNDS[name]
        if name == "fin_count":
            designs[name] = rng.choice(physics.FIN_COUNTS, n).astype(float)
        else:
            designs[name] = lo + (hi - lo) * rng.random(n)
    return designs


# --------------------------------------------------------------------------------------------
# published rules
# --------------------------------------------------------------------------------------------


@pytest.mark.parametrize(
    ("mach", "factor"), [(0.3, 1.04828), (0.5, 1.15470), (0.7, 1.40028), (0.8, 1.66667)]
)
def test_prandtl_glauert_factor_matches_the_recomputed_values(mach: float, factor: float) -> None:
    # CHECKS.md §7: values recomputed from 1/√(1 − M²) [N]; the rule is Glauert 1928, Proc. R. Soc. A
    # 118:113, and Anderson, Fundamentals of Aerodynamics ch. 11 (both citations from memory).
    assert physics.prandtl_glauert(mach) == pytest.approx(factor, abs=5e-6)


@pytest.mark.parametrize(
    ("mach", "slope"), [(math.sqrt(2.0), 4.0), (1.5, 3.57771), (2.0, 2.30940), (3.0, 1.41421)]
)
def test_ackeret_lift_slope_matches_the_recomputed_values(mach: float, slope: float) -> None:
    # CHECKS.md §7: c_l = 4α/√(M² − 1), values recomputed [N]; Ackeret 1925, ZFM 16:72 and Anderson
    # ch. 12 are cited from memory (the formula was seen only on calculator pages).
    assert physics.ackeret_lift_slope(mach) == pytest.approx(slope, abs=5e-6)
    assert physics.ackeret(mach) == pytest.approx(slope / 4.0, abs=2e-6)


@pytest.mark.parametrize(
    ("mach", "cl_shock_expansion", "cl_ackeret"), [(1.6, 0.11441, 0.11179), (2.0, 0.08156, 0.08061), (3.0, 0.05055, 0.04937)]
)
def test_ackeret_lift_agrees_with_shock_expansion_theory_on_a_diamond_section(
        mach: float, cl_shock_expansion: float, cl_ackeret: float) -> None:
    # CHECKS.md §7, double-wedge table at t/c 0.08 and α = 2°: c_l from the oblique-shock and
    # Prandtl–Meyer relations (γ = 1.4) and Ackeret's linear c_l, both computed [N], not published.
    # The mock's only supersonic rule is Ackeret's lift slope; it must give the linear column and
    # stay within the few per cent that linear theory loses at this thickness and incidence.
    cl = physics.ackeret_lift_slope(mach) * math.radians(2.0)
    assert cl == pytest.approx(cl_ackeret, abs=5e-6)
    assert cl == pytest.approx(cl_shock_expansion, rel=0.03) and cl < cl_shock_expansion


@pytest.mark.parametrize(
    ("mach", "cp_kt", "cp_pg"),
    [
        (0.3, -0.530547, -0.524142),
        (0.5, -0.600578, -0.577350),
        (0.7, -0.777994, -0.700140),
        (0.8, -1.000000, -0.833333),
    ],
)
def test_karman_tsien_matches_the_recomputed_values(mach: float, cp_kt: float, cp_pg: float) -> None:
    # CHECKS.md §7: Cp0 = −0.5, both columns recomputed from the formulas [N]; the Kármán–Tsien rule is
    # von Kármán 1941, J. Aeronaut. Sci. 8:337 and Tsien 1939, J. Aeronaut. Sci. 6:399 (from memory).
    assert physics.karman_tsien(-0.5, mach) == pytest.approx(cp_kt, abs=5e-6)
    assert -0.5 * physics.prandtl_glauert(mach) == pytest.approx(cp_pg, abs=5e-6)


@pytest.mark.parametrize(
    ("mach", "cp_star"), [(0.6, -1.29434), (0.7, -0.77907), (0.8, -0.43464), (1.0, 0.0)]
)
def test_critical_cp_matches_the_recomputed_values(mach: float, cp_star: float) -> None:
    # CHECKS.md §7: Cp* recomputed from the isentropic formula (γ = 1.4) [N]; "Anderson, Fundamentals
    # of Aerodynamics eq. ≈11.60" is from memory (equation number not checked).
    assert physics.critical_cp(mach) == pytest.approx(cp_star, abs=5e-6)


def test_korn_and_lock_give_the_recomputed_example() -> None:
    # CHECKS.md §7, from memory: the Korn equation (Korn 1975; Mason's notes) and Lock's
    # 20(M − M_crit)⁴ rise, constants not checked against the sources. The example numbers are
    # recomputed [N]: κ_A = 0.95, t/c 0.12, c_l 0.5 → M_DD 0.780; slope 0.1 at M_DD → M_crit 0.672.
    assert physics.korn_drag_divergence(0.12, 0.5) == pytest.approx(0.780, abs=5e-4)
    m_crit = physics.korn_lock_critical_mach(0.12, 0.5)
    assert m_crit == pytest.approx(0.672, abs=5e-4)
    h = 1e-6
    slope = (physics.lock_drag_rise(0.78 + h, m_crit) - physics.lock_drag_rise(0.78 - h, m_crit))
    assert slope / (2 * h) == pytest.approx(0.10, rel=1e-3)  # M_DD where dC_D/dM = 0.1 (CHECKS §7, from memory)
    assert physics.lock_drag_rise(0.6, m_crit) == 0.0


def test_karman_tsien_critical_mach_matches_the_recomputed_example() -> None:
    # CHECKS.md §7: Cp0,min = −0.43 (NACA 0012 at α = 0, Anderson's example, from memory) → M_cr =
    # 0.723 with Kármán–Tsien, recomputed [N] (Anderson's text quotes about 0.74, also from memory)
    assert physics.karman_tsien_critical_mach(-0.43) == pytest.approx(0.723, abs=5e-4)
    m_cr = physics.karman_tsien_critical_mach(-0.43)
    assert physics.karman_tsien(-0.43, m_cr) == pytest.approx(physics.critical_cp(m_cr), abs=1e-9)


def test_compressibility_factor_is_continuous_and_finite_from_mach_0_3_to_2() -> None:
    grid = np.linspace(0.3, 2.0, 17_001)  # step 1e-4
    factor = np.asarray(physics.compressibility_factor(grid))
    assert np.all(np.isfinite(factor))
    assert np.all(factor > 0)
    # Largest slope of the factor is about 4 per unit Mach, so 1e-4 steps move it < 1e-3;
    # a branch mismatch at M 0.8 or 1.2 would show as a jump of order 0.1–1.
    assert np.max(np.abs(np.diff(factor))) < 1e-3
    assert physics.compressibility_factor(1.0) < 3.0  # no sonic singularity


def test_compressibility_factor_follows_prandtl_glauert_and_ackeret_outside_the_bridge() -> None:
    for mach in (0.3, 0.5, 0.7, 0.8):
        assert physics.compressibility_factor(mach) == pytest.approx(physics.prandtl_glauert(mach))
    for mach in (1.2, 1.5, 2.0):
        # Ackeret lift slope relative to the incompressible thin-airfoil 2π
        expected = physics.ackeret_lift_slope(mach) / (2.0 * math.pi)
        assert physics.compressibility_factor(mach) == pytest.approx(expected)


# --------------------------------------------------------------------------------------------
# calibrated sled physics
# --------------------------------------------------------------------------------------------


def test_baseline_lift_swings_from_downforce_subsonic_to_lift_supersonic() -> None:
    lifts = [physics.evaluate(physics.BASELINE, m)["lift"] for m in physics.SWING_MACHS]
    assert lifts[0] < -0.2 and lifts[1] < -0.2  # downforce at M 0.6 and 0.9
    assert lifts[3] > 0.2  # positive lift at M 1.3
    assert physics.lift_swing(physics.BASELINE) > 0.8


def test_evaluate_is_pure_deterministic_and_ignores_extra_keys() -> None:
    params = {**physics.BASELINE, "livery_band_width": 0.2}
    first = physics.evaluate(params, 1.1)
    assert first == physics.evaluate(dict(physics.BASELINE), 1.1)
    assert set(first) == {"lift", "drag"}
    assert all(isinstance(v, float) and math.isfinite(v) for v in first.values())
    assert params == {**physics.BASELINE, "livery_band_width": 0.2}  # input not modified
    with pytest.raises(KeyError):
        physics.evaluate({"ramp_angle": 8.0}, 0.9)


def test_forces_are_finite_over_the_whole_accepted_input_range() -> None:
    rng = np.random.default_rng(5)
    n = 5000
    params = {}
    for name in physics.ACTIVE_PARAMETERS:
        lo, hi = physics.HARD_LIMITS[name]
        params[name] = lo + (hi - lo) * rng.random(n)
    params["fin_count"] = rng.choice(physics.FIN_COUNTS, n).astype(float)
    for mach in np.linspace(*physics.MACH_RANGE, 35):
        lift, drag = physics.forces(params, mach)
        assert np.all(np.isfinite(lift)) and np.all(np.isfinite(drag))
        assert np.all(drag > 0)


def test_shock_onset_mach_falls_with_ramp_angle_and_rises_with_boattail_length() -> None:
    assert physics.shock_onset_mach(12.0, 0.7) < physics.shock_onset_mach(4.0, 0.7)
    assert physics.shock_onset_mach(8.0, 0.4) < physics.shock_onset_mach(8.0, 1.1)


def test_drag_trends_follow_the_described_physics() -> None:
    def drag(mach: float, **change: float) -> float:
        return physics.evaluate({**physics.BASELINE, **change}, mach)["drag"]

    for mach in physics.SWING_MACHS:
        assert drag(mach, fin_count=2) < drag(mach) < drag(mach, fin_count=4)
        assert drag(mach, boattail_length=0.9) < drag(mach, boattail_length=0.5)
        assert drag(mach, ramp_angle=4.0) < drag(mach, ramp_angle=12.0)
    # wave drag grows with strut thickness once supersonic
    assert drag(1.5, strut_thickness=0.09) - drag(1.5, strut_thickness=0.03) > 0.01
    # the drag rises steeply through the transonic range
    assert drag(1.1) > 2.0 * drag(0.6)


def test_swing_minimum_lies_inside_the_box_and_drag_constraint_cuts_through_it() -> None:
    # Guards the calibration that makes the demo campaign worth running (numbers from the
    # helper's 20 000-point scan: baseline swing 1.00, constrained minimum ≈ 0.42).
    designs = random_designs(20_000, seed=1)
    swing = np.asarray(physics.lift_swing(designs))
    base_swing = physics.lift_swing(physics.BASELINE)
    feasible = np.ones(swing.shape, dtype=bool)
    for mach in physics.SWING_MACHS:
        base_drag = physics.evaluate(physics.BASELINE, mach)["drag"]
        feasible &= physics.forces(designs, mach)[1] <= base_drag
    assert 0.2 <= feasible.mean() <= 0.6
    best = int(np.argmin(swing))
    best_feasible = int(np.flatnonzero(feasible)[np.argmin(swing[feasible])])
    assert not feasible[best]  # the constraint removes the unconstrained optimum
    assert swing[best_feasible] <= 0.5 * base_swing
    for index in (best, best_feasible):
        for name in physics.ACTIVE_PARAMETERS:
            if name == "fin_count":
                continue
            lo, hi = physics.BOUNDS[name]
            position = (designs[name][index] - lo) / (hi - lo)
            assert 0.05 < position < 0.95, (name, position)
    assert np.ptp(swing) > 5.0 * base_swing  # the objective varies a lot across the box


# --------------------------------------------------------------------------------------------
# deck parsing (in-process, fast)
# --------------------------------------------------------------------------------------------


def test_mesh_fail_region_is_parsed_by_hand_and_matched() -> None:
    region = deck.parse_region("ramp_angle > 12 and diffuser_angle >= 9")
    assert [str(c) for c in region] == ["ramp_angle > 12", "diffuser_angle >= 9"]
    assert deck.in_region(region, {"ramp_angle": 13.0, "diffuser_angle": 9.0})
    assert not deck.in_region(region, {"ramp_angle": 13.0, "diffuser_angle": 8.9})
    assert not deck.in_region((), {"ramp_angle": 13.0})
    for bad in ("ramp_angle = 3", "__import__('os') > 1", "ramp_angle > 3 or mach < 1", "x > 1"):
        with pytest.raises(deck.DeckError):
            deck.parse_region(bad)


def test_environment_knobs_override_deck_knobs() -> None:
    parsed = deck.parse_deck("crash_rate = 1\nnoise = 0.5\n")
    knobs = deck.resolve_knobs(parsed, {"SORTIE_MOCK_CRASH_RATE": "0"})
    assert knobs.crash_rate == 0.0
    assert knobs.noise == 0.5


def test_outcomes_are_reproducible_for_a_seed_and_follow_the_rates() -> None:
    def fate(seed: int, ramp: float) -> cli.Fate:
        text = "\n".join(
            [*(f"{k} = {v}" for k, v in BASELINE_DECK.items() if k != "ramp_angle"),
             f"ramp_angle = {ramp}", "mach = 0.9", "crash_rate = 0.3", "noise = 0.01",
             f"seed = {seed}"]
        )
        return cli.decide_fate(deck.build_case(deck.parse_deck(text), {}, "test"))

    ramps = np.linspace(2.0, 14.0, 400)
    outcomes = [fate(0, r).outcome for r in ramps]
    assert outcomes == [fate(0, r).outcome for r in ramps]
    assert 0.2 < outcomes.count("crash") / len(outcomes) < 0.4
    assert fate(0, 8.0).noise_lift != fate(1, 8.0).noise_lift


# --------------------------------------------------------------------------------------------
# the program as a real subprocess
# --------------------------------------------------------------------------------------------


def test_program_writes_parsable_output_equal_to_the_physics(tmp_path: Path) -> None:
    out = tmp_path / "result.out"
    result = run_solver(write_deck(tmp_path), out)
    assert result.returncode == 0, result.stderr
    assert out.read_text().startswith("# sortie mock solver: rocket-sled aft body\n")
    values = read_output(out)
    expected = physics.evaluate(physics.BASELINE, 0.9)
    assert float(values["mach"]) == 0.9
    assert float(values["lift"]) == expected["lift"]  # repr precision round-trips exactly
    assert float(values["drag"]) == expected["drag"]
    assert values["converged"] == "yes"
    assert not list(tmp_path.glob(".mock-solver-*"))  # no temporary file left behind


def test_installed_console_script_runs(tmp_path: Path) -> None:
    script = Path(sys.executable).parent / "sortie-mock-solver"
    if not script.exists():
        pytest.skip("console script not installed in this environment")
    out = tmp_path / "r.out"
    result = subprocess.run(
        [str(script), str(write_deck(tmp_path)), str(out)],
        capture_output=True, text=True, env=clean_env(), timeout=30,
    )
    assert result.returncode == 0, result.stderr
    assert "lift" in read_output(out)


def test_extra_keys_are_inert_and_listed_once_on_stderr(tmp_path: Path) -> None:
    out = tmp_path / "r.out"
    result = run_solver(write_deck(tmp_path, livery_band_width=0.2, sensor_mast_height=0.4), out)
    assert result.returncode == 0
    lines = result.stderr.strip().splitlines()
    assert len(lines) == 1 and "livery_band_width" in lines[0] and "sensor_mast_height" in lines[0]
    assert float(read_output(out)["lift"]) == physics.evaluate(physics.BASELINE, 0.9)["lift"]


def test_missing_key_exits_2_with_one_sentence_and_no_traceback(tmp_path: Path) -> None:
    out = tmp_path / "r.out"
    result = run_solver(write_deck(tmp_path, drop=("skirt_gap",)), out)
    assert result.returncode == 2
    assert len(result.stderr.strip().splitlines()) == 1
    assert "skirt_gap" in result.stderr and "Traceback" not in result.stderr
    assert not out.exists()


@pytest.mark.parametrize(
    ("keys", "env", "word"),
    [
        ({"mach": "2.5"}, {}, "0.3 to 2.0"),
        ({"mach": "fast"}, {}, "not a number"),
        ({"fin_count": "2.5"}, {}, "fin_count"),
        ({"ramp_angle": "45"}, {}, "ramp_angle"),
        ({}, {"SORTIE_MOCK_CRASH_RATE": "1.5"}, "probability"),
        ({}, {"SORTIE_MOCK_MESH_FAIL_REGION": "tail_colour > 1"}, "tail_colour"),
        ({"seed": "1.5"}, {}, "seed"),
        ({"log": "/no/such/folder/runs.log"}, {}, "does not exist"),
    ],
)
def test_bad_values_exit_2_with_one_line_naming_the_problem(
    tmp_path: Path, capsys: pytest.CaptureFixture[str], keys: dict[str, str],
    env: dict[str, str], word: str,
) -> None:
    # In-process through cli.main (same code path as the console script) to keep the suite fast;
    # the subprocess form is covered by the missing-key test above.
    out = tmp_path / "r.out"
    code = cli.main([str(write_deck(tmp_path, **keys)), str(out)], environ=clean_env(**env))
    stderr = capsys.readouterr().err
    assert code == 2
    assert len(stderr.strip().splitlines()) == 1
    assert word in stderr and "Traceback" not in stderr
    assert not out.exists()


def test_malformed_deck_lines_and_wrong_arguments_exit_2(
    tmp_path: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    bad = tmp_path / "bad.in"
    out = str(tmp_path / "r.out")
    bad.write_text("ramp_angle 8\n")
    assert cli.main([str(bad), out], environ=clean_env()) == 2
    assert "line 1" in capsys.readouterr().err
    bad.write_text("mach = 0.9\nmach = 1.1\n")
    assert cli.main([str(bad), out], environ=clean_env()) == 2
    assert "twice" in capsys.readouterr().err
    assert cli.main([str(bad)], environ=clean_env()) == 2
    assert "exactly two arguments" in capsys.readouterr().err
    assert cli.main([str(tmp_path / "missing.in"), out], environ=clean_env()) == 2
    assert "does not exist" in capsys.readouterr().err
    assert cli.main([str(write_deck(tmp_path)), "/no/such/folder/r.out"], environ=clean_env()) == 2
    assert "does not exist" in capsys.readouterr().err


def test_crash_exits_with_configured_code_and_writes_no_output(tmp_path: Path) -> None:
    out = tmp_path / "r.out"
    result = run_solver(write_deck(tmp_path, crash_rate=1), out)
    assert result.returncode == 3 and result.stderr.strip() and not out.exists()
    result = run_solver(
        write_deck(tmp_path), out, env=clean_env(SORTIE_MOCK_CRASH_RATE="1",
                                                 SORTIE_MOCK_CRASH_EXIT_CODE="7"))
    assert result.returncode == 7 and not out.exists()


def test_garbage_outcome_writes_non_numeric_output(tmp_path: Path) -> None:
    out = tmp_path / "r.out"
    result = run_solver(write_deck(tmp_path, garbage_rate=1), out)
    assert result.returncode == 0
    values = read_output(out)
    for key in ("lift", "drag"):
        with pytest.raises(ValueError):
            float(values[key])


def test_nan_outcome_writes_nan_lift(tmp_path: Path) -> None:
    out = tmp_path / "r.out"
    result = run_solver(write_deck(tmp_path, nan_rate=1), out)
    assert result.returncode == 0
    values = read_output(out)
    assert math.isnan(float(values["lift"]))
    assert math.isfinite(float(values["drag"]))


def test_mesh_fail_region_exits_4_inside_and_runs_outside(tmp_path: Path) -> None:
    region = "ramp_angle > 12 and diffuser_angle > 9"
    out = tmp_path / "r.out"
    inside = run_solver(write_deck(tmp_path, ramp_angle=13, diffuser_angle=10,
                                   mesh_fail_region=region), out)
    assert inside.returncode == 4 and inside.stderr.startswith("mesh generation failed:")
    assert not out.exists()
    outside = run_solver(write_deck(tmp_path, ramp_angle=13, diffuser_angle=8,
                                    mesh_fail_region=region), out)
    assert outside.returncode == 0 and out.exists()


def test_same_seed_reproduces_noisy_output_and_another_seed_changes_it(tmp_path: Path) -> None:
    def lift(seed: int, name: str) -> str:
        out = tmp_path / name
        env = clean_env(SORTIE_MOCK_NOISE="0.05", SORTIE_MOCK_SEED=str(seed))
        assert run_solver(write_deck(tmp_path), out, env=env).returncode == 0
        return read_output(out)["lift"]

    first, again, other = lift(4, "a.out"), lift(4, "b.out"), lift(5, "c.out")
    assert first == again
    assert first != other
    assert float(first) != physics.evaluate(physics.BASELINE, 0.9)["lift"]


def test_log_records_start_and_finish_lines_with_outcome(tmp_path: Path) -> None:
    log = tmp_path / "runs.log"
    deck_path = write_deck(tmp_path, log=log)
    assert run_solver(deck_path, tmp_path / "a.out").returncode == 0
    env = clean_env(SORTIE_MOCK_CRASH_RATE="1")
    assert run_solver(deck_path, tmp_path / "b.out", env=env).returncode == 3
    env = clean_env(SORTIE_MOCK_MESH_FAIL_REGION="mach > 0.5")
    assert run_solver(deck_path, tmp_path / "c.out", env=env).returncode == 4
    lines = [line.split() for line in log.read_text().splitlines()]
    assert [line[0] for line in lines] == ["start", "finish"] * 3
    assert all(line[2] == os.path.abspath(deck_path) for line in lines)
    assert [line[3] for line in lines if line[0] == "finish"] == ["ok", "crash", "meshfail"]
    assert lines[0][1] == lines[1][1] and lines[0][1].isdigit()


def test_run_time_delays_the_answer(tmp_path: Path) -> None:
    started = time.monotonic()
    result = run_solver(write_deck(tmp_path), tmp_path / "r.out",
                        env=clean_env(SORTIE_MOCK_RUN_TIME_S="0.3"))
    assert result.returncode == 0
    assert time.monotonic() - started >= 0.3


def _spawned_pids(stderr_text: str) -> tuple[int, int]:
    for line in stderr_text.splitlines():
        if "spawned child pid" in line:
            words = line.split()
            return int(words[words.index("child") + 2]), int(words[-1])
    raise AssertionError(f"no spawn line in {stderr_text!r}")


def test_children_of_a_normal_run_are_removed_when_it_ends(tmp_path: Path) -> None:
    result = run_solver(write_deck(tmp_path, spawn_children=1), tmp_path / "r.out")
    assert result.returncode == 0
    child, grandchild = _spawned_pids(result.stderr)
    deadline = time.monotonic() + 5
    while (alive(child) or alive(grandchild)) and time.monotonic() < deadline:
        time.sleep(0.05)
    assert not alive(child) and not alive(grandchild)


def test_hang_runs_until_killed_and_a_group_kill_removes_children(tmp_path: Path) -> None:
    log = tmp_path / "runs.log"
    err = tmp_path / "stderr.txt"
    deck_path = write_deck(tmp_path, hang_rate=1, spawn_children=1, log=log)
    with err.open("w") as err_handle:
        proc = subprocess.Popen(
            [sys.executable, "-m", "sortie.mock_solver", str(deck_path), str(tmp_path / "r.out")],
            stderr=err_handle, stdout=subprocess.DEVNULL, env=clean_env(), start_new_session=True,
        )
    try:
        deadline = time.monotonic() + 20
        while "spawned child pid" not in err.read_text() and time.monotonic() < deadline:
            time.sleep(0.05)
        child, grandchild = _spawned_pids(err.read_text())
        time.sleep(0.3)
        assert proc.poll() is None  # still hanging
        assert alive(child) and alive(grandchild)
        assert os.getpgid(child) == proc.pid and os.getpgid(grandchild) == proc.pid
    finally:
        os.killpg(proc.pid, signal.SIGKILL)
        proc.wait(timeout=10)
    deadline = time.monotonic() + 5
    while (alive(child) or alive(grandchild)) and time.monotonic() < deadline:
        time.sleep(0.05)
    assert not alive(child) and not alive(grandchild)
    assert [line.split()[0] for line in log.read_text().splitlines()] == ["start"]
    assert not (tmp_path / "r.out").exists()


# --------------------------------------------------------------------------------------------
# packaging and template
# --------------------------------------------------------------------------------------------


def test_mock_solver_imports_only_numpy_and_the_standard_library() -> None:
    allowed = set(sys.stdlib_module_names) | {"numpy", "__future__"}
    for source in PACKAGE_DIR.glob("*.py"):
        tree = ast.parse(source.read_text())
        for node in ast.walk(tree):
            if isinstance(node, ast.Import):
                names = [alias.name for alias in node.names]
            elif isinstance(node, ast.ImportFrom) and node.level == 0 and node.module:
                names = [node.module]
            else:
                continue
            for name in names:
                assert name.split(".")[0] in allowed, f"{source.name} imports {name}"


def test_template_renders_to_a_deck_the_solver_accepts() -> None:
    jinja2 = pytest.importorskip("jinja2")
    env = jinja2.Environment(undefined=jinja2.StrictUndefined, keep_trailing_newline=True)
    template = env.from_string(TEMPLATE.read_text())
    text = template.render(**physics.BASELINE, mach=1.1)
    parsed = deck.parse_deck(text)
    assert set(parsed) == {*physics.ACTIVE_PARAMETERS, "mach"}  # no knobs in the template
    case = deck.build_case(parsed, {}, "rendered template")
    assert case.mach == 1.1 and case.params == physics.BASELINE
    with pytest.raises(jinja2.UndefinedError):
        template.render(mach=1.1)
    extra = deck.parse_deck(
        template.render(**physics.BASELINE, mach=1.1, livery_band_width=0.1)
    )
    assert deck.build_case(extra, {}, "rendered template").ignored_keys == ("livery_band_width",)
