"""Shared fixtures: a quiet in-memory Prefect API for flow tests, and small campaign configs."""

from __future__ import annotations

import signal
import sys
from collections.abc import Iterator
from pathlib import Path
from typing import Any

import pytest
import yaml

pytest_plugins = ["tests.slurm_support"]  # Slurm fixtures for every test file (skip or fail clearly)

ROOT = Path(__file__).resolve().parents[1]
FIXTURES = Path(__file__).resolve().parent / "fixtures"
DEMO_CONFIG = ROOT / "configs" / "sled-aftbody.yaml"
BIN = Path(sys.executable).parent

# A shell without job control starts background commands with SIGINT ignored, and children inherit
# that: the tests' `sortie run` processes would then shrug off the Ctrl-C the tests send them (seen
# when CI was launched with `... &`). A Python handler here is reset to the default in every child
# at exec, so each `sortie` process gets Python's usual KeyboardInterrupt whoever started pytest.
if signal.getsignal(signal.SIGINT) is signal.SIG_IGN:
    signal.signal(signal.SIGINT, signal.default_int_handler)


@pytest.fixture(scope="session")
def prefect_api() -> Iterator[None]:
    """Prefect's temporary API on in-memory SQLite, started once per test session (~15 s)."""
    from sortie.flows.runtime import configure_prefect

    configure_prefect()
    from prefect.settings import (
        PREFECT_API_URL,
        PREFECT_FLOWS_HEARTBEAT_FREQUENCY,
        PREFECT_SERVER_DATABASE_CONNECTION_URL,
        PREFECT_SERVER_EPHEMERAL_ENABLED,
        temporary_settings,
    )

    with temporary_settings(updates={
        PREFECT_SERVER_DATABASE_CONNECTION_URL: "sqlite+aiosqlite:///:memory:",
        PREFECT_FLOWS_HEARTBEAT_FREQUENCY: None,
        PREFECT_SERVER_EPHEMERAL_ENABLED: True,
        PREFECT_API_URL: None,
    }):
        yield


@pytest.fixture(scope="session")
def cli_env(tmp_path_factory: pytest.TempPathFactory) -> Iterator[dict[str, str]]:
    """Environment for ``sortie`` subprocesses sharing one real Prefect API server, as a site's own
    server would be shared; each run then skips the ~10 s of starting its own."""
    import os

    from sortie.flows.server import start_local_api

    home = tmp_path_factory.mktemp("prefect-server")
    saved = {k: os.environ.get(k) for k in ("PREFECT_API_URL", "PREFECT_HOME")}
    os.environ["PREFECT_HOME"] = str(home)
    os.environ.pop("PREFECT_API_URL", None)
    try:
        url = start_local_api(home)  # stopped at exit, and by the kernel if pytest dies
    finally:
        for k, v in saved.items():
            if v is None:
                os.environ.pop(k, None)
            else:
                os.environ[k] = v
    yield {**os.environ, "PREFECT_HOME": str(home), "PREFECT_API_URL": url, "PYTHONUNBUFFERED": "1"}


def branin_config(**changes: Any) -> dict[str, Any]:
    """A two-parameter campaign on the Branin function through the python adapter."""
    config: dict[str, Any] = {
        "campaign": {"name": "branin-test", "seed": 3},
        "parameters": {"x1": {"lower": -5.0, "upper": 10.0, "baseline": 0.0},
                       "x2": {"lower": 0.0, "upper": 15.0, "baseline": 5.0}},
        "conditions": {"scale": [1.0, 2.0]},
        "solver": {"adapter": "python", "function": f"{FIXTURES / 'models.py'}:branin"},
        "quantities": {"f": {}, "g": {}},
        "goal": {"minimize": "mean(f)", "subject_to": ["g <= baseline.g + 10"]},
        "plan": {"initial": {"method": "lhs", "designs": 8}},
        "budget": {"designs": 9},
        "slots": 3,
    }
    for key, value in changes.items():
        section, _, sub = key.partition("__")
        if sub:
            config[section][sub] = value
        else:
            config[section] = value
    return config


def write_config(directory: Path, config: dict[str, Any], name: str = "campaign.yaml") -> Path:
    path = directory / name
    path.write_text(yaml.safe_dump(config, sort_keys=False))
    return path
