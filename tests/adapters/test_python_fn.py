"""The in-process Python adapter: loading the function, and the function's failures as data."""

from __future__ import annotations

import json
import sys
import textwrap
from pathlib import Path

import pytest

from sortie.adapters import registry
from sortie.adapters.base import CaseSpec, JobState
from sortie.adapters.python_fn import PythonAdapter, PythonOptions, load_function
from sortie.config import QuantitySpec
from sortie.errors import AdapterError

MODEL = textwrap.dedent("""\
    import math

    def forces(values, condition):
        angle = math.radians(values["ramp_angle"])
        return {"fz": condition["mach"] * math.sin(angle), "cd": 0.02 + angle ** 2}

    def diverges(values, condition):
        return {"fz": 1.0 / (condition["mach"] - condition["mach"]), "cd": 0.0}

    def a_number(values, condition):
        return 3.5

    def a_list(values, condition):
        return [("fz", 1.0), ("cd", 2.0)]

    def only_fz(values, condition):
        return {"fz": 1.0}

    def nan_cd(values, condition):
        return {"fz": 1.0, "cd": float("nan")}

    def text_cd(values, condition):
        return {"fz": 1.0, "cd": "n/a", "note": object()}

    def mutates(values, condition):
        values["ramp_angle"] = -1
        condition.clear()
        return {"fz": 0.0, "cd": 0.0}

    not_callable = 42
""")

QUANTITIES = {"fz": QuantitySpec(), "cd": QuantitySpec()}


@pytest.fixture
def model_file(tmp_path: Path) -> Path:
    path = tmp_path / "models" / "aero_model.py"
    path.parent.mkdir()
    path.write_text(MODEL)
    return path


@pytest.fixture
def model_module(tmp_path: Path, monkeypatch: pytest.MonkeyPatch) -> str:
    name = "sortie_test_aero_model_mod"
    (tmp_path / f"{name}.py").write_text(MODEL)
    monkeypatch.syspath_prepend(str(tmp_path))
    monkeypatch.delitem(sys.modules, name, raising=False)
    return name


def _adapter(spec: str, base: Path) -> PythonAdapter:
    return PythonAdapter(PythonOptions(adapter="python", function=spec), QUANTITIES, base)


def _case(base: Path, case_id: int = 1) -> CaseSpec:
    return CaseSpec(case_id=case_id, name=f"d0001-c{case_id}", design_id=1, values={"ramp_angle": 30.0},
                    condition={"mach": 0.9}, workdir=base / "cases" / f"d0001-c{case_id}")


def _run(adapter: PythonAdapter, case: CaseSpec):
    handle = adapter.start(case)
    return adapter.poll(handle), adapter.collect(handle, case)


def test_file_py_function_is_loaded_relative_to_config_folder(tmp_path, model_file):
    adapter = _adapter("models/aero_model.py:forces", tmp_path)
    state, outcome = _run(adapter, _case(tmp_path))
    assert state is JobState.DONE
    assert outcome.ok
    assert outcome.quantities["fz"] == pytest.approx(0.45)
    assert set(outcome.quantities) == {"fz", "cd"}


def test_module_function_is_imported_by_dotted_name(tmp_path, model_module):
    adapter = _adapter(f"{model_module}:forces", tmp_path)
    state, outcome = _run(adapter, _case(tmp_path))
    assert state is JobState.DONE
    assert outcome.quantities["fz"] == pytest.approx(0.45)


def test_absolute_file_path_is_accepted(tmp_path, model_file):
    function = load_function(f"{model_file}:forces", tmp_path / "elsewhere")
    assert function({"ramp_angle": 0.0}, {"mach": 0.5}) == {"fz": 0.0, "cd": 0.02}


def test_returned_mapping_is_saved_in_the_case_folder(tmp_path, model_file):
    adapter = _adapter("models/aero_model.py:forces", tmp_path)
    case = _case(tmp_path)
    _, outcome = _run(adapter, case)
    assert json.loads((case.workdir / "result.json").read_text()) == outcome.quantities


