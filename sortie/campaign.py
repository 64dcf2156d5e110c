"""A campaign folder: its config copy, its ledger, its case folders.

``prepare`` makes a new folder or checks that an existing one holds the same campaign, so a
run never writes into a folder that belongs to another study. ``load`` reads the config back from
the ledger, which is the record of truth (the copy in ``config.yaml`` is for people).
"""

from __future__ import annotations

import json
from dataclasses import dataclass
from pathlib import Path

from sortie import changes as config_changes
from sortie.config import CampaignConfig, SolverCheck, config_hash, parse_config
from sortie.errors import CampaignError, LedgerError
from sortie.ledger import Ledger, ledger_path, writable_dir
from sortie.lock import LOCK_NAME

CONFIG_COPY = "config.yaml"
CASES = "cases"


@dataclass(frozen=True)
class Prepared:
    """Outcome of :func:`prepare`: the folder, whether it already held this campaign, and the
    harmless config changes accepted on the way (empty for a new campaign or the same config)."""

    directory: Path
    existed: bool
    accepted: tuple[config_changes.Change, ...] = ()


def prepare(config_path: Path, config: CampaignConfig, directory: Path) -> Prepared:
    """Create the campaign folder and ledger, or accept an existing one with the same config."""
    text = Path(config_path).read_text(encoding="utf-8")
    digest = config_hash(text)
    directory = Path(directory)
    path = ledger_path(directory)
    if path.exists():
        with Ledger.open(path) as ledger:
            meta = ledger.meta()
        if meta.get("config_hash") == digest:
            return Prepared(directory, True)
        accepted = _accept_changes(directory, config_path, config, text, digest)
        return Prepared(directory, True, tuple(accepted))
    if directory.exists() and any(p.name not in (CONFIG_COPY, LOCK_NAME) for p in directory.iterdir()):
        raise LedgerError(f"{directory} is not empty and holds no sortie ledger; choose an empty or new folder with --dir")
    writable_dir(directory)
    meta = {
        "campaign": config.campaign.name,
        "config_text": text,
        "config_hash": digest,
        "base_dir": str(Path(config_path).resolve().parent),
        "conditions": json.dumps(config.condition_list()),
    }
    try:
        (directory / CONFIG_COPY).write_text(text, encoding="utf-8")
        Ledger.create(path, meta).close()
    except OSError as err:
        raise LedgerError(f"{directory}: the campaign cannot be written ({err.strerror or err}); free space or choose another folder with --dir") from None
    return Prepared(directory, False)


def _accept_changes(directory: Path, config_path: Path, config: CampaignConfig, text: str,
                    digest: str) -> list[config_changes.Change]:
    """Record a changed config if every change is harmless; refuse it, naming the keys, if not."""
    old, _ = load(directory)
    found = config_changes.compare(old, config)
    bad = config_changes.breaking(found)
    if bad:
        shown = "; ".join(str(c) for c in bad[:5]) + (f"; and {len(bad) - 5} more" if len(bad) > 5 else "")
        raise CampaignError(
            f"{directory} holds campaign {old.campaign.name!r} and the config changed in {shown}. Parameters, conditions, "
            "quantities, goal, the initial plan, the seed and the solver program cannot change within a campaign "
            "(slots, budget, timeouts, retries and infill settings can); restore them, or start a new campaign with --dir")
    with Ledger.open(ledger_path(directory)) as ledger:
        problems = config_changes.budget_problems(config, len(ledger.designs()))
        if problems:
            raise CampaignError(f"{directory}: {problems[0]}")
        for key, value in (("config_text", text), ("config_hash", digest),
                           ("base_dir", str(Path(config_path).resolve().parent))):
            ledger.set_meta(key, value)
        ledger.event("config-changed", "config changed: " + "; ".join(str(c) for c in found),
                     {"changes": [c.key for c in found]})
    (directory / CONFIG_COPY).write_text(text, encoding="utf-8")
    return found


def upgrade(directory: Path) -> None:
    """Bring a ledger written by an older sortie to the current schema, in place (one transaction).

    ``resume`` calls it under the campaign's lock before anything reads the ledger: readers
    refuse an older ledger rather than read it slowly without the indexes it lacks.
    """
    Ledger.open(ledger_path(directory)).close()


def load(directory: Path, *, check_solver: SolverCheck | None = None) -> tuple[CampaignConfig, Path]:
    """The campaign's config as recorded in its ledger, and the folder its paths are relative to."""
    with Ledger.open(ledger_path(directory), readonly=True) as ledger:
        meta = ledger.meta()
    base_dir = Path(meta["base_dir"])
    config = parse_config(meta["config_text"], base_dir=base_dir, source=str(Path(directory) / CONFIG_COPY),
                          check_solver=check_solver)
    return config, base_dir
