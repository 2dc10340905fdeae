"""User-facing errors.

Every exception a user can cause derives from :class:`ScanError`; the CLI catches it once,
prints the message and exits with code 2.  Internal failures are anything else (exit 1).
"""
from __future__ import annotations

import difflib


class ScanError(Exception):
    """Base class for mistakes in the user's input (exit code 2)."""


class InputError(ScanError, ValueError):
    """A file, column or value cannot be used as given."""


class SpecError(InputError):
    """A scan spec or rule catalogue is malformed; the message names file and line."""


class ColumnNotFoundError(InputError):
    """A column named in the spec is not in the table."""

    def __init__(self, column: str, available: list[str], source: str, role: str = "column"):
        self.column = column
        self.available = list(available)
        close = difflib.get_close_matches(column, self.available, n=3, cutoff=0.5)
        hint = f" Did you mean {', '.join(repr(c) for c in close)}?" if close else ""
        shown = ", ".join(self.available[:20]) + (" ..." if len(self.available) > 20 else "")
        super().__init__(
            f"{source}: {role} '{column}' is not in the table.{hint} "
            f"Available columns: {shown}. Fix the name in the spec."
        )


def closest(word: str, choices) -> str:
    """Return a ' (did you mean 'x'?)' hint for an unknown key, or ''."""
    close = difflib.get_close_matches(word, list(choices), n=1, cutoff=0.5)
    return f" (did you mean '{close[0]}'?)" if close else ""
