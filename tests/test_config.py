"""Bad campaign configs are refused with one clear line per problem, never a traceback.

Every case starts from the demo config (configs/sled-aftbody.yaml, invented rocket-sled data),
changes one thing, and expects exactly one problem line that begins with the offending key path.
The same cases run twice: in-process through :func:`sortie.config.parse_config` (unit speed)
and through the real ``sortie check`` command as a subprocess (exit code 2, ``error: `` lines on
stderr). The subprocesses run concurrently from one module fixture, since each one costs 1-2 s
of interpreter start-up.
"""

from __future__ import annotations

import os
import subprocess
import sys
from collections.abc import Callable
from concurrent.futures import ThreadPoolExecutor
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import pytest
import yaml

from sortie.adapters.registry import check_solver
from sortie.config import CampaignConfig, parse_config
from sortie.errors import ConfigError

ROOT = Path(__file__).resolve().parents[1]
DEMO = ROOT / "configs" / "sled-aftbody.yaml"
DEMO_TEXT = DEMO.read_text(encoding="utf-8")
CONFIG_NAME = "campaign.yaml"
CLI_TIMEOUT_S = 120


def _demo() -> dict[str, Any]:
    return yaml.safe_load(DEMO_TEXT)


def _line_of(text: str, prefix: str) -> int:
    """1-based number of the first line of ``text`` that starts with ``prefix``."""
    return next(i for i, line in enumerate(text.splitlines(), start=1) if line.startswith(prefix))


@dataclass(frozen=True)
class BadConfig:
    """One bad config: how to make it, where the problem is, and words the message must hold.

    ``key`` is what the problem line must start with: a key path such as ``parameters.ramp_angle``,
    or for a file that is not YAML at all, ``{file}`` and the line number. ``{file}`` stands for
    the config path as given on the command line.
    """

    id: str
    key: str
    expect: tuple[str, ...] = ()
    mutate: Callable[[dict[str, Any]], Any] | None = None
    text: str | None = None
    marks: tuple[Any, ...] = field(default=())

    def config_text(self) -> str:
        if self.text is not None:
            return self.text
        config = _demo()
        assert self.mutate is not None
        replaced = self.mutate(config)
        return yaml.safe_dump(replaced if replaced is not None else config, sort_keys=False)


def _param(name: str, **spec: Any) -> Callable[[dict[str, Any]], None]:
    return lambda c: c["parameters"].__setitem__(name, spec)


def _set(section: str, **values: Any) -> Callable[[dict[str, Any]], None]:
    return lambda c: c[section].update(values)


def _quantity(name: str, **values: Any) -> Callable[[dict[str, Any]], None]:
    return lambda c: c["quantities"][name].update(values)


def _rename_top(old: str, new: str) -> Callable[[dict[str, Any]], None]:
    return lambda c: c.__setitem__(new, c.pop(old))


def _fix_all(c: dict[str, Any]) -> None:
    for spec in c["parameters"].values():
        spec["fixed"] = True


_TAB_TEXT = DEMO_TEXT.replace("  seed: 7", "\tseed: 7", 1)
_INDENT_TEXT = DEMO_TEXT.replace("  seed: 7", "    seed: 7", 1)
_SEED_LINE = _line_of(DEMO_TEXT, "  seed: 7")


