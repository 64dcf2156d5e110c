"""A campaign folder: its config copy, its ledger, its case folders.

``prepare`` makes a new folder or checks that an existing one holds the same campaign, so a
run never writes into a folder that belongs to another study. ``load`` reads the config back from
the ledger, which is the record of truth (the copy in ``config.yaml`` is for people).
"""

from __future__ import annotations

import json
from dataclasses import dataclass
from pathlib import Path

from sortie.config import CampaignConfig, SolverCheck, config_hash, parse_config
from sortie.errors import LedgerError
from sortie.ledger import Ledger, ledger_path, writable_dir

CONFIG_COPY = "config.yaml"
CASES = "cases"


@dataclass(frozen=True)
class Prepared:
    """Outcome of :func:`prepare`: the folder and whether it already held this campaign."""

    directory: Path
    existed: bool


def prepare(config_path: Path, config: CampaignConfig, directory: Path) -> Prepared:
    """Create the campaign folder and ledger, or accept an existing one with the same config."""
    text = Path(config_path).read_text(encoding="utf-8")
    digest = config_hash(text)
    directory = Path(directory)
    path = ledger_path(directory)
    if path.exists():
        with Ledger.open(path) as ledger:
            meta = ledger.meta()
        if meta.get("config_hash") != digest:
            raise LedgerError(
                f"{directory} holds campaign {meta.get('campaign', '?')!r} with a different config; "
                "run with the same config to continue it, or choose another folder with --dir"
            )
        return Prepared(directory, True)
    if directory.exists() and any(p.name != CONFIG_COPY for p in directory.iterdir()):
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


def load(directory: Path, *, check_solver: SolverCheck | None = None) -> tuple[CampaignConfig, Path]:
    """The campaign's config as recorded in its ledger, and the folder its paths are relative to."""
    with Ledger.open(ledger_path(directory), readonly=True) as ledger:
        meta = ledger.meta()
    base_dir = Path(meta["base_dir"])
    config = parse_config(meta["config_text"], base_dir=base_dir, source=str(Path(directory) / CONFIG_COPY),
                          check_solver=check_solver)
    return config, base_dir
