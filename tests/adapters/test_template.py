"""Rendering a case folder: solver syntax passes byte for byte, only our placeholders change;
templates render in a sandbox, and ``sortie check`` renders them for the baseline before a run."""

from __future__ import annotations

import os
import socket
import stat
import subprocess
import sys
import threading
from pathlib import Path

import pytest

from sortie.adapters.base import CaseSpec, JobState
from sortie.adapters.command import CommandAdapter, CommandOptions
from sortie.adapters.registry import load_checked_config
from sortie.adapters.template import TemplateError, render_folder, render_text, template_problems
from sortie.errors import AdapterError, ConfigError
from tests.adapters.tiny_campaign import write_campaign

CONTEXT = {"ramp_angle": 8.0, "mach": 0.9, "case_name": "d0007-c1", "case_id": 21, "design_id": 7}

# Solver-style text: dictionary blocks, $var; macros, #include lines, code streams.
SOLVER_DICT = b"""\
/*--------------------------------*- C++ -*----------------------------------*\\
FoamFile
{
    version     2.0;
    format      ascii;
    class       dictionary;
    object      flowConditions;
}
#include "include/initialConditions"
#includeEtc "caseDicts/setConstraintTypes"

rampAngle   {{ ramp_angle }};
Mach        {{ mach }};
Uinf        $Mach;
angleRad    #calc "degToRad($rampAngle)";

boundaryField
{
    inlet  { type fixedValue; value uniform ($Uinf 0 0); }
    $:outlet.value;
    ${..patchType};
}

code
#{
    const scalar a = {{ ramp_angle }} * constant::mathematical::pi/180.0;
    Info<< "angle " << a << endl;
#};
// ************************************************************************* //
"""

# A shell run script: array lengths, suffix stripping, brace groups, and `{#` which is Jinja's
# default comment opener.
RUN_SH = b"""\
#!/bin/bash
set -euo pipefail
meshes=(coarse medium fine)
echo "levels: ${#meshes[@]}"
deck=${PWD##*/}
base=${deck%%.*}
{ echo "mach={{ mach }}"; echo "case={{ case_name }}"; } > run.log
[[ ${#deck} -gt 0 ]] && echo ok
"""

# One file without a final newline.
NO_NEWLINE = b"angle {{ ramp_angle }} at {{ mach }}"

# Bytes that are not UTF-8 (a mesh header with Latin-1 and raw binary), including "{{".
BINARY = b"\x89MESH\x00\x01\xff\xfe{{ mach }}\x80\x81\xc3\x28" + bytes(range(256))

NESTED = b"design {{ design_id }} case {{ case_id }}\n"


def _expected(raw: bytes) -> bytes:
    text = raw.decode("utf-8")
    for name, value in CONTEXT.items():
        text = text.replace("{{ " + name + " }}", str(value))
    return text.encode("utf-8")


@pytest.fixture
def template(tmp_path: Path) -> Path:
    folder = tmp_path / "template"
    (folder / "system").mkdir(parents=True)
    (folder / "constant" / "include").mkdir(parents=True)
    (folder / "system" / "flowConditions").write_bytes(SOLVER_DICT)
    (folder / "run.sh").write_bytes(RUN_SH)
    (folder / "run.sh").chmod(0o755)
    (folder / "angle.txt").write_bytes(NO_NEWLINE)
    (folder / "constant" / "mesh.bin").write_bytes(BINARY)
    (folder / "constant" / "include" / "ids.txt").write_bytes(NESTED)
    (folder / "empty.txt").write_bytes(b"")
    return folder


def _files(folder: Path) -> dict[str, Path]:
    return {p.relative_to(folder).as_posix(): p for p in sorted(folder.rglob("*")) if p.is_file()}


def test_rendering_changes_only_placeholders_byte_for_byte(template, tmp_path):
    workdir = tmp_path / "case"
    render_folder(template, workdir, CONTEXT, None)
    sources = _files(template)
    rendered = _files(workdir)
    assert sorted(rendered) == sorted(sources)
    for rel, src in sources.items():
        raw = src.read_bytes()
        if rel == "constant/mesh.bin":
            assert rendered[rel].read_bytes() == raw, "a file that is not UTF-8 must be copied unchanged"
        else:
            assert rendered[rel].read_bytes() == _expected(raw), rel
    # Spot checks that the expectation itself is what a reader would want.
    assert b"rampAngle   8.0;" in (workdir / "system/flowConditions").read_bytes()
    assert b"Uinf        $Mach;" in (workdir / "system/flowConditions").read_bytes()
    assert b'echo "levels: ${#meshes[@]}"' in (workdir / "run.sh").read_bytes()
    assert (workdir / "angle.txt").read_bytes() == b"angle 8.0 at 0.9"
    assert (workdir / "constant/include/ids.txt").read_bytes() == b"design 7 case 21\n"


