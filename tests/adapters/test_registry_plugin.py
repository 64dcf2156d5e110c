"""A third-party package adds an adapter through the entry-point group, without touching sortie."""

from __future__ import annotations

import sys
from pathlib import Path

import pytest

from sortie.adapters import registry

PLUGIN = '''
from pydantic import BaseModel, ConfigDict

class EchoOptions(BaseModel):
    model_config = ConfigDict(extra="forbid")
    adapter: str
    gain: float = 1.0

class EchoAdapter:
    Options = EchoOptions
    poll_interval_s = 0.0

    def __init__(self, options, quantities, base_dir):
        self.options = options

    @classmethod
    def check(cls, options, quantities, base_dir):
        return [] if options.gain > 0 else ["solver.gain: must be positive"]
'''


@pytest.fixture
def installed_plugin(tmp_path: Path, monkeypatch: pytest.MonkeyPatch) -> Path:
    """A minimal installed distribution: a module plus a dist-info folder declaring the entry point."""
    (tmp_path / "echo_plugin.py").write_text(PLUGIN)
    info = tmp_path / "echo_plugin-0.1.dist-info"
    info.mkdir()
    (info / "METADATA").write_text("Metadata-Version: 2.1\nName: echo-plugin\nVersion: 0.1\n")
    (info / "entry_points.txt").write_text(f"[{registry.GROUP}]\necho = echo_plugin:EchoAdapter\n")
    monkeypatch.syspath_prepend(str(tmp_path))
    yield tmp_path
    sys.modules.pop("echo_plugin", None)


def test_plugin_adapter_is_found_and_built_from_its_own_options(installed_plugin: Path) -> None:
    assert {"command", "python", "echo"} <= set(registry.available())
    adapter = registry.build_adapter({"adapter": "echo", "gain": 2.5}, {}, installed_plugin)
    assert type(adapter).__name__ == "EchoAdapter" and adapter.options.gain == 2.5


def test_plugin_options_are_validated_like_our_own(installed_plugin: Path) -> None:
    problems = registry.check_solver({"adapter": "echo", "gian": 2}, installed_plugin)
    assert problems == ["solver.gian: unknown key; did you mean 'gain'? (allowed here: adapter, gain)"]
    assert registry.check_solver({"adapter": "echo", "gain": -1}, installed_plugin) == ["solver.gain: must be positive"]
