"""Finding adapters: the ``sortie.adapters`` entry-point group is the one plug-in mechanism.

sortie's own adapters are registered there by its ``pyproject.toml``; a third-party package adds
its own by declaring an entry point in the same group, without touching sortie.
"""

from __future__ import annotations

import difflib
from collections.abc import Mapping
from importlib.metadata import entry_points
from pathlib import Path
from typing import Any

from pydantic import ValidationError

from sortie.adapters.base import CaseSpec, SolverAdapter
from sortie.config import CampaignConfig, QuantitySpec, format_validation_errors, load_config
from sortie.errors import AdapterError, ConfigError
from sortie.ledger import case_name

GROUP = "sortie.adapters"


def available() -> dict[str, Any]:
    """Installed adapters by name (entry points, not yet loaded)."""
    return {ep.name: ep for ep in entry_points(group=GROUP)}


def adapter_class(name: str) -> Any:
    found = available()
    if name not in found:
        hint = difflib.get_close_matches(name, list(found), n=1)
        did = f"; did you mean {hint[0]!r}?" if hint else ""
        raise AdapterError(f"solver.adapter: {name!r} is not an installed adapter{did} installed: {', '.join(sorted(found))}")
    try:
        return found[name].load()
    except Exception as exc:  # a broken plug-in must not take the CLI down with a traceback
        raise AdapterError(f"solver.adapter: the adapter {name!r} cannot be loaded ({type(exc).__name__}: {exc})") from None


def check_solver(section: Mapping[str, Any], base_dir: Path, quantities: Mapping[str, Any] | None = None) -> list[str]:
    """All problems with the ``solver:`` section, as config lines (used by ``load_config``)."""
    try:
        cls = adapter_class(str(section.get("adapter")))
    except AdapterError as err:
        return [str(err)]
    try:
        options = cls.Options.model_validate(dict(section))
    except ValidationError as err:
        return format_validation_errors(err, cls.Options, prefix="solver.")
    specs = _quantity_specs(quantities or {})
    return list(cls.check(options, specs, Path(base_dir)))


def check_cases(config: CampaignConfig, base_dir: Path) -> list[str]:
    """Problems preparing the baseline design's case at every condition, found before a run.

    An adapter that renders case input (a template folder, a command, a batch script) offers a
    classmethod ``check_cases(options, cases, base_dir) -> problems``; it renders into a
    temporary folder, so an undefined name or a template syntax error is refused by ``sortie
    check`` instead of stopping a run. Adapters without one have nothing to render.
    """
    cls = adapter_class(str(config.solver["adapter"]))
    check = getattr(cls, "check_cases", None)
    if check is None:
        return []
    options = cls.Options.model_validate(dict(config.solver))
    design = config.space().baseline()
    # workdir is never written: checks render into a temporary folder of their own
    cases = [CaseSpec(i + 1, case_name(1, i), 1, design, condition, Path(case_name(1, i)))
             for i, condition in enumerate(config.condition_list())]
    return list(check(options, cases, Path(base_dir)))


def load_checked_config(path: Path) -> CampaignConfig:
    """The config at ``path``, its adapter options checked and the baseline's case input rendered (check, run).

    Raises
    ------
    ConfigError
        With one line per problem.
    """
    config = load_config(path, check_solver=check_solver)
    problems = check_cases(config, Path(path).resolve().parent)
    if problems:
        raise ConfigError(problems)
    return config


def build_adapter(section: Mapping[str, Any], quantities: Mapping[str, QuantitySpec], base_dir: Path) -> SolverAdapter:
    """Construct the configured adapter; raises ConfigError listing every problem."""
    problems = check_solver(section, base_dir, quantities)
    if problems:
        raise ConfigError(problems)
    cls = adapter_class(str(section["adapter"]))
    return cls(cls.Options.model_validate(dict(section)), dict(quantities), Path(base_dir))


def _quantity_specs(raw: Mapping[str, Any]) -> dict[str, QuantitySpec]:
    specs = {}
    for name, spec in raw.items():
        if isinstance(spec, QuantitySpec):
            specs[name] = spec
        else:
            try:
                specs[name] = QuantitySpec.model_validate(spec or {})
            except ValidationError:
                continue  # reported by the config's own validation
    return specs
