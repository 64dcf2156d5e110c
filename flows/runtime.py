"""Prefect settings for a campaign: offline and quiet.

These must be in the environment before ``prefect`` is first imported, so every entry point that
runs a flow calls :func:`configure_prefect` first. A user's own settings always win: only unset
variables get our defaults.
"""

from __future__ import annotations

import logging
import os

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


def configure_prefect() -> None:
    """Put our defaults in the environment; must run before ``prefect`` is imported."""
    for key, value in DEFAULTS.items():
        os.environ.setdefault(key, value)
    # Prefect's background services log under their class names, outside the "prefect" tree, so
    # the level above does not reach them; at exit they report flushing progress as warnings.
    for name in ("EventsWorker", "APILogWorker"):
        logging.getLogger(name).setLevel(logging.ERROR)
