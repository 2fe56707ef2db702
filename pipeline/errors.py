"""Errors a user can act on: the CLI prints them as one line and exits non-zero, no traceback."""

from __future__ import annotations


class UserError(Exception):
    """A mistake in input, options or files; the message names the file, row or option."""

    exit_code = 2


class DatabaseBusy(UserError):
    """Another process holds the DuckDB write lock."""

    exit_code = 3


class RunFailed(Exception):
    """A run stopped part-way; nothing of it was published."""

    exit_code = 4
