"""Reading and checking the mock solver's input deck.

The deck is the only channel from the orchestrator to the solver (besides ``SORTIE_MOCK_*``
environment variables for the misbehaviour knobs), exactly as with a real solver. Everything a
user can get wrong raises :class:`DeckError` whose message is one sentence naming the problem and
what is allowed, so the command-line front end can print it and exit with code 2.

Nothing here imports ``sortie``: the mock is a separate program that must run without it.
"""

from __future__ import annotations

import math
import os
import re
from collections.abc import Mapping
from dataclasses import dataclass, field
from typing import Final

from . import physics

#: Prefix of the environment variables that override knobs (environment wins over the deck).
ENV_PREFIX: Final[str] = "SORTIE_MOCK_"

#: Misbehaviour and timing knobs with their defaults (as deck text).
KNOB_DEFAULTS: Final[dict[str, str]] = {
    "run_time_s": "0",
    "noise": "0",
    "seed": "0",
    "crash_rate": "0",
    "hang_rate": "0",
    "garbage_rate": "0",
    "nan_rate": "0",
    "crash_exit_code": "3",
    "mesh_fail_region": "",
    "log": "",
    "spawn_children": "0",
}

#: Every key the solver understands; anything else in the deck is reported and ignored.
KNOWN_KEYS: Final[frozenset[str]] = frozenset(
    (*physics.ACTIVE_PARAMETERS, "mach", *KNOB_DEFAULTS)
)

_KEY_RE = re.compile(r"^[A-Za-z_][A-Za-z0-9_]*$")
_CLAUSE_RE = re.compile(
    r"^\s*([A-Za-z_][A-Za-z0-9_]*)\s*(<=|>=|<|>)\s*([-+]?(?:\d+\.?\d*|\.\d+)(?:[eE][-+]?\d+)?)\s*$"
)
_AND_RE = re.compile(r"\s+and\s+")
_TRUE = frozenset({"1", "yes", "true", "on"})
_FALSE = frozenset({"0", "no", "false", "off"})


class DeckError(Exception):
    """A problem with the deck or a knob, described in one sentence."""


@dataclass(frozen=True)
class Clause:
    """One ``name OP number`` comparison of a mesh-failure region."""

    name: str
    op: str
    value: float

    def holds(self, values: Mapping[str, float]) -> bool:
        """Whether the comparison is true for these parameter values."""
        x = values[self.name]
        if self.op == "<":
            return x < self.value
        if self.op == "<=":
            return x <= self.value
        if self.op == ">":
            return x > self.value
        return x >= self.value

    def __str__(self) -> str:
        return f"{self.name} {self.op} {self.value:g}"


@dataclass(frozen=True)
class Knobs:
    """Timing and failure-injection settings, after the environment has been applied."""

    run_time_s: float = 0.0
    noise: float = 0.0
    seed: int = 0
    crash_rate: float = 0.0
    hang_rate: float = 0.0
    garbage_rate: float = 0.0
    nan_rate: float = 0.0
    crash_exit_code: int = 3
    mesh_fail_region: tuple[Clause, ...] = ()
    log: str | None = None
    spawn_children: bool = False


@dataclass(frozen=True)
class Case:
    """A fully checked solver case: physics inputs, knobs, and what to tell the user."""

    params: dict[str, float]
    mach: float
    knobs: Knobs
    ignored_keys: tuple[str, ...] = ()
    warnings: tuple[str, ...] = field(default_factory=tuple)


def parse_deck(text: str, source: str = "the input deck") -> dict[str, str]:
    """Split deck text into ``key -> raw value``.

    Lines are ``key = value``; ``#`` starts a comment (whole line, or after whitespace at the end
    of a line); blank lines are skipped. A repeated key is an error because silently taking one of
    two values would hide a templating mistake.
    """
    entries: dict[str, str] = {}
    for number, raw in enumerate(text.splitlines(), start=1):
        line = raw.strip()
        if not line or line.startswith("#"):
            continue
        line = re.split(r"\s#", line, maxsplit=1)[0].strip()
        if "=" not in line:
            raise DeckError(
                f"line {number} of {source} reads {raw.strip()!r}, which is not a 'key = value' "
                "line; allowed are 'key = value' lines, '#' comments and blank lines."
            )
        key, value = (part.strip() for part in line.split("=", 1))
        if not _KEY_RE.match(key):
            raise DeckError(
                f"line {number} of {source} has the key {key!r}; keys must be letters, digits "
                "and underscores, starting with a letter or underscore."
            )
        if key in entries:
            raise DeckError(
                f"the key {key!r} appears twice in {source} (second time on line {number}); "
                "each key may appear only once."
            )
        entries[key] = value
    return entries


def parse_region(expr: str) -> tuple[Clause, ...]:
    """Parse ``name OP number [and name OP number ...]`` by hand (no ``eval``).

    Names must be physics parameters or ``mach`` so that a typo cannot make a region that
    silently never matches.
    """
    text = expr.strip()
    if not text:
        return ()
    allowed = (*physics.ACTIVE_PARAMETERS, "mach")
    clauses: list[Clause] = []
    for part in _AND_RE.split(text):
        match = _CLAUSE_RE.match(part)
        if match is None:
            raise DeckError(
                f"mesh_fail_region has the clause {part.strip()!r}; each clause must be "
                "'name OP number' with OP one of <, <=, >, >=, and clauses are joined by 'and'."
            )
        name, op, number = match.groups()
        if name not in allowed:
            raise DeckError(
                f"mesh_fail_region names {name!r}, which is not an input of this solver; "
                f"allowed names are {', '.join(allowed)}."
            )
        clauses.append(Clause(name, op, float(number)))
    return tuple(clauses)