BAD_CONFIGS = [
    BadConfig("upper-below-lower", "parameters.ramp_angle", ("upper (2) must be greater than lower (14)",),
              _param("ramp_angle", lower=14.0, upper=2.0, baseline=8.0, unit="deg")),
    BadConfig("baseline-outside-bounds", "parameters.ramp_angle", ("baseline (20)", "between lower (2) and upper (14)"),
              _param("ramp_angle", lower=2.0, upper=14.0, baseline=20.0)),
    BadConfig("baseline-not-a-choice", "parameters.fin_count", ("baseline (5)", "one of the choices [2, 3, 4]"),
              _param("fin_count", choices=[2, 3, 4], baseline=5)),
    BadConfig("choices-and-bounds", "parameters.fin_count", ("either choices or lower/upper",),
              _param("fin_count", choices=[2, 3, 4], lower=2, upper=4, baseline=3)),
    BadConfig("integer-with-fractional-bound", "parameters.fin_count", ("whole-number",),
              _param("fin_count", lower=2, upper=4.5, integer=True, baseline=3)),
    BadConfig("misspelled-top-level-key", "slot", ("unknown key", "did you mean 'slots'?"), _rename_top("slots", "slot")),
    BadConfig("misspelled-parameter-key", "parameters.ramp_angle.uper", ("unknown key", "did you mean 'upper'?"),
              _param("ramp_angle", lower=2.0, uper=14.0, baseline=8.0)),
    BadConfig("missing-goal-section", "goal", ("required key is missing",), lambda c: c.pop("goal") and None),
    BadConfig("parameter-named-max", "parameters.max", ("reserved",), _param("max", lower=0.0, upper=1.0, baseline=0.5)),
    BadConfig("name-used-twice", "quantities.drag", ("already used in parameters",),
              _param("drag", lower=0.0, upper=1.0, baseline=0.5)),
    BadConfig("every-parameter-fixed", "parameters", ("at least one must be free",), _fix_all),
    BadConfig("campaign-name-not-a-folder-name", "campaign.name", ("'sled aft/body'", "names a folder"),
              _set("campaign", name="sled aft/body")),
    BadConfig("conditions-of-unequal-length", "conditions", ("same length", "mach has 4", "yaw_deg has 2"),
              _set("conditions", yaw_deg=[0.0, 4.0])),
    BadConfig("misspelled-adapter", "solver.adapter", ("'comand' is not an installed adapter", "did you mean 'command'?"),
              _set("solver", adapter="comand")),
    BadConfig("unknown-command-option", "solver.timeout", ("unknown key", "did you mean 'timeout_s'?"),
              _set("solver", timeout=30)),
    BadConfig("missing-template-folder", "solver.template", ("no-such-template", "is not a folder"),
              _set("solver", template="cases/no-such-template")),
    BadConfig("program-not-on-path", "solver.command", ("'sled-solver-not-installed'", "not found on PATH"),
              _set("solver", command=["sled-solver-not-installed", "case.in"])),
    BadConfig("negative-timeout", "solver.timeout_s", ("greater than 0", "-5"), _set("solver", timeout_s=-5)),
    BadConfig("pattern-without-value-group", "quantities.lift", ("(?P<value>...)",),
              _quantity("lift", pattern=r"lift\s*=\s*(\S+)")),
    BadConfig("quantity-with-two-rules", "quantities.drag", ("one reading rule, not 2", "pattern, key"),
              _quantity("drag", pattern=r"drag\s*=\s*(?P<value>\S+)")),
    BadConfig("invalid-regex", "quantities.lift", ("not a valid regular expression",),
              _quantity("lift", pattern=r"lift\s*=\s*(?P<value>\S+")),
    BadConfig("minimize-and-maximize", "goal", ("exactly one of minimize or maximize",), _set("goal", maximize="mean(drag)")),
    BadConfig("goal-unknown-quantity", "goal.minimize", ("unknown quantity 'lyft'", "known quantities: drag, lift"),
              _set("goal", minimize="max(lyft) - min(lyft)")),
    BadConfig("goal-attribute-access", "goal.minimize", ("attribute access", "baseline.<quantity>"),
              _set("goal", minimize="max(lift.__class__)")),
    BadConfig("goal-calls-import", "goal.minimize", ("'__import__'", "not allowed"),
              _set("goal", minimize="__import__('os')")),
    BadConfig("goal-calls-eval", "goal.minimize", ("'eval'", "not allowed"), _set("goal", minimize="eval('1')")),
    BadConfig("goal-lambda", "goal.minimize", ("not allowed",), _set("goal", minimize="(lambda: 1)()")),
    BadConfig("constraint-calls-open", "goal.subject_to[0]", ("'open'", "not allowed"),
              _set("goal", subject_to=["open('case.in') <= 1"])),
    BadConfig("constraint-not-a-comparison", "goal.subject_to[0]", ("must be one comparison",),
              _set("goal", subject_to=["drag - baseline.drag"])),
    BadConfig("objective-stays-a-vector", "goal.minimize", ("one value per condition", "[mach=...]"),
              _set("goal", minimize="lift")),
    BadConfig("selector-at-unlisted-condition", "goal.minimize", ("mach=2", "not one of the campaign's conditions"),
              _set("goal", minimize="drag[mach=2.0]")),
    BadConfig("selector-of-unknown-condition", "goal.minimize", ("unknown condition 'speed'",),
              _set("goal", minimize="drag[speed=1.1]")),
    BadConfig("selector-value-is-a-string", "goal.minimize", ("not of the form name=number",),
              _set("goal", minimize="drag[mach='fast']")),
    BadConfig("selector-value-is-none", "goal.minimize", ("not of the form name=number",),
              _set("goal", minimize="drag[mach=None]")),
    BadConfig("budget-below-initial-design", "budget.designs", ("10 cannot hold", "16 designs", "at least 17"),
              _set("budget", designs=10)),
    BadConfig("sobol-without-designs", "plan.initial", ("'sobol' needs the number of designs",),
              _set("plan", initial={"method": "sobol"})),
    BadConfig("designs-for-central-composite", "plan.initial", ("sets its own number of designs",),
              _set("plan", initial={"method": "central-composite", "designs": 10})),
    BadConfig("unknown-sampling-method", "plan.initial.method", ("'sobel'", "'sobol'"),
              _set("plan", initial={"method": "sobel", "designs": 16})),
    BadConfig("zero-slots", "slots", ("greater than 0", "got 0"), lambda c: c.update(slots=0)),
    BadConfig("yaml-tab-indent", f"{{file}} line {_SEED_LINE}", ("not valid YAML", "tab"), text=_TAB_TEXT),
    BadConfig("yaml-over-indent", f"{{file}} line {_SEED_LINE}", ("not valid YAML",), text=_INDENT_TEXT),
    BadConfig("top-level-is-a-list", "{file}", ("top level must be a mapping", "got list"),
              text="- campaign\n- parameters\n"),
]
CASE_PARAMS = [pytest.param(case, id=case.id, marks=case.marks) for case in BAD_CONFIGS]