def test_rendering_keeps_file_modes_so_scripts_stay_executable(template, tmp_path):
    workdir = tmp_path / "case"
    render_folder(template, workdir, CONTEXT, None)
    mode = stat.S_IMODE((workdir / "run.sh").stat().st_mode)
    assert mode == 0o755
    assert os.access(workdir / "run.sh", os.X_OK)
    assert not os.access(workdir / "angle.txt", os.X_OK)


def test_rendering_keeps_nested_and_empty_folders(template, tmp_path):
    (template / "postProcessing" / "empty").mkdir(parents=True)
    workdir = tmp_path / "case"
    render_folder(template, workdir, CONTEXT, None)
    assert (workdir / "constant" / "include" / "ids.txt").is_file()
    assert (workdir / "postProcessing" / "empty").is_dir()


def test_crlf_line_endings_survive_rendering(tmp_path):
    folder = tmp_path / "template"
    folder.mkdir()
    raw = b"header line\r\nMach {{ mach }};\r\nplain\nold mac line\rend"
    (folder / "deck.in").write_bytes(raw)
    (folder / "crlf-only.txt").write_bytes(b"no placeholders here\r\nsecond\r\n")
    render_folder(folder, tmp_path / "case", CONTEXT, None)
    assert (tmp_path / "case" / "deck.in").read_bytes() == _expected(raw)
    assert (tmp_path / "case" / "crlf-only.txt").read_bytes() == b"no placeholders here\r\nsecond\r\n"


def test_undefined_placeholder_names_file_placeholder_and_available_names(tmp_path):
    folder = tmp_path / "template"
    folder.mkdir()
    (folder / "deck.in").write_text("span {{ wing_span }}\n")
    with pytest.raises(AdapterError) as info:
        render_folder(folder, tmp_path / "case", CONTEXT, None)
    message = str(info.value)
    assert str(folder / "deck.in") in message
    assert "wing_span" in message
    assert "placeholders available: " + ", ".join(sorted(CONTEXT)) in message
    assert "\n" not in message


def test_undefined_placeholder_is_never_rendered_blank(tmp_path):
    with pytest.raises(AdapterError, match="mach_number"):
        render_text("M={{ mach_number }}", CONTEXT, where="deck")


def test_template_syntax_error_names_file_and_line(tmp_path):
    folder = tmp_path / "template"
    folder.mkdir()
    (folder / "deck.in").write_text("ok\nok\nbad {{ mach \n")
    with pytest.raises(AdapterError) as info:
        render_folder(folder, tmp_path / "case", CONTEXT, None)
    assert f"{folder / 'deck.in'} line 3" in str(info.value)
    assert "syntax error" in str(info.value)


def test_render_globs_leave_other_files_untouched_even_with_braces(tmp_path):
    folder = tmp_path / "template"
    (folder / "system").mkdir(parents=True)
    (folder / "deck.in").write_bytes(b"mach {{ mach }}\n")
    (folder / "system" / "controls.in").write_bytes(b"angle {{ ramp_angle }}\n")
    untouched = b"literal {{ not_a_placeholder }} and {% not a block %}\n"
    (folder / "notes.txt").write_bytes(untouched)
    (folder / "system" / "other.dat").write_bytes(untouched)
    workdir = tmp_path / "case"
    render_folder(folder, workdir, CONTEXT, ["*.in"])
    assert (workdir / "deck.in").read_bytes() == b"mach 0.9\n"
    assert (workdir / "system" / "controls.in").read_bytes() == b"angle 8.0\n"
    assert (workdir / "notes.txt").read_bytes() == untouched
    assert (workdir / "system" / "other.dat").read_bytes() == untouched


