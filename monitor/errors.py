"""Named exceptions of elmon.

Every error a user can cause maps to one of these classes; the CLI turns each into a clear
message and a non-zero exit code (see :mod:`monitor.cli`).
"""

from __future__ import annotations


class ElmonError(Exception):
    """Base class of every error elmon raises on purpose."""


class ValidationError(ElmonError, ValueError):
    """An input value breaks a rule.

    The message names the field, the value and the rule, and where known the row, e.g.
    ``row 17: field 'price' = -3.0: price must be > 0``.
    """

    def __init__(self, message: str, *, field: str | None = None, value: object = None,
                 row: int | None = None, rule: str | None = None):
        super().__init__(message)
        self.field = field
        self.value = value
        self.row = row
        self.rule = rule


class ConfigError(ElmonError, ValueError):
    """A configuration value or command-line setting is invalid (the message names the key)."""


class StoreError(ElmonError):
    """The SQLite store cannot be opened, migrated or written."""


class SourceError(ElmonError):
    """A data source cannot be read: missing file, unreadable file, missing column."""