# Several problems of the field level at once; each line must be reported in the same pass.
MANY_PROBLEMS = {
    "parameters.ramp_angle": _param("ramp_angle", lower=14.0, upper=2.0, baseline=8.0),
    "quantities.lift": _quantity("lift", pattern=r"lift=(?P<value>\S+"),
    "plan.initial": _set("plan", initial={"method": "sobol"}),
    "slots": lambda c: c.update(slots=0),
    "solver.adapter": _set("solver", adapter="comand"),
}


def _many_problems_text() -> str:
    config = _demo()
    for mutate in MANY_PROBLEMS.values():
        mutate(config)
    return yaml.safe_dump(config, sort_keys=False)


def _write_campaign(folder: Path, text: str) -> Path:
    """Write ``text`` as a config beside its own solver template folder (cases/template)."""
    folder.mkdir(parents=True, exist_ok=True)
    template = folder / "cases" / "template"
    template.mkdir(parents=True, exist_ok=True)
    (template / "case.in").write_text("ramp_angle = {{ ramp_angle }}\nmach = {{ mach }}\n")
    path = folder / CONFIG_NAME
    path.write_text(text, encoding="utf-8")
    return path


def _check_problem_lines(lines: list[str], case: BadConfig, file: str) -> None:
    key = case.key.format(file=file)
    assert len(lines) == 1, f"expected one problem line, got {lines}"
    line = lines[0]
    assert line.startswith(f"{key}:") or line.startswith(f"{key},"), f"{line!r} does not start with {key!r}"
    for words in case.expect:
        assert words in line, f"{words!r} not in {line!r}"


# --- in-process: unit speed -------------------------------------------------------------------


@pytest.mark.parametrize("case", CASE_PARAMS)
def test_parse_config_names_the_key_of_each_single_problem(case: BadConfig, tmp_path: Path) -> None:
    path = _write_campaign(tmp_path, case.config_text())
    with pytest.raises(ConfigError) as info:
        parse_config(path.read_text(), base_dir=tmp_path, source=CONFIG_NAME, check_solver=check_solver)
    _check_problem_lines(info.value.problems, case, CONFIG_NAME)
    assert str(info.value) == "\n".join(info.value.problems)


def test_parse_config_accepts_the_demo_config() -> None:
    config = parse_config(DEMO_TEXT, base_dir=DEMO.parent, source=str(DEMO), check_solver=check_solver)
    assert isinstance(config, CampaignConfig)
    assert list(config.parameters) == ["ramp_angle", "boattail_length", "diffuser_angle", "strut_thickness",
                                       "skirt_gap", "fin_count", "sensor_mast_height", "livery_band_width"]
    assert config.condition_list() == [{"mach": 0.6}, {"mach": 0.9}, {"mach": 1.1}, {"mach": 1.3}]
    assert config.goal.sense == "minimize"


