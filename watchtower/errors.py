"""The exceptions that end a command with a one-line message, and their exit codes."""

from __future__ import annotations


class WatchtowerError(Exception):
    """Ends a command: ``str(exc)`` is the one line the user sees; ``exit_code`` the status."""

    exit_code = 1


class UsageError(WatchtowerError):
    """Wrong flags, bad endpoints, unreadable inputs: what the user must fix before trying again."""

    exit_code = 2
