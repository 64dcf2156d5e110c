"""Prefect settings for a campaign: offline and quiet.

These must be in the environment before ``prefect`` is first imported, so every entry point that
runs a flow calls :func:`configure_prefect` first. A user's own settings always win: only unset
variables get our defaults. Prefect's home goes inside the campaign folder.
"""

from __future__ import annotations

import logging
import os
from pathlib import Path

DEFAULTS = {
    "DO_NOT_TRACK": "1",
    "PREFECT_SERVER_ANALYTICS_ENABLED": "false",
    "PREFECT_SERVER_EPHEMERAL_ENABLED": "true",
    "PREFECT_SERVER_EPHEMERAL_STARTUP_TIMEOUT_SECONDS": "120",
    "PREFECT_SERVER_UI_ENABLED": "false",
    "PREFECT_LOGGING_LEVEL": "ERROR",  # its warnings (event flushing at exit) mean nothing to a campaign user
    # A local API server logs an "Error flushing events" traceback on a healthy shutdown.
    "PREFECT_SERVER_LOGGING_LEVEL": "CRITICAL",
    "PREFECT_LOGGING_TO_API_ENABLED": "false",
}


PREFECT_DIR = ".prefect"


def configure_prefect(campaign_dir: Path | None = None) -> bool:
    """Put our defaults in the environment; must run before ``prefect`` is imported.

    With ``campaign_dir``, Prefect's home (its database, profiles, memo store, local result
    storage and logging settings all live under it) is ``campaign_dir/.prefect`` unless the user
    set ``PREFECT_HOME``: nothing is written under the user's home folder, and Prefect's records
    stay, and go, with the campaign. Returns True when the home is the campaign's own (so its
    database may be replaced: the ledger, not Prefect, is the campaign's record).
    """
    for key, value in DEFAULTS.items():
        os.environ.setdefault(key, value)
    owned = False
    if campaign_dir is not None and "PREFECT_HOME" not in os.environ:
        home = Path(campaign_dir).resolve() / PREFECT_DIR
        home.mkdir(parents=True, exist_ok=True)
        os.environ["PREFECT_HOME"] = str(home)
        owned = True
    # Prefect's background services log under their class names, outside the "prefect" tree, so
    # the level above does not reach them; at exit they report flushing progress as warnings.
    for name in ("EventsWorker", "APILogWorker"):
        logging.getLogger(name).setLevel(logging.ERROR)
    logging.getLogger("prefect.flow_runs").addFilter(_not_an_interrupt_crash)
    return owned


def _not_an_interrupt_crash(record: logging.LogRecord) -> bool:
    """Drop Prefect's "Crash detected!" error when the crash is Ctrl-C or SIGTERM.

    The campaign flow turns an interrupt inside it into a Cancelled state, which Prefect does not
    call a crash; this filter covers the few milliseconds when the signal lands in Prefect's own
    engine code instead (creating or closing the flow run). Any other crash is still logged.
    """
    message = record.getMessage()
    return not (message.startswith("Crash detected!") and ("interrupt signal" in message or "termination signal" in message))