def test_parse_config_reports_every_field_problem_in_one_pass(tmp_path: Path) -> None:
    path = _write_campaign(tmp_path, _many_problems_text())
    with pytest.raises(ConfigError) as info:
        parse_config(path.read_text(), base_dir=tmp_path, check_solver=check_solver)
    problems = info.value.problems
    assert len(problems) == len(MANY_PROBLEMS), problems
    for key in MANY_PROBLEMS:
        assert sum(line.startswith(f"{key}:") for line in problems) == 1, (key, problems)


def test_parse_config_reports_goal_problems_together_with_field_problems(tmp_path: Path) -> None:
    config = _demo()
    config["parameters"]["ramp_angle"] = {"lower": 14.0, "upper": 2.0, "baseline": 8.0}
    config["goal"]["minimize"] = "max(lyft) - min(lyft)"
    with pytest.raises(ConfigError) as info:
        parse_config(yaml.safe_dump(config), base_dir=tmp_path)
    keys = {line.split(":", 1)[0] for line in info.value.problems}
    assert keys == {"parameters.ramp_angle", "goal.minimize"}, info.value.problems


def test_parse_config_without_solver_check_skips_adapter_problems(tmp_path: Path) -> None:
    config = _demo()
    config["solver"]["command"] = ["sled-solver-not-installed"]
    parsed = parse_config(yaml.safe_dump(config), base_dir=tmp_path)
    assert parsed.solver["command"] == ["sled-solver-not-installed"]


# --- through the real command line ------------------------------------------------------------


def _sortie_check(path: Path) -> subprocess.CompletedProcess[str]:
    return subprocess.run([sys.executable, "-m", "sortie.cli", "check", str(path)], cwd=path.parent,
                          capture_output=True, text=True, timeout=CLI_TIMEOUT_S, env={**os.environ, "NO_COLOR": "1"})


@pytest.fixture(scope="module")
def cli_runs(tmp_path_factory: pytest.TempPathFactory) -> dict[str, tuple[Path, subprocess.CompletedProcess[str]]]:
    """Every bad config (and the many-problems config) checked by ``sortie check``, concurrently."""
    root = tmp_path_factory.mktemp("bad-configs")
    paths = {case.id: _write_campaign(root / case.id, case.config_text()) for case in BAD_CONFIGS}
    paths["many-problems"] = _write_campaign(root / "many-problems", _many_problems_text())
    with ThreadPoolExecutor(max_workers=max(2, (os.cpu_count() or 2) + 1)) as pool:
        done = dict(zip(paths, pool.map(_sortie_check, paths.values()), strict=True))
    return {name: (paths[name], done[name]) for name in paths}


def _error_lines(result: subprocess.CompletedProcess[str]) -> list[str]:
    lines = [line for line in result.stderr.splitlines() if line.strip()]
    assert lines, "nothing on stderr"
    assert all(line.startswith("error: ") for line in lines), result.stderr
    return [line.removeprefix("error: ") for line in lines]


@pytest.mark.slow
@pytest.mark.parametrize("case", CASE_PARAMS)
def test_sortie_check_refuses_bad_config_with_one_error_line(
        case: BadConfig, cli_runs: dict[str, tuple[Path, subprocess.CompletedProcess[str]]]) -> None:
    path, result = cli_runs[case.id]
    assert "Traceback" not in result.stdout + result.stderr, result.stderr
    assert result.returncode == 2, (result.returncode, result.stderr)
    assert result.stdout == ""
    _check_problem_lines(_error_lines(result), case, str(path))


@pytest.mark.slow
def test_sortie_check_reports_all_problems_at_once(
        cli_runs: dict[str, tuple[Path, subprocess.CompletedProcess[str]]]) -> None:
    _, result = cli_runs["many-problems"]
    assert "Traceback" not in result.stdout + result.stderr
    assert result.returncode == 2
    lines = _error_lines(result)
    assert len(lines) == len(MANY_PROBLEMS), lines
    assert sorted(line.split(":", 1)[0] for line in lines) == sorted(MANY_PROBLEMS)


