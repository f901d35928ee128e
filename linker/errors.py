"""Errors linker reports to its user.

Each error names its subject (file, sheet, row, column, config key) so the
CLI can print one clear line and exit non-zero, never a traceback.
"""

from __future__ import annotations


class LinkerError(Exception):
    """Base of every error meant for the user; the CLI prints ``str(err)``."""

    exit_code = 2


class ConfigError(LinkerError):
    """A config file is unreadable, malformed, or names an unknown key or value."""

    def __init__(self, file, key: str, problem: str):
        self.file = str(file)
        self.key = key
        self.problem = problem
        where = f"{self.file}: {key}: " if key else f"{self.file}: "
        super().__init__(where + problem)


class InputError(LinkerError):
    """A delivery file cannot be read.  Names the file and, where known, sheet/row/column."""

    exit_code = 3

    def __init__(self, file, problem: str, sheet: str | None = None, row: int | None = None,
                 column: str | None = None):
        self.file = str(file)
        self.sheet = sheet
        self.row = row
        self.column = column
        self.problem = problem
        parts = [self.file]
        if sheet is not None:
            parts.append(f"sheet {sheet!r}")
        if row is not None:
            parts.append(f"row {row}")
        if column is not None:
            parts.append(f"column {column!r}")
        super().__init__(", ".join(parts) + ": " + problem)
