"""Exceptions for mistakes a user can fix.

Every user-facing error says *where* (a file, a key path such as ``axes.status.moves.solo``, a row
or a field) and *what would be right*. The command line prints ``str(error)`` on one line and exits
with status 1; anything else is an internal error (exit 2).
"""

from __future__ import annotations


class StateworthError(Exception):
    """Base class for errors caused by input: a spec, a panel, a request or an option."""

    def __init__(self, message: str, where: str | None = None) -> None:
        self.message = message
        self.where = where
        super().__init__(f"{where}: {message}" if where else message)


class SpecError(StateworthError):
    """The model spec is malformed or inconsistent. ``where`` is the file and key path."""


class ArtifactError(StateworthError):
    """A compiled-model directory is missing, truncated or changed since it was written."""


class GridTooLargeError(StateworthError):
    """A grid's memory estimate exceeds the configured limit."""


class PanelError(StateworthError):
    """An account panel or market-size table is malformed. ``where`` names file, row, column."""


class QueryError(StateworthError):
    """A valuation request names an unknown axis or level, or asks for something inconsistent.

    ``field`` names the offending request field (for gRPC field violations)."""

    def __init__(self, message: str, where: str | None = None, field: str | None = None) -> None:
        super().__init__(message, where)
        self.field = field or where


class ConvergenceError(StateworthError):
    """A solver stopped before reaching its tolerance. Carries the solver's statistics."""

    def __init__(self, message: str, stats: dict | None = None) -> None:
        super().__init__(message)
        self.stats = stats or {}