@pytest.mark.slow
def test_sortie_check_accepts_the_demo_config() -> None:
    result = _sortie_check(DEMO)
    assert result.returncode == 0, result.stderr
    assert "error" not in result.stderr
    assert "ok - 8 free parameters, 4 conditions" in result.stdout
    assert "baseline + 16 initial designs = 68 cases" in result.stdout


def test_bad_config_cases_are_distinct_and_enough() -> None:
    ids = [case.id for case in BAD_CONFIGS]
    texts = [case.config_text() for case in BAD_CONFIGS]
    assert len(set(ids)) == len(ids)
    assert len(set(texts)) == len(texts)
    assert DEMO_TEXT not in texts
    assert sum(not case.marks for case in BAD_CONFIGS) >= 20


def test_cases_budget_caps_the_designs_at_one_case_per_condition(tmp_path: Path) -> None:
    config = _demo()
    config["plan"] = {"initial": {"method": "sobol", "designs": 16}, "infill": {}}
    config["budget"] = {"cases": 100}  # 4 conditions: 25 designs
    assert parse_config(yaml.safe_dump(config), base_dir=tmp_path).target_designs() == 25
    config["budget"] = {"cases": 100, "designs": 20}  # the tighter limit wins
    assert parse_config(yaml.safe_dump(config), base_dir=tmp_path).target_designs() == 20


def test_cases_budget_too_small_for_the_initial_design_names_the_minimum(tmp_path: Path) -> None:
    config = _demo()
    config["budget"] = {"cases": 60}  # baseline + 16 Sobol' designs at 4 conditions need 68
    with pytest.raises(ConfigError) as info:
        parse_config(yaml.safe_dump(config), base_dir=tmp_path)
    assert info.value.problems == [
        "budget.cases: 60 cannot hold the baseline plus the 16 designs of plan.initial (sobol) at 4 conditions each; "
        "allowed: at least 68"
    ]


def test_budget_needs_designs_or_cases(tmp_path: Path) -> None:
    config = _demo()
    config["budget"] = {}
    with pytest.raises(ConfigError) as info:
        parse_config(yaml.safe_dump(config), base_dir=tmp_path)
    assert info.value.problems == ["budget: give designs, cases or both (every design costs one case per condition)"]


# --- screening stage sizes (in-process only: the CLI path is the same as above) ---------------

_SCREEN = {"initial": {"method": "sobol", "designs": 8}, "infill": {}}
SCREENING_CONFIGS = [
    BadConfig("surrogate-with-trajectories", "plan.screening", ("'trajectories' apply to morris", "takes 'designs'"),
              _set("plan", screening={"method": "surrogate", "trajectories": 4}, **_SCREEN)),
    BadConfig("morris-with-designs", "plan.screening", ("'designs' applies to method 'surrogate'",),
              _set("plan", screening={"method": "morris", "designs": 32}, **_SCREEN)),
    BadConfig("surrogate-too-few-designs", "plan.screening.designs", ("5 Sobol' points", "8 free parameters",
                                                                     "at least 10", "default 32"),
              _set("plan", screening={"method": "surrogate", "designs": 5}, **_SCREEN)),
]


@pytest.mark.parametrize("case", [pytest.param(c, id=c.id) for c in SCREENING_CONFIGS])
def test_screening_stage_options_belong_to_their_method(case: BadConfig, tmp_path: Path) -> None:
    path = _write_campaign(tmp_path, case.config_text())
    with pytest.raises(ConfigError) as info:
        parse_config(path.read_text(), base_dir=tmp_path, source=CONFIG_NAME, check_solver=check_solver)
    _check_problem_lines(info.value.problems, case, CONFIG_NAME)


@pytest.mark.parametrize(("n_free", "expected"), [(1, 4), (5, 16), (8, 32), (20, 64), (22, 128)])
def test_surrogate_screening_defaults_to_a_power_of_two_of_at_least_three_points_per_parameter(n_free: int, expected: int) -> None:
    from sortie.config import ScreeningSpec

    assert ScreeningSpec(method="surrogate").n_designs(n_free) == expected
    assert ScreeningSpec(method="surrogate", designs=40).n_designs(n_free) == 40
    assert ScreeningSpec(method="morris", trajectories=3).n_designs(n_free) == 3 * (n_free + 1)


@pytest.mark.parametrize("path", sorted((ROOT / "configs").glob("*.yaml")), ids=lambda p: p.name)
def test_every_shipped_config_is_valid(path: Path) -> None:
    config = parse_config(path.read_text(encoding="utf-8"), base_dir=path.parent, source=str(path), check_solver=check_solver)
    assert config.target_designs() <= config.budget.max_designs(len(config.condition_list()))


