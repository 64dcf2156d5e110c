"""The strict YAML loader: no aliases or anchors, no duplicate keys, bounded size, depth and count.

Every test runs on both back ends: libyaml's scanner (what the PyYAML wheels ship) and PyYAML's
pure-Python one (what a build without libyaml falls back to).
"""

from __future__ import annotations

import pytest

from sortie import yamlsafe
from sortie.errors import ConfigError
from sortie.yamlsafe import MAX_BYTES, MAX_DEPTH, MAX_NODES, load_yaml

BACKENDS = [pytest.param(yamlsafe.StrictLoader, id="default"), pytest.param(yamlsafe._PureLoader, id="pure-python")]


@pytest.fixture(params=BACKENDS)
def backend(request, monkeypatch):
    monkeypatch.setattr(yamlsafe, "StrictLoader", request.param)
    return request.param


def _refusal(text: str) -> str:
    with pytest.raises(ConfigError) as info:
        load_yaml(text, "c.yaml")
    assert len(info.value.problems) == 1
    return info.value.problems[0]


def test_an_ordinary_config_loads_with_its_types(backend):
    text = "a: {b: [1, 2.5, x, yes, .nan], c: 'q', d: 2024-01-01}\nfixed: true\n"
    data = load_yaml(text, "c.yaml")
    assert data["a"]["b"][:4] == [1, 2.5, "x", True]
    assert data["a"]["c"] == "q" and data["fixed"] is True
    assert str(data["a"]["d"]) == "2024-01-01"


@pytest.mark.parametrize(("text", "where", "lines"), [
    ("a: 1\nb: 2\na: 3\n", "c.yaml line 3", "lines 1 and 3"),
    ("top:\n  ramp: {lower: 1}\n  other: 2\n  ramp: {lower: 3}\n", "c.yaml line 4", "lines 2 and 4"),
    ("{a: 1, a: 2}\n", "c.yaml line 1", "(line 1)"),
])
def test_a_key_given_twice_is_refused_with_both_lines(backend, text, where, lines):
    line = _refusal(text)  # PyYAML's own SafeLoader keeps the last one silently
    assert line.startswith(where)
    assert "is given twice" in line and lines in line


@pytest.mark.parametrize("text", ["x: &a [1, 2]\ny: 3\n", "x: [1]\ny: *a\n", "x: &a {k: 1}\ny: {<<: *a}\n"])
def test_anchors_and_aliases_are_refused(backend, text):
    line = _refusal(text)
    assert "anchors and aliases are refused" in line or "not valid YAML" in line


def test_an_alias_bomb_is_refused_at_its_first_anchor(backend):
    lines = ['a: &a ["lol", "lol", "lol", "lol", "lol", "lol", "lol", "lol", "lol"]']
    lines += [f"{b}: &{b} [{', '.join([f'*{a}'] * 9)}]" for a, b in zip("abcdefgh", "bcdefghi", strict=True)]
    line = _refusal("\n".join(lines) + "\n")  # fully expanded, this is 9^9 strings
    assert line.startswith("c.yaml line 1, column 4: anchor &a is not allowed")


@pytest.mark.parametrize("text", [
    "a: " + "[" * 100_000 + "]" * 100_000 + "\n",
    "a: " + "{a: " * 100_000 + "1" + "}" * 100_000 + "\n",
    "a: " + "[" * (MAX_DEPTH + 1) + "]" * (MAX_DEPTH + 1) + "\n",
])
def test_deep_nesting_is_one_line_not_a_recursion_error(backend, text):
    line = _refusal(text)
    assert "nest" in line


def test_nesting_within_the_limit_loads(backend):
    depth = MAX_DEPTH - 1
    data = load_yaml("[" * depth + "1" + "]" * depth, "c.yaml")
    for _ in range(depth - 1):
        data = data[0]
    assert data == [1]


def test_too_many_values_are_refused(backend):
    line = _refusal("a: [" + ", ".join(["1"] * (MAX_NODES + 10)) + "]\n")
    assert f"more than {MAX_NODES:,} values" in line


def test_text_over_the_size_cap_is_refused_before_parsing(backend):
    line = _refusal("a: '" + "x" * MAX_BYTES + "'\n")
    assert line.startswith("c.yaml: the file is 1,000,006 bytes; a config may be at most 1,000,000 bytes")


def test_a_python_tag_never_runs(backend):
    line = _refusal("a: !!python/object/apply:os.system [id]\n")
    assert "could not determine a constructor" in line