def test_render_glob_can_name_a_subfolder_path(tmp_path):
    folder = tmp_path / "template"
    (folder / "system").mkdir(parents=True)
    (folder / "system" / "a.in").write_bytes(b"{{ mach }}")
    (folder / "b.in").write_bytes(b"{{ mach }}")
    render_folder(folder, tmp_path / "case", CONTEXT, ["system/*"])
    assert (tmp_path / "case" / "system" / "a.in").read_bytes() == b"0.9"
    assert (tmp_path / "case" / "b.in").read_bytes() == b"{{ mach }}"


def test_jinja_blocks_and_relocated_comments_work(tmp_path):
    text = "<#-- a note for the template author --#>{% if mach > 0.8 %}transonic{% else %}subsonic{% endif %} {# kept #}"
    assert render_text(text, CONTEXT, where="deck") == "transonic {# kept #}"


def test_template_that_is_not_a_folder_is_an_adapter_error(tmp_path):
    with pytest.raises(AdapterError, match=r"solver.template: .*missing is not a folder"):
        render_folder(tmp_path / "missing", tmp_path / "case", CONTEXT, None)


def test_case_context_offers_parameters_conditions_and_case_names(tmp_path):
    case = CaseSpec(case_id=21, name="d0007-c1", design_id=7, values={"ramp_angle": 8.0}, condition={"mach": 0.9},
                    workdir=tmp_path)
    assert case.context() == CONTEXT


# --------------------------------------------------------------------------- the sandbox

# Ways out of a template into Python's internals; each would run `touch MARKER` without a sandbox.
ESCAPES = [
    "{{ lipsum.__globals__['os'].popen('touch MARKER').read() }}",
    "{{ cycler.__init__.__globals__.os.system('touch MARKER') }}",
    "{{ ''.__class__.__mro__[1].__subclasses__() }}",
    "{% for c in [].__class__.__base__.__subclasses__() %}{{ c }}{% endfor %}",
    "{{ self._TemplateReference__context }}",
]


@pytest.mark.parametrize("payload", ESCAPES)
def test_sandbox_refuses_python_internals_in_one_line_and_runs_nothing(payload, tmp_path, monkeypatch):
    monkeypatch.chdir(tmp_path)
    folder = tmp_path / "template"
    folder.mkdir()
    (folder / "deck.in").write_text("mach {{ mach }}\n" + payload.replace("MARKER", str(tmp_path / "ran")) + "\n")
    with pytest.raises(TemplateError) as info:
        render_folder(folder, tmp_path / "case", CONTEXT, None)
    message = str(info.value)
    assert "\n" not in message
    assert f"{folder / 'deck.in'} line 2: " in message
    assert not (tmp_path / "ran").exists()


@pytest.mark.parametrize(("expression", "message"), [
    ("'x' * 10**10", "repeating 1 items 10000000000 times is too large for a template (at most 10,000,000)"),
    ("case_id * [0] * 10**6", "repeating 21 items 1000000 times is too large for a template (at most 10,000,000)"),
    ("10 ** 1000000", "10 ** 1000000 is too large for a template (more than 100000 bits)"),
])
def test_repetition_and_powers_that_would_eat_memory_or_time_are_refused(expression, message):
    with pytest.raises(TemplateError) as info:
        render_text("{{ " + expression + " }}", CONTEXT, where="deck")
    assert str(info.value) == f"deck line 1: OverflowError: {message}"


def test_ordinary_arithmetic_and_repetition_still_work():
    text = "{{ 2 ** 64 }} {{ '-' * 3 }} {{ 2 * ramp_angle }} {{ mach ** 2 }} {{ ([0] * case_id) | length }}"
    assert render_text(text, CONTEXT, where="deck") == "18446744073709551616 --- 16.0 0.81 21"


def test_the_random_filter_is_gone_so_a_case_depends_only_on_its_design():
    with pytest.raises(TemplateError, match="No filter named 'random'"):
        render_text("{{ [1, 2, 3] | random }}", CONTEXT, where="deck")


def test_an_expression_that_fails_is_one_line_naming_the_line():
    with pytest.raises(TemplateError) as info:
        render_text("a\nb = {{ 1 / (case_id - 21) }}\n", CONTEXT, where="template file deck.in")
    assert str(info.value) == "template file deck.in line 2: ZeroDivisionError: division by zero"


# --------------------------------------------------------------------------- links and special files


