"""The error classes: one base (a ValueError), SpecError for declarations, InputError for data."""

from __future__ import annotations

import difflib
from collections.abc import Iterable, Sequence


class AsofJoinError(ValueError):
    """Base class for every error asof_join raises on bad specs or data.

    ``table``, ``column`` and ``value`` name what was wrong, for code that handles the error
    (the message names them for people).
    """

    def __init__(
        self,
        message: str,
        *,
        table: str | None = None,
        column: str | None = None,
        value: object = None,
    ) -> None:
        super().__init__(message)
        self.table = table
        self.column = column
        self.value = value


class SpecError(AsofJoinError):
    """The declaration is wrong (names, durations, collisions, unknown tables)."""

    problems: tuple[str, ...] = ()

    @classmethod
    def collected(cls, problems: Sequence[str], *, limit: int = 5) -> SpecError:
        """One error listing the first few problems, then '... and N more'."""
        shown = list(problems[:limit])
        more = len(problems) - len(shown)
        lines = shown + ([f"... and {more} more"] if more > 0 else [])
        msg = "invalid spec:\n  - " + "\n  - ".join(lines)
        err = cls(msg)
        err.problems = tuple(problems)
        return err


class UnsupportedByEngineError(SpecError):
    """The chosen engine cannot run a step of the plan."""


class InputError(AsofJoinError):
    """The data does not fit the declaration."""


class ColumnNotFoundError(InputError):
    """A declared column is missing from a bound table."""

    @classmethod
    def missing(
        cls, table: str, column: str, role: str, available: Iterable[str], fix: str
    ) -> ColumnNotFoundError:
        cols = list(available)
        hint = did_you_mean(column, cols)
        msg = f"table {table!r} has no column {column!r} (its {role}). Columns: {cols}.{hint} {fix}"
        return cls(msg, table=table, column=column)


class KeyTypeMismatchError(InputError):
    """Join key columns of two tables have incompatible types."""


class TimeTypeError(InputError):
    """A time column is not a timestamp or date, or naive and aware times are mixed."""


class NullTimeError(InputError):
    """A time column holds nulls that the declaration does not allow."""


class UnknownTableError(InputError):
    """data= binds a name the spec does not declare, or a declared table has no data."""


class UnreadableInputError(InputError):
    """A path or glob in data= cannot be read."""


def did_you_mean(name: str, candidates: Iterable[str]) -> str:
    """' Did you mean 'x'?' when a close match exists, else ''."""
    close = difflib.get_close_matches(name, list(candidates), n=1, cutoff=0.6)
    return f" Did you mean {close[0]!r}?" if close else ""
