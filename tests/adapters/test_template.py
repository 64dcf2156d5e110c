"""Rendering a case folder: solver syntax passes byte for byte, only our placeholders change."""

from __future__ import annotations

import os
import stat
from pathlib import Path

import pytest

from sortie.adapters.base import CaseSpec
from sortie.adapters.template import render_folder, render_text
from sortie.errors import AdapterError

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
