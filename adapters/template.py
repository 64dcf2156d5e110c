"""Rendering a case folder from the template folder, in Jinja2's sandbox.

Solver input files are full of ``$var;``, ``{ }`` blocks, ``#include`` lines and shell
``${#array[@]}``; all of it must pass through byte for byte. Only our placeholders change:
``{{ expression }}``, ``{% statement %}`` blocks, and comments, whose syntax is moved to
``<#-- ... --#>`` because Jinja2's default ``{#`` occurs in shell scripts. Undefined names are
errors, never blanks.

Templates may come from someone else (a shared campaign), so they are rendered in Jinja2's
immutable sandbox: attributes starting with ``_``, calls that could escape Python's object
model and changes to the values passed in are refused (``{{ lipsum.__globals__ }}`` is an
error, not a way into ``os``). The ``random`` filter is removed so that a case folder depends
only on its design and condition. Every error is one line naming the file and line.

A template folder is copied entry by entry without following links: a symlink is recreated
only if it points inside the template folder (it then points at the case's own copy), and a
symlink that leads out of it, or a FIFO, socket or device, is refused.

Values placed in shell code (the Slurm batch script) are rendered by :func:`render_shell`:
every ``{{ }}`` becomes one shell word (``shlex.quote``), and a value holding a line break or a
NUL is refused.
"""

from __future__ import annotations

import contextlib
import difflib
import fnmatch
import math
import os
import re
import shlex
import shutil
import stat
import tempfile
import textwrap
import traceback
from collections.abc import Iterator, Mapping, Sequence
from dataclasses import dataclass
from pathlib import Path
from typing import Any, BinaryIO

import jinja2
from jinja2.sandbox import ImmutableSandboxedEnvironment

from sortie.errors import AdapterError

_CR = "\ufdd0"  # a Unicode noncharacter: never present in real input files


class TemplateError(AdapterError):
    """A template that cannot be rendered for a case: one line naming the file (or key) and line."""

    def __init__(self, message: str) -> None:
        super().__init__(" ".join(message.splitlines()))  # an exception's own text may hold line breaks


#: Longest text or list ``*`` may build, and most bits ``**`` may give an integer: a template must
#: not take a run's memory or time (``{{ 'x' * 10**10 }}``, ``{{ 10 ** 10 ** 10 }}``).
MAX_REPEAT = 10_000_000
MAX_POWER_BITS = 100_000


class _Sandbox(ImmutableSandboxedEnvironment):
    """Jinja2's immutable sandbox with ``*`` and ``**`` capped (see MAX_REPEAT, MAX_POWER_BITS)."""

    intercepted_binops = frozenset({"*", "**"})

    def call_binop(self, context: Any, operator: str, left: Any, right: Any) -> Any:
        if operator == "**" and all(isinstance(v, int) for v in (left, right)) and right > 0 and abs(left) > 1 \
                and right * math.log2(abs(left)) > MAX_POWER_BITS:
            raise OverflowError(f"{left} ** {right} is too large for a template (more than {MAX_POWER_BITS} bits)")
        if operator == "*":
            sized, count = (left, right) if isinstance(left, str | list | tuple) else (right, left)
            if isinstance(sized, str | list | tuple) and isinstance(count, int) and len(sized) * count > MAX_REPEAT:
                raise OverflowError(f"repeating {len(sized)} items {count} times is too large for a template "
                                    f"(at most {MAX_REPEAT:,})")
        return super().call_binop(context, operator, left, right)


def _environment(**extra: Any) -> ImmutableSandboxedEnvironment:
    env = _Sandbox(undefined=jinja2.StrictUndefined, keep_trailing_newline=True, autoescape=False,
                   comment_start_string="<#--", comment_end_string="--#>", **extra)
    del env.filters["random"]  # a case folder must depend on its design and condition only
    return env


def _shell_word(value: Any) -> str:
    """One shell word for a value placed into shell code; line breaks and NUL are refused."""
    text = "" if value is None else str(value)
    if "\n" in text or "\r" in text or "\0" in text:
        raise ValueError(f"the value {text[:60]!r} holds a line break or NUL, which is not allowed in shell code")
    return shlex.quote(text)


_ENV = _environment()
_SHELL_ENV = _environment(finalize=_shell_word)