def test_exception_in_function_is_solver_failure_with_traceback_saved(tmp_path, model_file):
    adapter = _adapter("models/aero_model.py:diverges", tmp_path)
    case = _case(tmp_path)
    state, outcome = _run(adapter, case)
    assert state is JobState.FAILED
    assert outcome.failure_class == "solver"
    assert "ZeroDivisionError" in outcome.reason
    assert "models/aero_model.py:diverges" in outcome.reason
    error_file = case.workdir / "error.txt"
    assert str(error_file) in outcome.reason
    saved = error_file.read_text()
    assert saved.startswith("Traceback")
    assert "in diverges" in saved
    assert "ZeroDivisionError" in saved


@pytest.mark.parametrize(("function", "kind"), [("a_number", "float"), ("a_list", "list")])
def test_non_mapping_return_is_output_failure(tmp_path, model_file, function, kind):
    adapter = _adapter(f"models/aero_model.py:{function}", tmp_path)
    state, outcome = _run(adapter, _case(tmp_path))
    assert state is JobState.FAILED
    assert outcome.failure_class == "output"
    assert f"returned {kind}" in outcome.reason
    assert "mapping" in outcome.reason


def test_missing_quantity_is_output_failure_naming_it(tmp_path, model_file):
    adapter = _adapter("models/aero_model.py:only_fz", tmp_path)
    state, outcome = _run(adapter, _case(tmp_path))
    assert state is JobState.FAILED
    assert outcome.failure_class == "output"
    assert "'cd'" in outcome.reason


def test_non_finite_quantity_is_output_failure(tmp_path, model_file):
    adapter = _adapter("models/aero_model.py:nan_cd", tmp_path)
    _, outcome = _run(adapter, _case(tmp_path))
    assert outcome.failure_class == "output"
    assert "finite" in outcome.reason


def test_text_quantity_is_output_failure_and_odd_values_do_not_break_the_record(tmp_path, model_file):
    adapter = _adapter("models/aero_model.py:text_cd", tmp_path)
    case = _case(tmp_path)
    _, outcome = _run(adapter, case)
    assert outcome.failure_class == "output"
    assert "'n/a'" in outcome.reason
    assert (case.workdir / "result.json").is_file()


def test_function_gets_copies_of_parameters_and_condition(tmp_path, model_file):
    adapter = _adapter("models/aero_model.py:mutates", tmp_path)
    case = _case(tmp_path)
    _run(adapter, case)
    assert case.values == {"ramp_angle": 30.0}
    assert case.condition == {"mach": 0.9}


def test_collect_twice_reports_a_lost_call(tmp_path, model_file):
    adapter = _adapter("models/aero_model.py:forces", tmp_path)
    case = _case(tmp_path)
    handle = adapter.start(case)
    assert adapter.collect(handle, case).ok
    assert adapter.collect(handle, case).failure_class == "transient"


@pytest.mark.parametrize(("spec", "fragment"), [
    ("aero_model.forces", "must look like 'package.module:function'"),
    ("aero_model:", "must look like 'package.module:function'"),
    (":forces", "must look like 'package.module:function'"),
    ("aero_model:not-a-name", "must look like 'package.module:function'"),
    ("models/no_such_file.py:forces", "no_such_file.py does not exist"),
    ("sortie_test_no_such_module_zz:forces", "cannot import 'sortie_test_no_such_module_zz' (ModuleNotFoundError"),
    ("models/aero_model.py:no_such_function", "has no function 'no_such_function'"),
    ("models/aero_model.py:not_callable", "has no function 'not_callable'"),
    ("models/broken.py:forces", "cannot import 'models/broken.py' (SyntaxError"),
    ("models/raises_on_import.py:forces", "cannot import 'models/raises_on_import.py' (RuntimeError: no licence"),
])
def test_bad_function_spec_is_one_clear_sentence(tmp_path, model_file, spec, fragment):
    (tmp_path / "models" / "broken.py").write_text("def forces(values, condition)\n    return {}\n")
    (tmp_path / "models" / "raises_on_import.py").write_text("raise RuntimeError('no licence')\n")
    with pytest.raises(AdapterError) as info:
        load_function(spec, tmp_path)
    message = str(info.value)
    assert message.startswith("solver.function: ")
    assert fragment in message
    assert "\n" not in message
    assert "Traceback" not in message


def test_bad_spec_is_reported_by_check_solver(tmp_path, model_file):
    problems = registry.check_solver({"adapter": "python", "function": "models/aero_model.py:nope"}, tmp_path,
                                     {"fz": {}, "cd": {}})
    assert problems == ["solver.function: 'models/aero_model.py' has no function 'nope'"]


