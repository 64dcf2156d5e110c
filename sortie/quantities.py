"""Reading quantities out of solver output files by the rules of the config.

Four rules, one per common output shape: a regular expression with a named ``value`` group (the
last match wins, since solvers print converging values), ``key = value`` lines, a column of a CSV
file (last row), and a dotted path into a JSON file. A missing file, a missing match or text that
is not a number is reported with the file named, so the user knows where to look.

Only files inside the case folder are read: the config refuses absolute paths and ``..``, and
here the path is resolved (symlinks followed) and refused if it lands outside the folder or is
not a regular file, so a solver or template cannot make sortie read ``/etc/passwd`` or block on
``/dev/zero``.
"""

from __future__ import annotations

import csv
import json
import re
import stat
from collections.abc import Mapping
from pathlib import Path

from sortie.config import QuantitySpec, case_relative_problem
from sortie.shown import shown


class QuantityNotFound(Exception):
    """A rule found nothing usable; the message names the file and the rule."""


def case_file(workdir: Path, name: str) -> Path:
    """``workdir / name`` if it is a regular file inside ``workdir`` (symlinks resolved); a missing
    file is returned as is, so the caller reports it as not written."""
    problem = case_relative_problem(name)
    if problem:
        raise QuantityNotFound(f"output file {shown(name)} {problem}")
    path = workdir / name
    if not path.exists() and not path.is_symlink():
        return path
    folder = workdir.resolve()
    target = path.resolve()
    if not target.is_relative_to(folder):
        raise QuantityNotFound(f"output file {path} leads outside the case folder (to {shown(str(target))}); "
                               f"only files inside {folder} are read")
    try:
        mode = target.stat().st_mode
    except OSError:
        return path
    if not stat.S_ISREG(mode):
        raise QuantityNotFound(f"output file {path} cannot be read (not a regular file but a folder, device or pipe)")
    return target


def read_quantity(workdir: Path, name: str, spec: QuantitySpec) -> str:
    """Return the raw text of quantity ``name`` from ``workdir`` (converted to float by the caller)."""
    assert spec.file is not None
    path = case_file(Path(workdir), spec.file)
    try:
        text = path.read_text(encoding="utf-8", errors="replace")
    except FileNotFoundError:
        raise QuantityNotFound(f"output file {path} was not written") from None
    except OSError as err:
        raise QuantityNotFound(f"output file {path} cannot be read ({err.strerror})") from None
    if spec.pattern is not None:
        matches = list(re.finditer(spec.pattern, text, flags=re.MULTILINE))
        if not matches:
            raise QuantityNotFound(f"pattern {spec.pattern!r} for {name!r} matches nothing in {path}")
        return matches[-1].group("value")
    if spec.key is not None:
        found = None
        for line in text.splitlines():
            key, sep, value = line.partition("=")
            if sep and key.strip() == spec.key:
                found = value.strip()
        if found is None:
            raise QuantityNotFound(f"no line '{spec.key} = ...' for {name!r} in {path}")
        return found
    if spec.column is not None:
        rows = list(csv.DictReader(text.splitlines()))
        if not rows or spec.column not in rows[-1]:
            raise QuantityNotFound(f"CSV file {path} has no column {spec.column!r} (or no rows) for {name!r}")
        return rows[-1][spec.column]
    assert spec.json_path is not None
    try:
        node = json.loads(text)
    except json.JSONDecodeError as err:
        raise QuantityNotFound(f"{path} is not valid JSON ({err.msg} at line {err.lineno})") from None
    for part in spec.json_path.split("."):
        if isinstance(node, list) and part.lstrip("-").isdigit() and -len(node) <= int(part) < len(node):
            node = node[int(part)]
        elif isinstance(node, Mapping) and part in node:
            node = node[part]
        else:
            raise QuantityNotFound(f"JSON path {spec.json_path!r} for {name!r} does not exist in {path}")
    return str(node)