def render_text(text: str, context: Mapping[str, Any], *, where: str) -> str:
    """Render one template text; ``where`` names it in the error message.

    Raises
    ------
    TemplateError
        One line: ``where``, the template line, and what is wrong (an undefined name comes with
        the names available).
    """
    return _render(_ENV, text, context, where)


def render_shell(text: str, context: Mapping[str, Any], *, where: str) -> str:
    """Render a line of shell code: each ``{{ }}`` becomes one quoted shell word (see the module docstring)."""
    return _render(_SHELL_ENV, text, context, where)


def _render(env: jinja2.Environment, text: str, context: Mapping[str, Any], where: str) -> str:
    # Jinja2 turns every CR LF and lone CR into LF; hide CRs from it so line endings survive.
    hidden = text.replace("\r", _CR)
    try:
        return env.from_string(hidden).render(**context).replace(_CR, "\r")
    except jinja2.TemplateSyntaxError as err:
        raise TemplateError(f"{where} line {err.lineno}: template syntax error ({err.message}); see the README's "
                            "'Templates' section for the syntax") from None
    except jinja2.UndefinedError as err:
        raise TemplateError(f"{where}{_line(err)}: {err.message}{_names_hint(err.message or '', context)}") from None
    except jinja2.sandbox.SecurityError as err:
        raise TemplateError(f"{where}{_line(err)}: refused by the template sandbox ({str(err).rstrip('.')}); templates may use "
                            "values, filters and tests, not Python internals") from None
    except Exception as err:  # the template's own expression failed (1/0, 'a' + 1, a refused shell value ...)
        if "no loader" in str(err):
            raise TemplateError(f"{where}{_line(err)}: include, import and extends are not available; each template "
                                "file is rendered on its own (use a macro in the same file)") from None
        raise TemplateError(f"{where}{_line(err)}: {type(err).__name__}: {str(err)[:200]}") from None


def _names_hint(message: str, context: Mapping[str, Any]) -> str:
    """`` (did you mean 'x'?); placeholders available: ...`` for an undefined name, the list kept short."""
    undefined = re.match(r"'(.+)' is undefined$", message)
    if undefined is None:  # an attribute or item of a value, not a missing name
        return ""
    names = sorted(context)
    close = difflib.get_close_matches(undefined[1], names, n=1)
    did = f" (did you mean {close[0]!r}?)" if close else ""
    shown = textwrap.shorten(", ".join(names), 100, placeholder=f" ... ({len(names)} in all)")
    return f"{did}; placeholders available: {shown}"


def _line(err: BaseException) -> str:
    """`` line N`` of the template where ``err`` happened (Jinja2 rewrites tracebacks to template lines)."""
    lines = [frame.lineno for frame in traceback.extract_tb(err.__traceback__) if frame.filename == "<template>"]
    return f" line {lines[-1]}" if lines else ""


# --------------------------------------------------------------------------- template folders


@dataclass(frozen=True)
class _Entry:
    rel: Path
    kind: str  # "dir", "file" or "link"
    link: str | None = None  # for "link": the target, relative to the link's folder


def _entries(template: Path) -> tuple[list[_Entry], list[str]]:
    """What the template folder holds, links not followed, and the entries that are refused."""
    root = Path(os.path.realpath(template))
    entries: list[_Entry] = []
    problems: list[str] = []

    def unreadable(err: OSError) -> None:
        problems.append(f"solver.template: {err.filename} cannot be read ({err.strerror})")

    for folder, dirs, files in os.walk(root, onerror=unreadable, followlinks=False):
        dirs.sort()
        for name in [*dirs, *sorted(files)]:
            path = Path(folder) / name
            rel = path.relative_to(root)
            try:
                mode = path.lstat().st_mode
            except OSError as err:
                unreadable(err)
                continue
            if stat.S_ISLNK(mode):
                target = Path(os.path.realpath(path))
                if target != root and root not in target.parents:
                    problems.append(f"solver.template: {template / rel} is a symlink to {target}, outside the template "
                                    "folder; copy the file into the template instead")
                else:
                    entries.append(_Entry(rel, "link", os.path.relpath(target, path.parent)))
            elif stat.S_ISDIR(mode):
                entries.append(_Entry(rel, "dir"))
            elif stat.S_ISREG(mode):
                entries.append(_Entry(rel, "file"))
            else:
                problems.append(f"solver.template: {template / rel} is a {_special(mode)}, not a regular file; a template "
                                "folder holds only files, folders and symlinks inside it")
    return entries, problems