def test_check_solver_rejects_file_rules_and_unknown_keys_for_python(tmp_path, model_file):
    problems = registry.check_solver({"adapter": "python", "function": "models/aero_model.py:forces"}, tmp_path,
                                     {"fz": {"file": "out.txt", "key": "fz"}, "cd": {}})
    assert len(problems) == 1
    assert problems[0].startswith("quantities.fz:")
    problems = registry.check_solver({"adapter": "python", "function": "models/aero_model.py:forces",
                                      "template": "template"}, tmp_path)
    assert len(problems) == 1
    assert problems[0].startswith("solver.template:")
    assert "unknown key" in problems[0]


def test_unknown_adapter_name_gives_did_you_mean():
    problems = registry.check_solver({"adapter": "pyton", "function": "m:f"}, Path("."))
    assert len(problems) == 1
    assert "did you mean 'python'?" in problems[0]
    assert "installed: command, python" in problems[0]


# --- issue 12: imports that exit, and files that import their neighbours ----------------------


@pytest.mark.parametrize(("body", "fragment"), [
    ("import sys\nsys.exit(0)\n", "calls sys.exit(0) while imported"),
    ("import sys\nsys.exit('usage: model.py IN OUT')\n", "calls sys.exit('usage: model.py IN OUT') while imported"),
    ("raise SystemExit(3)\n", "calls sys.exit(3) while imported"),
])
def test_a_module_that_exits_on_import_is_one_line_not_a_silent_exit(tmp_path, body, fragment):
    (tmp_path / "exits.py").write_text(body + "def forces(values, condition):\n    return {}\n")
    with pytest.raises(AdapterError) as info:  # before the fix SystemExit escaped: `sortie check` ended with 0
        load_function("exits.py:forces", tmp_path)
    assert str(info.value).startswith("solver.function: cannot import 'exits.py' (")
    assert fragment in str(info.value)
    assert "\n" not in str(info.value)


def test_a_module_that_exits_on_import_is_a_check_problem(tmp_path):
    (tmp_path / "exits.py").write_text("import sys\nsys.exit(0)\n")
    problems = registry.check_solver({"adapter": "python", "function": "exits.py:forces"}, tmp_path, {"fz": {}})
    assert len(problems) == 1
    assert problems[0].startswith("solver.function: cannot import 'exits.py'")


def test_an_import_error_message_is_clipped_to_one_short_line(tmp_path):
    (tmp_path / "loud.py").write_text("raise RuntimeError('x' * 1_000_000)\n")
    with pytest.raises(AdapterError) as info:
        load_function("loud.py:forces", tmp_path)
    assert len(str(info.value)) < 200
    assert "RuntimeError" in str(info.value)


def test_a_file_solver_imports_a_module_beside_it_like_a_script(tmp_path, monkeypatch):
    folder = tmp_path / "sled_model_with_helper"
    folder.mkdir()
    (folder / "sled_geometry_zz.py").write_text("def area(angle):\n    return 2.0 * angle\n")
    (folder / "model.py").write_text(
        "import sled_geometry_zz\n\n"
        "def forces(values, condition):\n"
        "    return {'fz': sled_geometry_zz.area(values['ramp_angle']), 'cd': 0.5}\n")
    monkeypatch.setattr(sys, "path", list(sys.path))  # the adapter adds the folder for good; undo it here
    function = load_function("sled_model_with_helper/model.py:forces", tmp_path)
    assert function({"ramp_angle": 3.0}, {"mach": 0.9}) == {"fz": 6.0, "cd": 0.5}
    assert sys.path[0] == str(folder)


def test_a_neighbour_imported_lazily_at_call_time_is_found_too(tmp_path, monkeypatch):
    (tmp_path / "sled_table_zz.py").write_text("VALUE = 0.25\n")
    (tmp_path / "lazy.py").write_text(
        "def forces(values, condition):\n"
        "    import sled_table_zz\n"
        "    return {'fz': sled_table_zz.VALUE, 'cd': 0.0}\n")
    monkeypatch.setattr(sys, "path", list(sys.path))
    assert load_function("lazy.py:forces", tmp_path)({}, {})["fz"] == 0.25
