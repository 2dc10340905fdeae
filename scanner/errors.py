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


class CrowdedBin(InputError):
    """More cutoffs inside one bin of the binning grid than its parts can be told apart by
    (:func:`scanner.engines.grid.inner`); ``lo``/``hi`` bound that bin."""

    def __init__(self, message: str, running: str, lo: float, hi: float):
        super().__init__(message)
        self.running, self.lo, self.hi = running, lo, hi

    def citing(self, candidates) -> "CrowdedBin":
        """This error naming the rule catalogue lines that declare cutoffs inside the bin."""
        lines: dict[str, set] = {}
        for c in candidates:
            rule = getattr(c, "rule", None)
            if rule is not None and rule.file and self.lo <= c.cutoff < self.hi:
                lines.setdefault(rule.file, set()).add(rule.line)
        if not lines:
            return self
        where = "; ".join(f"{f}:line {min(n)}" if len(n) == 1 else
                          f"{f} ({len(n):,} rules, lines {min(n)}–{max(n)})"
                          for f, n in lines.items())
        return CrowdedBin(f"{self} They are declared in {where}.", self.running, self.lo, self.hi)


class SpecError(InputError):
    """A scan spec or rule catalogue is malformed; the message names file and line."""


class ColumnNotFoundError(InputError):
    """A column named in the spec is not in the table."""

    def __init__(self, column: str, available: list[str], source: str, role: str = "column"):
        self.column = column
        self.available = list(available)
        close = difflib.get_close_matches(column, self.available, n=3, cutoff=0.5)
        hint = f" Did you mean {', '.join(repr(c) for c in close)}?" if close else ""
        more = len(self.available) - 20
        shown = ", ".join(self.available[:20]) + (f" and {more} more" if more > 0 else "")
        super().__init__(
            f"{source}: {role} '{column}' is not in the table.{hint} "
            f"Available columns: {shown}. Fix the name in the spec."
        )


def closest(word: str, choices) -> str:
    """Return a ' (did you mean 'x'?)' hint for an unknown key, or ''."""
    close = difflib.get_close_matches(word, list(choices), n=1, cutoff=0.6)
    return f" (did you mean '{close[0]}'?)" if close else ""


class OutputError(ScanError):
    """The output folder cannot be written or replaced as asked."""


def read_text(path, what: str) -> str:
    """Read a UTF-8 text file (a byte-order mark is allowed) or raise a :class:`SpecError`.

    ``what`` names the file's role for the message, e.g. "scan spec" or "rule catalogue".
    """
    from pathlib import Path
    p = Path(path)
    try:
        return p.read_text(encoding="utf-8-sig")
    except UnicodeDecodeError as exc:
        line = p.read_bytes()[:exc.start].count(b"\n") + 1
        raise SpecError(f"{p}:line {line}: the {what} is not UTF-8 text (byte {exc.start}); "
                        "save it as UTF-8.") from None
    except IsADirectoryError:
        raise SpecError(f"{p}: is a folder; give the path of the {what} file (TOML).") from None
    except OSError as exc:
        raise SpecError(f"{p}: cannot read the {what}: {exc.strerror or exc}. Check the path "
                        "and its permissions.") from None


def parse_toml(text: str, path, what: str) -> dict:
    """Parse TOML text; errors become a :class:`SpecError` naming the file and line."""
    import re
    import tomllib
    try:
        return tomllib.loads(text)
    except tomllib.TOMLDecodeError as exc:
        m = re.search(r"line (\d+)", str(exc))
        line = f"line {m.group(1)}" if m else "line ?"
        raise SpecError(f"{path}:{line}: the {what} is not valid TOML ({exc}). Check quotes, "
                        "brackets and 'key = value' on that line.") from None
    except RecursionError:
        raise SpecError(f"{path}: the {what} nests arrays or tables too deeply to read; "
                        "flatten it.") from None