def test_a_symlink_out_of_the_template_is_refused_and_never_copied(tmp_path):
    folder = tmp_path / "template"
    folder.mkdir()
    (folder / "deck.in").write_text("mach {{ mach }}\n")
    (folder / "passwd").symlink_to("/etc/passwd")
    (folder / "zeros").symlink_to("/dev/zero")
    (folder / "up").symlink_to("../outside")  # relative, still outside
    with pytest.raises(TemplateError, match=r"template/passwd is a symlink to /etc/passwd, outside the template folder"):
        render_folder(folder, tmp_path / "case", CONTEXT, None)
    assert not (tmp_path / "case" / "passwd").exists()
    assert not (tmp_path / "case" / "zeros").exists()
    problems = template_problems(folder, None, [("baseline", CONTEXT)])
    assert [p.split(" is a ")[0] for p in problems] == [f"solver.template: {folder / n}" for n in ("passwd", "up", "zeros")]


def _make_special(path: Path, kind: str) -> None:
    if kind == "FIFO":
        os.mkfifo(path)
    elif kind == "socket":
        sock = socket.socket(socket.AF_UNIX)
        try:
            sock.bind(str(path))  # the socket file stays after the socket is closed
        except OSError as err:  # a path longer than AF_UNIX allows
            pytest.skip(f"cannot bind a Unix socket at {path}: {err}")
        finally:
            sock.close()
    else:
        try:
            os.mknod(path, stat.S_IFCHR | 0o600, os.makedev(1, 5))  # the numbers of /dev/zero
        except PermissionError:
            pytest.skip("making a device file needs root")


@pytest.mark.parametrize("kind", ["FIFO", "socket", "character device"])
def test_a_special_file_in_the_template_is_refused_without_reading_it(kind, tmp_path):
    folder = tmp_path / "t"
    folder.mkdir()
    (folder / "deck.in").write_text("mach {{ mach }}\n")
    _make_special(folder / "sp", kind)
    errors: list[BaseException] = []

    def render() -> None:
        try:
            render_folder(folder, tmp_path / "case", CONTEXT, None)
        except BaseException as err:  # collected for the assertion below
            errors.append(err)

    worker = threading.Thread(target=render, daemon=True)  # reading a FIFO or /dev/zero would never end
    worker.start()
    worker.join(10)
    assert not worker.is_alive(), f"rendering blocked on a {kind}"
    assert len(errors) == 1 and isinstance(errors[0], TemplateError)
    assert str(errors[0]) == (f"solver.template: {folder / 'sp'} is a {kind}, not a regular file; a template folder "
                              "holds only files, folders and symlinks inside it")
    assert not (tmp_path / "case" / "sp").exists()
    assert template_problems(folder, None, [("baseline", CONTEXT)]) == [str(errors[0])]


def test_a_symlink_inside_the_template_points_at_the_cases_rendered_copy(tmp_path):
    folder = tmp_path / "template"
    (folder / "decks").mkdir(parents=True)
    (folder / "decks" / "transonic.in").write_text("mach {{ mach }}\n")
    (folder / "case.in").symlink_to("decks/transonic.in")
    (folder / "loop").symlink_to(".")  # a link to its own folder is recreated, never walked into
    workdir = tmp_path / "case"
    render_folder(folder, workdir, CONTEXT, None)
    assert (workdir / "case.in").is_symlink()
    assert os.readlink(workdir / "case.in") == "decks/transonic.in"
    assert (workdir / "case.in").read_text() == "mach 0.9\n"
    assert os.readlink(workdir / "loop") == "."
    assert template_problems(folder, None, [("baseline", CONTEXT)]) == []


# --------------------------------------------------------------------------- sortie check renders the baseline


def test_check_refuses_an_undefined_name_naming_file_line_and_name(tmp_path):
    config = write_campaign(tmp_path, deck="ramp_angle = {{ ramp_angle }}\nmach = {{ mach }}\nnozzle = {{ nozzle }}\n")
    with pytest.raises(ConfigError) as info:
        load_checked_config(config)
    assert info.value.problems == [
        f"template file {tmp_path / 'template' / 'case.in'} line 3: 'nozzle' is undefined; placeholders available: "
        "case_id, case_name, design_id, fin_count, mach, ramp_angle (baseline design at mach=0.6)"]