def _special(mode: int) -> str:
    for test, name in ((stat.S_ISFIFO, "FIFO"), (stat.S_ISSOCK, "socket"), (stat.S_ISBLK, "block device"),
                       (stat.S_ISCHR, "character device")):
        if test(mode):
            return name
    return "special file"


@contextlib.contextmanager
def _open_regular(path: Path) -> Iterator[tuple[BinaryIO, os.stat_result]]:
    """Open ``path`` only if it is still a regular file (not swapped for a link or a FIFO since the walk)."""
    try:
        fd = os.open(path, os.O_RDONLY | os.O_NOFOLLOW | os.O_NONBLOCK)
    except OSError as err:
        raise TemplateError(f"solver.template: {path} cannot be read ({err.strerror})") from None
    with os.fdopen(fd, "rb") as source:
        info = os.fstat(fd)
        if not stat.S_ISREG(info.st_mode):
            raise TemplateError(f"solver.template: {path} is no longer a regular file; a template folder holds only "
                                "files, folders and symlinks inside it")
        yield source, info


def _copy_entry(template: Path, entry: _Entry, workdir: Path, context: Mapping[str, Any],
                render: Sequence[str] | None, *, rendered_only: bool = False) -> None:
    """Recreate one entry in ``workdir``; ``rendered_only`` (a check) skips files that are not rendered."""
    src, dst = template / entry.rel, workdir / entry.rel
    if entry.kind == "dir":
        dst.mkdir(parents=True, exist_ok=True)
        return
    rendered = render is None or any(fnmatch.fnmatch(entry.rel.as_posix(), g) for g in render)
    if rendered_only and (entry.kind == "link" or not rendered):
        return
    dst.parent.mkdir(parents=True, exist_ok=True)
    if entry.kind == "link":
        os.symlink(str(entry.link), dst)  # relative, so it points at the case's copy of the target
        return
    with _open_regular(src) as (source, info):
        if not rendered:
            with open(dst, "wb") as out:
                shutil.copyfileobj(source, out)
        else:
            raw = source.read()
            try:
                text = raw.decode("utf-8")
            except UnicodeDecodeError:  # a binary file: copied unchanged (a check has nothing to render)
                if not rendered_only:
                    dst.write_bytes(raw)
                return
            dst.write_bytes(render_text(text, context, where=f"template file {src}").encode("utf-8", "replace"))
    os.chmod(dst, stat.S_IMODE(info.st_mode))  # modes kept, so run scripts stay executable


def render_folder(template: Path, workdir: Path, context: Mapping[str, Any], render: Sequence[str] | None) -> None:
    """Copy ``template`` into ``workdir``, rendering text files that match ``render`` globs.

    With ``render`` None every UTF-8 file is rendered; other files are copied unchanged (modes
    kept, so run scripts stay executable).

    Raises
    ------
    TemplateError
        The template folder is missing or holds an entry that is refused, or a file cannot be
        rendered for this context (one line).
    """
    if not template.is_dir():
        raise TemplateError(f"solver.template: {template} is not a folder; give the folder holding the solver's input files")
    entries, problems = _entries(template)
    if problems:
        raise TemplateError(problems[0])
    for entry in entries:
        _copy_entry(template, entry, workdir, context, render)


def template_problems(template: Path, render: Sequence[str] | None, contexts: Sequence[tuple[str, Mapping[str, Any]]]) -> list[str]:
    """What would stop a case folder from being rendered, found before any case runs (``sortie check``).

    Every file is rendered for each ``(label, context)`` into a temporary folder that is removed
    afterwards; a file is reported once, for the first context it fails in, with ``label``
    (which case it was) appended. Refused entries (links out, special files) are reported too.
    """
    if not template.is_dir():
        return []  # reported by the adapter's own check
    entries, problems = _entries(template)
    failed: set[Path] = set()
    with tempfile.TemporaryDirectory(prefix="sortie-check-") as scratch:
        for i, (label, context) in enumerate(contexts):
            workdir = Path(scratch) / str(i)
            for entry in entries:
                if entry.rel in failed or any(p in failed for p in entry.rel.parents):
                    continue
                try:
                    _copy_entry(template, entry, workdir, context, render, rendered_only=True)
                except TemplateError as err:
                    failed.add(entry.rel)
                    problems.append(f"{err} ({label})")
            shutil.rmtree(workdir, ignore_errors=True)
    return problems