def in_region(clauses: tuple[Clause, ...], values: Mapping[str, float]) -> bool:
    """True when every clause holds; an empty region never matches."""
    return bool(clauses) and all(c.holds(values) for c in clauses)


def _number(key: str, raw: str, where: str) -> float:
    try:
        value = float(raw)
    except ValueError:
        raise DeckError(
            f"{key} = {raw!r} {where} is not a number; give a finite decimal number."
        ) from None
    if not math.isfinite(value):
        raise DeckError(f"{key} = {raw!r} {where} is not finite; give a finite decimal number.")
    return value


def _integer(key: str, raw: str, where: str) -> int:
    value = _number(key, raw, where)
    if not value.is_integer():
        raise DeckError(f"{key} = {raw!r} {where} is not a whole number; give an integer.")
    return int(value)


def resolve_knobs(deck: Mapping[str, str], environ: Mapping[str, str]) -> Knobs:
    """Combine deck knobs with ``SORTIE_MOCK_<KEY>`` variables (a non-empty variable wins)."""
    raw: dict[str, tuple[str, str]] = {}
    for key, default in KNOB_DEFAULTS.items():
        env_name = ENV_PREFIX + key.upper()
        env_value = environ.get(env_name, "")
        if env_value.strip():
            raw[key] = (env_value.strip(), f"(from {env_name})")
        elif key in deck:
            raw[key] = (deck[key], "(in the deck)")
        else:
            raw[key] = (default, "(default)")

    def rate(key: str) -> float:
        value = _number(key, *raw[key])
        if not 0.0 <= value <= 1.0:
            raise DeckError(
                f"{key} = {raw[key][0]} {raw[key][1]} is not a probability; allowed is 0 to 1."
            )
        return value

    def non_negative(key: str) -> float:
        value = _number(key, *raw[key])
        if value < 0.0:
            raise DeckError(
                f"{key} = {raw[key][0]} {raw[key][1]} is negative; allowed is 0 or more."
            )
        return value

    exit_code = _integer("crash_exit_code", *raw["crash_exit_code"])
    if not 1 <= exit_code <= 255:
        raise DeckError(
            f"crash_exit_code = {exit_code} {raw['crash_exit_code'][1]} cannot be a failing exit "
            "status; allowed is 1 to 255."
        )
    spawn_text = raw["spawn_children"][0].lower()
    if spawn_text not in _TRUE | _FALSE:
        raise DeckError(
            f"spawn_children = {raw['spawn_children'][0]!r} {raw['spawn_children'][1]} is not a "
            "switch; allowed are 0 or 1 (also yes/no, true/false)."
        )
    log = raw["log"][0].strip() or None
    if log is not None:
        folder = os.path.dirname(os.path.abspath(log))
        if not os.path.isdir(folder):
            raise DeckError(
                f"log = {log!r} {raw['log'][1]} is in the folder {folder!r}, which does not "
                "exist; point log at a file in an existing folder."
            )
    return Knobs(
        run_time_s=non_negative("run_time_s"),
        noise=non_negative("noise"),
        seed=_integer("seed", *raw["seed"]),
        crash_rate=rate("crash_rate"),
        hang_rate=rate("hang_rate"),
        garbage_rate=rate("garbage_rate"),
        nan_rate=rate("nan_rate"),
        crash_exit_code=exit_code,
        mesh_fail_region=parse_region(raw["mesh_fail_region"][0]),
        log=log,
        spawn_children=spawn_text in _TRUE,
    )


def build_case(deck: Mapping[str, str], environ: Mapping[str, str], source: str) -> Case:
    """Check the physics inputs and knobs of a parsed deck and return the case to run."""
    required = (*physics.ACTIVE_PARAMETERS, "mach")
    missing = [k for k in required if k not in deck]
    if missing:
        lines = ", ".join(f"'{k} = ...'" for k in missing)
        raise DeckError(
            f"{source} has no {lines} line{'s' if len(missing) > 1 else ''}; the solver needs "
            f"every one of {', '.join(required)}."
        )
    where = f"in {source}"
    params: dict[str, float] = {}
    warnings: list[str] = []
    for key in physics.ACTIVE_PARAMETERS:
        value = _number(key, deck[key], where)
        lo, hi = physics.HARD_LIMITS[key]
        if key == "fin_count":
            if not value.is_integer() or int(value) not in physics.FIN_COUNTS:
                allowed = ", ".join(str(n) for n in physics.FIN_COUNTS)
                raise DeckError(
                    f"fin_count = {deck[key]} {where} is not a fin count this sled can carry; "
                    f"allowed are {allowed}."
                )
        elif not lo <= value <= hi:
            raise DeckError(
                f"{key} = {deck[key]} {where} is outside the physically meaningful range; "
                f"allowed is {lo:g} to {hi:g}."
            )
        box_lo, box_hi = physics.BOUNDS[key]
        if not box_lo <= value <= box_hi:
            warnings.append(f"{key} = {value:g} (box {box_lo:g} to {box_hi:g})")
        params[key] = value
    mach = _number("mach", deck["mach"], where)
    m_lo, m_hi = physics.MACH_RANGE
    if not m_lo <= mach <= m_hi:
        raise DeckError(
            f"mach = {deck['mach']} {where} is outside the range this solver is calibrated for; "
            f"allowed is {m_lo} to {m_hi}."
        )
    knobs = resolve_knobs(deck, environ)
    ignored = tuple(sorted(k for k in deck if k not in KNOWN_KEYS))
    return Case(params, mach, knobs, ignored, tuple(warnings))