# --- issue 12: config edges -------------------------------------------------------------------


def _refused(config: dict[str, Any] | str, tmp_path: Path) -> list[str]:
    text = config if isinstance(config, str) else yaml.safe_dump(config, sort_keys=False)
    with pytest.raises(ConfigError) as info:
        parse_config(text, base_dir=tmp_path, source=CONFIG_NAME)
    return info.value.problems


def test_a_parameter_given_twice_is_refused_not_overwritten(tmp_path: Path) -> None:
    line = _line_of(DEMO_TEXT, "  ramp_angle:")
    doubled = DEMO_TEXT.replace("  boattail_length:", "  ramp_angle: {lower: 1.0, upper: 2.0, baseline: 1.5}\n  boattail_length:", 1)
    problems = _refused(doubled, tmp_path)  # before: the second ramp_angle silently won
    assert problems == [f"{CONFIG_NAME} line {line + 1}, column 3: key 'ramp_angle' is given twice "
                        f"(lines {line} and {line + 1}); keep one"]


@pytest.mark.parametrize(("spec", "key"), [
    ({"choices": [True, False], "baseline": "yes"}, "parameters.wing.choices"),
    ({"choices": ["yes", "no"], "baseline": True}, "parameters.wing.baseline"),
    ({"lower": False, "upper": 2.0, "baseline": 1.0}, "parameters.wing.lower"),
])
def test_yaml_booleans_are_refused_with_a_hint_to_quote_them(tmp_path: Path, spec: dict[str, Any], key: str) -> None:
    config = _demo()
    config["parameters"]["wing"] = spec
    problems = _refused(config, tmp_path)  # before: choices [yes, no] became [1.0, 0.0]
    assert len(problems) == 1
    assert problems[0].startswith(f"{key}: holds ")
    assert "a YAML boolean" in problems[0] and "quote it" in problems[0]


def test_quoted_yes_and_no_stay_text_and_boolean_keys_stay_booleans(tmp_path: Path) -> None:
    text = DEMO_TEXT.replace("  fin_count:          {choices: [2, 3, 4], baseline: 3}",
                             "  fin_count:          {choices: [2, 3, 4], baseline: 3}\n"
                             "  wing: {choices: ['yes', 'no'], baseline: 'no'}\n"
                             "  livery: {lower: 0.0, upper: 1.0, baseline: 0.5, fixed: yes}")
    config = parse_config(text, base_dir=tmp_path)
    assert config.parameters["wing"].choices == ["yes", "no"]
    assert config.parameters["livery"].fixed is True


def test_a_boolean_in_a_number_field_is_refused(tmp_path: Path) -> None:
    config = _demo()
    config["slots"] = True
    config["conditions"] = {"mach": [True, False]}
    problems = _refused(config, tmp_path)
    assert sorted(p.split(":", 1)[0] for p in problems) == ["conditions.mach", "slots"]


@pytest.mark.parametrize(("initial", "fragment"), [
    ({"method": "sobol", "designs": 1_000_000_000}, "plan.initial: sobol makes 1,000,000,000 designs of 8 parameters"),
    ({"method": "full-factorial", "levels": 11}, "plan.initial: full-factorial makes 58,461,513 designs"),
    ({"method": "lhs", "designs": 5_000_000}, "plan.initial: lhs makes 5,000,000 designs"),
])
def test_huge_experiments_are_refused_before_anything_is_allocated(tmp_path: Path, initial: dict[str, Any], fragment: str) -> None:
    import tracemalloc

    config = _demo()
    config["plan"] = {"initial": initial}
    config["budget"] = {"designs": 1_000_000}  # the largest budget allowed
    tracemalloc.start()
    try:
        problems = _refused(config, tmp_path)  # before: numpy tried to allocate up to 64 GiB
        _, peak = tracemalloc.get_traced_memory()
    finally:
        tracemalloc.stop()
    assert len(problems) == 1 and problems[0].startswith(fragment), problems
    assert "allowed: at most 10,000,000 values" in problems[0]
    assert peak < 20 * 2**20


