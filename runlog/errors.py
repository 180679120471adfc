"""The one exception tree of runlog.

Every error runlog raises on purpose derives from :class:`RunlogError` and also from
the built-in type a caller would naturally catch::

    RunlogError(Exception)
     ├── ContractError(RunlogError, ValueError)   a shot table breaks the contract
     ├── ConfigError(RunlogError, ValueError)     a runlog.toml that cannot be used
     ├── FitError(RunlogError, ValueError)        a fit failed or is degenerate
     ├── FilterError(RunlogError, ValueError)     a filter expression that cannot be used
     ├── NotFoundError(RunlogError, LookupError)  an unknown run, apparatus or figure
     ├── ExportError(RunlogError, FileExistsError) an export that would overwrite files
     └── StoreError(RunlogError, RuntimeError)    the database cannot be used as asked
          └── SchemaVersionError                  the database schema is not at our head

Errors keep their context as fields and build their message in ``message()``; ``__str__``
passes it through :func:`one_line`, so every refusal is one line whatever a file's column
names or values hold, the CLI can print ``str(error)`` and the tests can assert it exactly.
"""

from __future__ import annotations

import re

__all__ = [
    "RunlogError",
    "ContractError",
    "ConfigError",
    "FitError",
    "FilterError",
    "NotFoundError",
    "ExportError",
    "StoreError",
    "SchemaVersionError",
]  # the error classes; one_line and CONTROL_CHARACTERS are runlog's own helpers

# C0 and C1 control characters and the Unicode line and paragraph separators: anything a
# terminal or a log reader may take as the end of a line or as a command.
CONTROL_CHARACTERS = re.compile("[\x00-\x1f\x7f-\x9f\u2028\u2029]")


def one_line(text: object) -> str:
    """``text`` as one printable line: control characters written as escapes (``\\n``,
    ``\\x1b``, ``\\u2028``), everything else unchanged."""
    return CONTROL_CHARACTERS.sub(lambda found: found.group().encode("unicode_escape").decode("ascii"), str(text))


class RunlogError(Exception):
    """Base of every error runlog raises on purpose."""

    def message(self) -> str:
        """The message from the error's fields (subclasses); may hold raw input text."""
        return super().__str__()

    def __str__(self) -> str:
        return one_line(self.message())


class ContractError(RunlogError, ValueError):
    """A shot-table file breaks the shot-table contract.

    ``row`` is the 0-based row number in the file (``None`` when the problem is not
    tied to a row, e.g. a missing column); ``column`` is ``None`` for whole-file
    problems such as an unreadable file.
    """

    def __init__(self, file: str, reason: str, column: str | None = None, row: int | None = None):
        super().__init__(file, reason, column, row)
        self.file = str(file)
        self.reason = reason
        self.column = column
        self.row = row

    def message(self) -> str:
        where = []
        if self.column is not None:
            where.append(f"column '{self.column}'")
        if self.row is not None:
            where.append(f"row {self.row}")
        place = f" ({', '.join(where)})" if where else ""
        return f"{self.file}{place}: {self.reason}"


class ConfigError(RunlogError, ValueError):
    """A configuration file (runlog.toml) that cannot be used."""

    def __init__(self, file: str, reason: str):
        super().__init__(file, reason)
        self.file = str(file)
        self.reason = reason

    def message(self) -> str:
        return f"{self.file}: {self.reason}"


class FitError(RunlogError, ValueError):
    """A fit that failed, did not converge, or is degenerate; never stored as a value."""

    def __init__(self, kind: str, reason: str, run: str | None = None):
        super().__init__(kind, reason, run)
        self.kind = kind
        self.reason = reason
        self.run = run

    def message(self) -> str:
        where = f"run '{self.run}': " if self.run else ""
        return f"{where}{self.kind} fit failed: {self.reason}"


class FilterError(RunlogError, ValueError):
    """A filter expression that cannot be parsed or refers to unknown names."""

    def __init__(self, text: str, reason: str, position: int | None = None):
        super().__init__(text, reason, position)
        self.text = text
        self.reason = reason
        self.position = position

    def message(self) -> str:
        if self.position is None:
            return f"filter: {self.reason}"
        return f"filter, at position {self.position}: {self.reason}"


class NotFoundError(RunlogError, LookupError):
    """An unknown run, apparatus, figure or other named thing."""

    def __init__(self, what: str, name: str, hint: str = ""):
        super().__init__(what, name, hint)
        self.what = what
        self.name = name
        self.hint = hint

    def message(self) -> str:
        tail = f" ({self.hint})" if self.hint else ""
        return f"no {self.what} '{self.name}'{tail}"


class ExportError(RunlogError, FileExistsError):
    """An export that would overwrite or mix with files already in its folder."""

    def __init__(self, folder: str, reason: str):
        super().__init__(folder, reason)
        self.folder = str(folder)
        self.reason = reason

    def message(self) -> str:
        return f"{self.folder}: {self.reason}"


class StoreError(RunlogError, RuntimeError):
    """The catalogue database cannot be used as asked."""


class SchemaVersionError(StoreError):
    """The database schema is not at the revision this runlog expects."""

    def __init__(self, url: str, found: str | None, expected: str, reason: str | None = None):
        super().__init__(url, found, expected, reason)
        self.url = url
        self.found = found
        self.expected = expected
        self.reason = reason  # set when the catalogue cannot be upgraded at all

    def message(self) -> str:
        if self.reason:
            return f"catalogue {self.url} is at schema revision {self.found or 'none'}, {self.reason}; it was not upgraded"
        return (
            f"catalogue {self.url} is at schema revision {self.found or 'none'}, "
            f"this runlog needs {self.expected}: run 'runlog init' to upgrade"
        )
