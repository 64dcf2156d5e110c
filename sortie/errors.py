"""Typed errors that the CLI turns into one clear line.

Every error a user can cause (a bad config, a solver that misbehaves, a folder that cannot be
written) is a :class:`SortieError`. Its message is a complete sentence that names what is wrong
and what is allowed, so the command-line edge can print ``str(err)`` and exit with code 2 without
a traceback. Library code raises them; only ``sortie.cli`` catches them.
"""

from __future__ import annotations


class SortieError(Exception):
    """Base class: a problem the user can fix, described in one sentence."""


class ConfigError(SortieError):
    """The campaign config is malformed; ``problems`` holds one line per problem."""

    def __init__(self, problems: list[str]) -> None:
        self.problems = list(problems)
        super().__init__("\n".join(self.problems))


class GoalError(SortieError):
    """A goal expression cannot be parsed or evaluated."""


class LedgerError(SortieError):
    """The campaign ledger is missing, belongs to another campaign, or is inconsistent."""


class CampaignError(SortieError):
    """The campaign cannot proceed (for example the baseline design failed)."""


class AdapterError(SortieError):
    """A solver adapter is misconfigured or cannot be found."""
