"""What a failed database statement means, in one line a person can act on.

Driver errors carry the SQL and its parameters in their text, differ per backend and
say nothing of the cause in the lab's words. :func:`describe` turns one into a
:class:`Failure`: a one-line message (no SQL, no parameters, no credentials) and a kind:

* ``"permission"`` — the catalogue cannot be written as this user: a read-only SQLite file
  or folder, a role without the privilege;
* ``"busy"`` — another session held a lock longer than runlog waits, or a statement ran
  out of time: the same work may succeed later;
* ``"unavailable"`` — the server cannot be reached, the disk is full: nothing to do with
  the file being ingested;
* ``"data"`` — anything else, taken to be caused by what was being written.

Only ``"data"`` failures are a file's own fault; ``runlog watch`` quarantines those and
leaves the others in place to try again.
"""

from __future__ import annotations

from dataclasses import dataclass

from runlog.errors import StoreError
from runlog.redaction import scrub

__all__ = ["Failure", "BusyError", "describe", "first_line"]

# PostgreSQL SQLSTATE codes (https://www.postgresql.org/docs/current/errcodes-appendix.html).
_PERMISSION_STATES = {"42501", "25006"}  # insufficient_privilege, read_only_sql_transaction
_BUSY_STATES = {"55P03", "57014", "40001", "40P01"}  # lock_not_available, query_canceled, serialization, deadlock
_UNAVAILABLE_CLASSES = ("08", "53", "57P", "58")  # connection, resources (disk full), shutdown, system

# SQLite has no codes in its Python errors that we can rely on across versions; these
# texts are SQLite's own messages (sqlite3.c, sqlite3ErrStr).
_SQLITE_PERMISSION = ("attempt to write a readonly database", "readonly database", "unable to open database file")
_SQLITE_BUSY = ("database is locked", "database table is locked")
_SQLITE_UNAVAILABLE = ("disk i/o error", "database or disk is full", "disk is full")


@dataclass(frozen=True)
class Failure:
    """A store failure in one line, and what kind it is (see the module docstring)."""

    kind: str
    message: str

    @property
    def files_fault(self) -> bool:
        return self.kind == "data"


class BusyError(StoreError):
    """A lock or statement waited as long as runlog lets it; the same work may succeed later."""

    kind = "busy"


def first_line(error: BaseException) -> str:
    """The first line of an error's text (its type name when it has none), scrubbed of
    credentials and cut to 300 characters."""
    text = str(error).strip()
    line = text.splitlines()[0] if text else type(error).__name__
    return scrub(line)[:300]


def _driver_error(error: BaseException) -> BaseException:
    # SQLAlchemy wraps the driver's error; its own text appends the SQL and parameters.
    return getattr(error, "orig", None) or error


def _sqlstate(error: BaseException) -> str | None:
    return getattr(error, "sqlstate", None) or getattr(getattr(error, "diag", None), "sqlstate", None)


def describe(error: BaseException, *, doing: str = "writing to the catalogue") -> Failure:
    """The kind and one-line message of ``error``, raised while ``doing``."""
    if isinstance(error, BusyError):
        return Failure("busy", f"the catalogue stayed busy {doing}: {first_line(error)}")
    driver = _driver_error(error)
    line = first_line(driver)
    state = _sqlstate(driver)
    lowered = line.lower()
    if state in _PERMISSION_STATES or any(text in lowered for text in _SQLITE_PERMISSION) or isinstance(driver, PermissionError):
        return Failure("permission", f"permission denied {doing}: the catalogue is read-only for this user ({line}); use a role or a file that may write")
    if state in _BUSY_STATES or any(text in lowered for text in _SQLITE_BUSY):
        return Failure("busy", f"the catalogue stayed busy {doing}: {line}")
    if (state and state.startswith(_UNAVAILABLE_CLASSES)) or any(text in lowered for text in _SQLITE_UNAVAILABLE):
        return Failure("unavailable", f"the catalogue could not be used {doing}: {line}")
    return Failure("data", f"could not be stored ({type(driver).__name__}: {line})")
