"""Reading quantities from solver output files: one rule per common output shape."""

from __future__ import annotations

import json
import os
from pathlib import Path

import pytest
from pydantic import ValidationError

from sortie.config import QuantitySpec
from sortie.quantities import QuantityNotFound, read_quantity

LOG = """\
Time = 1
    Cd = 0.512 Cl = 0.10
Time = 2
    Cd = 0.433 Cl = 0.11
Time = 3
    Cd = 0.4021 Cl = 0.12
End
"""


def _write(folder: Path, name: str, text: str) -> None:
    (folder / name).write_text(text)


def test_pattern_rule_takes_the_last_match(tmp_path):
    _write(tmp_path, "log.txt", LOG)
    spec = QuantitySpec(file="log.txt", pattern=r"Cd = (?P<value>\S+)")
    assert read_quantity(tmp_path, "cd", spec) == "0.4021"


def test_pattern_rule_is_multiline_so_anchors_match_each_line(tmp_path):
    _write(tmp_path, "log.txt", "Cl 0.3\nfinal Cl 0.5\nCl 0.7\n")
    spec = QuantitySpec(file="log.txt", pattern=r"^Cl (?P<value>\S+)$")
    assert read_quantity(tmp_path, "cl", spec) == "0.7"


def test_pattern_rule_that_matches_nothing_names_pattern_and_file(tmp_path):
    _write(tmp_path, "log.txt", LOG)
    spec = QuantitySpec(file="log.txt", pattern=r"Cm = (?P<value>\S+)")
    with pytest.raises(QuantityNotFound) as info:
        read_quantity(tmp_path, "cm", spec)
    assert "Cm = " in str(info.value)
    assert "'cm'" in str(info.value)
    assert str(tmp_path / "log.txt") in str(info.value)


def test_key_rule_reads_key_equals_value_and_last_line_wins(tmp_path):
    _write(tmp_path, "forces.dat", "# forces\nfz = 10\n  fz   =   12.75  \nfz_total = 99\nmoment = 3\n")
    assert read_quantity(tmp_path, "lift", QuantitySpec(file="forces.dat", key="fz")) == "12.75"
    assert read_quantity(tmp_path, "m", QuantitySpec(file="forces.dat", key="moment")) == "3"


def test_key_rule_without_the_key_names_key_and_file(tmp_path):
    _write(tmp_path, "forces.dat", "fx = 1\n")
    with pytest.raises(QuantityNotFound) as info:
        read_quantity(tmp_path, "lift", QuantitySpec(file="forces.dat", key="fz"))
    assert "'fz = ...'" in str(info.value)
    assert str(tmp_path / "forces.dat") in str(info.value)


def test_column_rule_reads_the_last_row(tmp_path):
    _write(tmp_path, "history.csv", "iter,cl,cd\n1,0.10,0.030\n2,0.20,0.025\n3,0.30,0.021\n\n")
    assert read_quantity(tmp_path, "cd", QuantitySpec(file="history.csv", column="cd")) == "0.021"


def test_column_rule_missing_column_or_rows_names_the_file(tmp_path):
    _write(tmp_path, "history.csv", "iter,cl\n1,0.1\n")
    _write(tmp_path, "header-only.csv", "iter,cd\n")
    for name in ("history.csv", "header-only.csv"):
        with pytest.raises(QuantityNotFound) as info:
            read_quantity(tmp_path, "cd", QuantitySpec(file=name, column="cd"))
        assert str(tmp_path / name) in str(info.value)
        assert "'cd'" in str(info.value)


def test_json_path_rule_walks_mappings_and_list_indices(tmp_path):
    data = {"forces": {"history": [{"fz": 1.0}, {"fz": 2.0}, {"fz": 3.5}]}, "coefficients": [0.1, 0.2, 0.3]}
    _write(tmp_path, "result.json", json.dumps(data))
    assert read_quantity(tmp_path, "a", QuantitySpec(file="result.json", json_path="forces.history.1.fz")) == "2.0"
    assert read_quantity(tmp_path, "b", QuantitySpec(file="result.json", json_path="forces.history.-1.fz")) == "3.5"
    assert read_quantity(tmp_path, "c", QuantitySpec(file="result.json", json_path="coefficients.0")) == "0.1"


@pytest.mark.parametrize("path", ["forces.missing", "coefficients.3", "coefficients.-4", "coefficients.x",
                                  "forces.history.0.fz.deeper"])
def test_json_path_that_does_not_exist_names_path_and_file(tmp_path, path):
    _write(tmp_path, "result.json", json.dumps({"forces": {"history": [{"fz": 1.0}]}, "coefficients": [1, 2, 3]}))
    with pytest.raises(QuantityNotFound) as info:
        read_quantity(tmp_path, "q", QuantitySpec(file="result.json", json_path=path))
    assert repr(path) in str(info.value)
    assert str(tmp_path / "result.json") in str(info.value)


def test_invalid_json_names_the_file_and_line(tmp_path):
    _write(tmp_path, "result.json", '{"fz": 1.0,\n "cd": }\n')
    with pytest.raises(QuantityNotFound) as info:
        read_quantity(tmp_path, "cd", QuantitySpec(file="result.json", json_path="cd"))
    assert str(tmp_path / "result.json") in str(info.value)
    assert "line 2" in str(info.value)


def test_missing_output_file_is_named(tmp_path):
    with pytest.raises(QuantityNotFound) as info:
        read_quantity(tmp_path, "cd", QuantitySpec(file="post/forces.dat", key="cd"))
    assert str(tmp_path / "post" / "forces.dat") in str(info.value)
    assert "was not written" in str(info.value)