def test_a_huge_experiment_within_memory_is_refused_by_the_budget_by_count(tmp_path: Path) -> None:
    config = _demo()
    config["plan"] = {"initial": {"method": "fractional-factorial"}}
    problems = _refused(config, tmp_path)
    assert problems == ["budget.designs: 33 cannot hold the baseline plus the 128 designs of plan.initial "
                        "(fractional-factorial); allowed: at least 129"]


@pytest.mark.parametrize(("goal", "fragment"), [
    ("max(lift) / 0", "divides by zero"),
    ("max(lift) ** 10 ** 10 ** 10", "an overflow"),
    ("sqrt(-1)", "square root of a negative number"),
])
def test_goals_that_cannot_be_finite_fail_check(tmp_path: Path, goal: str, fragment: str) -> None:
    config = _demo()
    config["goal"]["minimize"] = goal
    problems = _refused(config, tmp_path)
    assert len(problems) == 1 and problems[0].startswith("goal.minimize: ") and fragment in problems[0]


def test_a_constraint_that_cannot_be_finite_fails_check(tmp_path: Path) -> None:
    config = _demo()
    config["goal"]["subject_to"] = ["drag / 0 <= baseline.drag"]
    problems = _refused(config, tmp_path)
    assert len(problems) == 1 and problems[0].startswith("goal.subject_to[0]: ") and "divides by zero" in problems[0]


@pytest.mark.parametrize("mutate", [
    _set("campaign", name="sled/" * 600_000),
    _param("fin_count", choices=list(range(50_000)), baseline=-1),
    _set("goal", minimize="max(" + "lift" * 400 + ")"),
    _quantity("lift", pattern="(" * 100_000),
    lambda c: c["parameters"].__setitem__("x" * 500_000, {"lower": 0, "upper": 1, "baseline": 0.5}),
    lambda c: c["campaign"].__setitem__("y" * 500_000, 1),
], ids=["long-name", "long-choices", "long-goal", "long-pattern", "long-parameter-name", "long-unknown-key"])
def test_no_problem_line_runs_past_two_hundred_characters(tmp_path: Path, mutate: Callable[[dict[str, Any]], Any]) -> None:
    config = _demo()
    mutate(config)
    problems = _refused(config, tmp_path)
    assert problems and all(len(line) <= 200 for line in problems), [len(line) for line in problems]


@pytest.mark.parametrize(("make", "fragment"), [
    (lambda p: None, ": no such config file"),
    (lambda p: p.mkdir(), ": is a folder"),
    (lambda p: p.write_bytes(b"campaign:\n  name: sled-\xe9\n"), " line 2: is not UTF-8 text (byte 0xe9)"),
    (lambda p: p.write_text(""), ": is empty"),
    (lambda p: p.write_text("# only a comment\n"), ": is empty"),
    (lambda p: p.write_text("a: '" + "x" * 2_000_000 + "'\n"), ": the file is 2,000,006 bytes; a config may be at most 1,000,000"),
    (lambda p: os.mkfifo(p), ": is not a regular file"),
    (lambda p: p.write_text("- a\n- b\n"), ": the top level must be a mapping"),
], ids=["missing", "folder", "not-utf8", "empty", "comment-only", "too-big", "fifo", "list"])
def test_every_unreadable_config_is_one_line(tmp_path: Path, make: Callable[[Path], Any], fragment: str) -> None:
    from sortie.config import load_config

    path = tmp_path / "campaign.yaml"
    make(path)
    with pytest.raises(ConfigError) as info:
        load_config(path)
    assert info.value.problems == [info.value.problems[0]]
    assert info.value.problems[0].startswith(f"{path}{fragment}"), info.value.problems


def test_a_config_without_read_permission_is_one_line(tmp_path: Path) -> None:
    from sortie.config import load_config

    if os.geteuid() == 0:
        pytest.skip("root reads every file whatever its mode")
    path = tmp_path / "campaign.yaml"
    path.write_text(DEMO_TEXT)
    path.chmod(0)
    with pytest.raises(ConfigError) as info:
        load_config(path)
    assert info.value.problems == [f"{path}: cannot be read (permission denied); allow reading it or copy it"]


def test_config_hash_uses_the_strict_loader() -> None:
    from sortie.config import config_hash

    assert config_hash("a: 1\nb: [1, 2]\n") == config_hash("b: [1, 2]   # layout and comments do not count\na: 1\n")
    with pytest.raises(ConfigError):
        config_hash("a: &x 1\nb: *x\n")