def test_check_refuses_a_template_syntax_error_naming_file_and_line(tmp_path):
    config = write_campaign(tmp_path, deck="ramp_angle = {{ ramp_angle }}\n{% if mach > 1 %}\nmach = {{ mach }}\n")
    with pytest.raises(ConfigError) as info:
        load_checked_config(config)
    [line] = info.value.problems
    assert line.startswith(f"template file {tmp_path / 'template' / 'case.in'} line 3: template syntax error (")


def test_check_renders_every_condition_and_the_command(tmp_path):
    deck = "ramp_angle = {{ ramp_angle }}\nmach = {{ mach }}\n{% if mach > 1 %}{{ shock_model }}{% endif %}\n"
    config = write_campaign(tmp_path, deck=deck, solver={"command": ["./solver.py", "{{ output_name }}"]})
    with pytest.raises(ConfigError) as info:
        load_checked_config(config)
    assert [line.split(": ", 1)[0] for line in info.value.problems] == [
        f"template file {tmp_path / 'template' / 'case.in'} line 3", "solver.command[1] line 1"]
    assert info.value.problems[0].endswith("(baseline design at mach=1.1)")  # mach 0.6 renders; 1.1 does not


def test_check_refuses_a_symlink_out_of_the_template(tmp_path):
    config = write_campaign(tmp_path)
    (tmp_path / "template" / "passwd").symlink_to("/etc/passwd")
    with pytest.raises(ConfigError, match="is a symlink to /etc/passwd, outside the template folder"):
        load_checked_config(config)


def test_check_accepts_a_template_that_renders_and_leaves_no_files(tmp_path):
    config = write_campaign(tmp_path)
    before = sorted(tmp_path.rglob("*"))
    assert load_checked_config(config).solver["command"] == ["./solver.py", "out.txt"]
    assert sorted(tmp_path.rglob("*")) == before


@pytest.mark.slow
def test_sortie_check_prints_one_line_per_template_problem_and_exits_2(tmp_path):
    config = write_campaign(tmp_path, deck="ramp_angle = {{ ramp_angle }}\nnozzle = {{ nozzle }}\n")
    (tmp_path / "template" / "zeros").symlink_to("/dev/zero")
    result = subprocess.run([sys.executable, "-m", "sortie.cli", "check", str(config)], capture_output=True, text=True,
                            cwd=tmp_path, timeout=120, env={**os.environ, "NO_COLOR": "1"})
    assert result.returncode == 2, result.stderr
    assert "Traceback" not in result.stderr
    lines = result.stderr.splitlines()
    assert len(lines) == 2, lines
    assert "zeros is a symlink to /dev/zero, outside the template folder" in lines[0]
    assert "case.in line 2: 'nozzle' is undefined" in lines[1]


# --------------------------------------------------------------------------- a template error during a run


def test_a_template_error_during_a_run_fails_only_that_case_with_one_line(tmp_path):
    """A value-dependent error passes the baseline check; the case it hits fails with a reason, nothing starts."""
    folder = tmp_path / "template"
    folder.mkdir()
    (folder / "deck.in").write_text("teeth = {{ 12 // (fin_count - 2) }}\n")
    options = CommandOptions(adapter="command", template="template", command=["true"])
    adapter = CommandAdapter(options, {}, tmp_path)
    case = CaseSpec(5, "d0005-c0", 5, {"fin_count": 2}, {"mach": 0.9}, tmp_path / "cases" / "d0005-c0")
    handle = adapter.start(case)
    assert handle.job_id == ""
    assert adapter.poll(handle) is JobState.FAILED
    outcome = adapter.collect(handle, case)
    assert outcome.failure_class == "solver"
    assert outcome.reason == (f"the case's input could not be rendered: template file {folder / 'deck.in'} line 1: "
                              "ZeroDivisionError: integer division or modulo by zero")
    assert adapter.attach(case, handle.job_id, None) is None  # a resumed run renders it again


def test_a_misspelt_name_gets_a_suggestion_and_a_short_list():
    context = {**{f"strut_station_{i}": 0.1 * i for i in range(20)}, "ramp_angle": 8.0}
    with pytest.raises(TemplateError) as info:
        render_text("angle {{ ramp_angel }}", context, where="deck")
    message = str(info.value)
    assert message.startswith("deck line 1: 'ramp_angel' is undefined (did you mean 'ramp_angle'?); placeholders "
                              "available: ramp_angle, strut_station_0, ")
    assert message.endswith(" ... (21 in all)")
    assert len(message) < 200