def test_unreadable_output_path_is_named(tmp_path):
    (tmp_path / "forces.dat").mkdir()
    with pytest.raises(QuantityNotFound) as info:
        read_quantity(tmp_path, "cd", QuantitySpec(file="forces.dat", key="cd"))
    assert str(tmp_path / "forces.dat") in str(info.value)
    assert "cannot be read" in str(info.value)


def test_bytes_that_are_not_utf8_do_not_stop_reading(tmp_path):
    (tmp_path / "log.txt").write_bytes(b"banner \xff\xfe\nCd = 0.25\n")
    assert read_quantity(tmp_path, "cd", QuantitySpec(file="log.txt", pattern=r"Cd = (?P<value>\S+)")) == "0.25"


# --------------------------------------------------------------------------- the rule's config


def test_spec_without_file_or_rule_is_the_in_process_form():
    spec = QuantitySpec()
    assert spec.file is None
    assert spec.rule is None


@pytest.mark.parametrize(("raw", "fragment"), [
    ({"file": "a", "key": "k", "column": "c"}, "give one reading rule, not 2 (key, column)"),
    ({"key": "k"}, "rule 'key' needs the output file"),
    ({"file": "a"}, "needs a reading rule"),
    ({"file": "a", "pattern": "Cd = (\\S+)"}, "needs a named group (?P<value>...)"),
    ({"file": "a", "pattern": "Cd = (?P<value>\\S+"}, "is not a valid regular expression"),
    ({"file": "a", "key": "k", "row": 3}, "Extra inputs are not permitted"),
])
def test_spec_with_a_bad_rule_is_refused(raw, fragment):
    with pytest.raises(ValidationError) as info:
        QuantitySpec.model_validate(raw)
    assert fragment in str(info.value)


@pytest.mark.parametrize(("raw", "rule"), [
    ({"file": "a", "pattern": "x(?P<value>.)"}, "pattern"), ({"file": "a", "key": "k"}, "key"),
    ({"file": "a", "column": "c"}, "column"), ({"file": "a", "json_path": "p.0"}, "json_path"),
])
def test_spec_names_its_rule(raw, rule):
    assert QuantitySpec.model_validate(raw).rule == rule


# --- issue 12: quantity files stay inside the case folder -------------------------------------


@pytest.mark.parametrize(("name", "fragment"), [
    ("/etc/passwd", "is an absolute path"),
    ("../../etc/passwd", "contains '..'"),
    ("post/../../secret.txt", "contains '..'"),
    ("~/.ssh/id_rsa", "home folder"),
    ("", "is empty"),
])
def test_config_refuses_a_quantity_file_outside_the_case_folder(name, fragment):
    with pytest.raises(ValidationError) as info:  # before the fix these were accepted and read
        QuantitySpec(file=name, key="root")
    assert fragment in str(info.value)


@pytest.mark.parametrize("name", ["result.out", "post/forces.dat", "./result.out"])
def test_config_accepts_a_quantity_file_inside_the_case_folder(name):
    assert QuantitySpec(file=name, key="cd").file == name


def test_a_symlink_out_of_the_case_folder_is_not_followed(tmp_path):
    outside = tmp_path / "outside.txt"
    outside.write_text("cd = 0.99\n")
    case = tmp_path / "case"
    case.mkdir()
    (case / "result.out").symlink_to(outside)
    with pytest.raises(QuantityNotFound) as info:
        read_quantity(case, "cd", QuantitySpec(file="result.out", key="cd"))
    assert "outside the case folder" in str(info.value)


def test_a_symlinked_folder_out_of_the_case_folder_is_not_followed(tmp_path):
    (tmp_path / "elsewhere").mkdir()
    (tmp_path / "elsewhere" / "forces.dat").write_text("cd = 0.99\n")
    case = tmp_path / "case"
    case.mkdir()
    (case / "post").symlink_to(tmp_path / "elsewhere")
    with pytest.raises(QuantityNotFound, match="outside the case folder"):
        read_quantity(case, "cd", QuantitySpec(file="post/forces.dat", key="cd"))


def test_a_symlink_inside_the_case_folder_is_read(tmp_path):
    (tmp_path / "run1.out").write_text("cd = 0.42\n")
    (tmp_path / "result.out").symlink_to(tmp_path / "run1.out")
    assert read_quantity(tmp_path, "cd", QuantitySpec(file="result.out", key="cd")) == "0.42"


def test_a_device_or_fifo_in_the_case_folder_is_refused_without_blocking(tmp_path):
    os.mkfifo(tmp_path / "result.out")  # opening it for reading would wait for a writer forever
    with pytest.raises(QuantityNotFound, match="not a regular file"):
        read_quantity(tmp_path, "cd", QuantitySpec(file="result.out", key="cd"))
    (tmp_path / "zero.out").symlink_to("/dev/zero")  # outside, and endless
    with pytest.raises(QuantityNotFound, match="outside the case folder"):
        read_quantity(tmp_path, "cd", QuantitySpec(file="zero.out", key="cd"))


def test_an_absolute_file_is_refused_at_read_time_too(tmp_path):
    spec = QuantitySpec.model_construct(file="/etc/passwd", key="root", pattern=None, column=None, json_path=None)
    with pytest.raises(QuantityNotFound, match="is an absolute path"):
        read_quantity(tmp_path, "root", spec)
