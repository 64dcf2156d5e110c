"""Reading a config's YAML defensively: bounded size and depth, no aliases, no duplicate keys.

A campaign config is a small hand-written file, so anything far from that shape is refused
before it can cost time or memory:

* files over :data:`MAX_BYTES` are refused before they are parsed (a 50 MB file would take
  minutes in the pure-Python parser);
* anchors and aliases (``&a``, ``*a``) are refused at the first event that carries one, so an
  alias bomb is refused before anything is expanded; a config has no need to share nodes;
* nesting deeper than :data:`MAX_DEPTH` is refused while the event stream is composed, before the
  recursive composer and constructor could exhaust Python's stack;
* more than :data:`MAX_NODES` values are refused while composing (a config has a few hundred),
  which bounds the time spent in Python whatever fits in the byte cap;
* a key given twice in one mapping is refused with both lines, instead of the last one silently
  winning.

The scanner and parser are libyaml's when PyYAML was built with it (the wheels are), else
PyYAML's pure-Python ones; both are iterative state machines, so a deep or huge document
reaches these checks without recursion. Composing and constructing stay in Python, where the
checks live.
"""

from __future__ import annotations

from typing import Any

import yaml
from yaml.composer import Composer
from yaml.constructor import SafeConstructor
from yaml.events import AliasEvent, CollectionStartEvent
from yaml.nodes import MappingNode, Node
from yaml.parser import Parser
from yaml.reader import Reader
from yaml.resolver import Resolver
from yaml.scanner import Scanner

from sortie.errors import ConfigError
from sortie.shown import clip, shown

MAX_BYTES = 1_000_000
MAX_DEPTH = 50
MAX_NODES = 10_000


class _Refused(yaml.YAMLError):
    """A document this loader refuses on purpose; ``mark`` points at the offending place."""

    def __init__(self, problem: str, mark: yaml.Mark | None) -> None:
        super().__init__(problem)
        self.problem = problem
        self.problem_mark = mark


class _Checks(Composer, SafeConstructor, Resolver):
    """The composing and constructing half of a safe loader, with the refusals of the module doc."""

    def _start_checks(self) -> None:
        Composer.__init__(self)
        SafeConstructor.__init__(self)
        Resolver.__init__(self)
        self._depth = 0
        self._nodes = 0

    def compose_node(self, parent: Node | None, index: Any) -> Node:  # type: ignore[override]
        event = self.peek_event()
        self._nodes += 1
        if self._nodes > MAX_NODES:
            raise _Refused(f"holds more than {MAX_NODES:,} values; a config has a few hundred", event.start_mark)
        if isinstance(event, AliasEvent):
            raise _Refused(f"alias *{clip(event.anchor, 40)} is not allowed; write the value out "
                           f"(anchors and aliases are refused)", event.start_mark)
        if getattr(event, "anchor", None) is not None:
            raise _Refused(f"anchor &{clip(event.anchor, 40)} is not allowed; write each value out "
                           f"(anchors and aliases are refused)", event.start_mark)
        deeper = isinstance(event, CollectionStartEvent)
        if deeper:
            self._depth += 1
            if self._depth > MAX_DEPTH:
                raise _Refused(f"nested more than {MAX_DEPTH} levels deep; allowed: at most {MAX_DEPTH} levels", event.start_mark)
        try:
            return super().compose_node(parent, index)
        finally:
            if deeper:
                self._depth -= 1

    def construct_mapping(self, node: MappingNode, deep: bool = False) -> dict[Any, Any]:  # type: ignore[override]
        seen: dict[Any, int] = {}
        for key_node, _ in node.value:
            if not isinstance(key_node, yaml.ScalarNode):
                continue  # an unhashable key: PyYAML's own error says so
            key = self.construct_object(key_node, deep=False)
            line = key_node.start_mark.line + 1
            try:
                first = seen.get(key)
            except TypeError:
                continue
            if first is not None:
                where = f"line {line}" if first == line else f"lines {first} and {line}"
                raise _Refused(f"key {shown(key, 60)} is given twice ({where}); "
                               f"keep one", key_node.start_mark)
            seen[key] = line
        return super().construct_mapping(node, deep=deep)


class _PureLoader(Reader, Scanner, Parser, _Checks):
    """PyYAML's pure-Python reader, scanner and parser under the checks."""

    def __init__(self, stream: str) -> None:
        Reader.__init__(self, stream)
        Scanner.__init__(self)
        Parser.__init__(self)
        self._start_checks()


try:
    from yaml._yaml import CParser
except ImportError:  # PyYAML built without libyaml: correct, only slower
    StrictLoader: type = _PureLoader
else:
    class _LibyamlLoader(_Checks, CParser):  # _Checks first: its composer replaces libyaml's
        """libyaml's scanner and parser (fast) under the checks."""

        def __init__(self, stream: str) -> None:
            CParser.__init__(self, stream)
            self._start_checks()

    StrictLoader = _LibyamlLoader


def load_yaml(text: str, source: str) -> Any:
    """Parse ``text`` with :class:`StrictLoader`; any problem is one ConfigError line naming the line."""
    if len(text) > MAX_BYTES:
        raise ConfigError([too_big(source, len(text.encode("utf-8", errors="replace")))])
    loader = StrictLoader(text)
    try:
        return loader.get_single_data()
    except yaml.YAMLError as err:
        raise ConfigError([_yaml_line(err, source)]) from None
    except RecursionError:  # only if the interpreter's stack is far smaller than MAX_DEPTH needs
        raise ConfigError([f"{source}: nested too deeply; allowed: at most {MAX_DEPTH} levels"]) from None
    finally:
        loader.dispose()


def too_big(source: str, n_bytes: int) -> str:
    return (f"{source}: the file is {n_bytes:,} bytes; a config may be at most {MAX_BYTES:,} bytes "
            f"(is this the right file?)")


def _yaml_line(err: yaml.YAMLError, source: str) -> str:
    mark = getattr(err, "problem_mark", None)
    where = f"{source} line {mark.line + 1}, column {mark.column + 1}" if mark else source
    problem = getattr(err, "problem", None) or str(err).splitlines()[0]
    if isinstance(err, _Refused):
        return f"{where}: {problem}"
    return f"{where}: not valid YAML ({clip(problem, 120)})"
