"""Rendering a case folder from the template folder.

Solver input files are full of ``$var;``, ``{ }`` blocks, ``#include`` lines and shell
``${#array[@]}``; all of it must pass through byte for byte. Only our placeholders change:
``{{ name }}`` (a parameter, a condition, ``case_name``, ``case_id``, ``design_id``) and
``{% ... %}`` blocks. Jinja2's comment syntax is moved to ``<#-- ... --#>`` because its default
``{#`` occurs in shell scripts. Undefined placeholders are errors, never blanks.
"""

from __future__ import annotations

import fnmatch
import shutil
from collections.abc import Mapping, Sequence
from pathlib import Path
from typing import Any

import jinja2

from sortie.errors import AdapterError

_CR = "\ufdd0"  # a Unicode noncharacter: never present in real input files
_ENV = jinja2.Environment(
    undefined=jinja2.StrictUndefined,
    keep_trailing_newline=True,
    autoescape=False,
    comment_start_string="<#--",
    comment_end_string="--#>",
)


def render_text(text: str, context: Mapping[str, Any], *, where: str) -> str:
    """Render one template text; ``where`` names it in the error message."""
    # Jinja2 turns every CR LF and lone CR into LF; hide CRs from it so line endings survive.
    hidden = text.replace("\r", _CR)
    try:
        return _ENV.from_string(hidden).render(**context).replace(_CR, "\r")
    except jinja2.UndefinedError as err:
        known = ", ".join(sorted(context))
        raise AdapterError(f"{where}: {err.message}; placeholders available: {known}") from None
    except jinja2.TemplateSyntaxError as err:
        raise AdapterError(f"{where} line {err.lineno}: template syntax error ({err.message}); only {{{{ name }}}} and {{% ... %}} are placeholders") from None


def render_folder(template: Path, workdir: Path, context: Mapping[str, Any], render: Sequence[str] | None) -> None:
    """Copy ``template`` into ``workdir``, rendering text files that match ``render`` globs.

    With ``render`` None every UTF-8 file is rendered; other files are copied unchanged (modes
    kept, so run scripts stay executable).
    """
    if not template.is_dir():
        raise AdapterError(f"solver.template: {template} is not a folder; give the folder holding the solver's input files")
    for src in sorted(template.rglob("*")):
        rel = src.relative_to(template)
        dst = workdir / rel
        if src.is_dir():
            dst.mkdir(parents=True, exist_ok=True)
            continue
        dst.parent.mkdir(parents=True, exist_ok=True)
        if render is not None and not any(fnmatch.fnmatch(rel.as_posix(), g) for g in render):
            shutil.copy2(src, dst)
            continue
        raw = src.read_bytes()
        try:
            text = raw.decode("utf-8")
        except UnicodeDecodeError:
            shutil.copy2(src, dst)
            continue
        dst.write_bytes(render_text(text, context, where=f"template file {src}").encode("utf-8"))
        shutil.copymode(src, dst)
