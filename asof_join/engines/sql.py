"""The only place names and values become SQL text: quote_ident, literal, bound parameters."""

from __future__ import annotations

from collections.abc import Callable
from dataclasses import dataclass, field


def _check_ident(name: str) -> None:
    if not isinstance(name, str) or not name:
        msg = f"an SQL identifier must be a non-empty string, got {name!r}"
        raise ValueError(msg)
    if "\x00" in name:
        msg = f"an SQL identifier cannot contain NUL: {name!r}"
        raise ValueError(msg)


def quote_ident(name: str) -> str:
    """Always quote an identifier, doubling any quote inside; refuse empty names and NUL."""
    _check_ident(name)
    return '"' + name.replace('"', '""') + '"'


def quote_ident_backtick(name: str) -> str:
    """Spark SQL spelling: backticks, doubling any backtick inside; refuse empty names and NUL."""
    _check_ident(name)
    return "`" + name.replace("`", "``") + "`"


def literal(value: str) -> str:
    """A string literal for the few places SQL takes no parameter (COPY targets, options)."""
    if "\x00" in value:
        msg = f"an SQL string cannot contain NUL: {value!r}"
        raise ValueError(msg)
    return "'" + value.replace("'", "''") + "'"


def literal_backslash(value: str) -> str:
    """Spark SQL spelling of a string literal: backslash escapes for backslash and quote.

    Spark reads ``\\`` as an escape inside string literals (unless
    ``spark.sql.parser.escapedStringLiterals`` is set) and joins adjacent literals, so doubling
    the quote is not enough there.
    """
    if "\x00" in value:
        msg = f"an SQL string cannot contain NUL: {value!r}"
        raise ValueError(msg)
    return "'" + value.replace("\\", "\\\\").replace("'", "\\'") + "'"


@dataclass
class Params:
    """Collects bound parameters and hands out their placeholders ($p0, $p1, ...)."""

    values: dict[str, object] = field(default_factory=dict)
    #: placeholder prefix: "$" for DuckDB, ":" for Spark's named parameter markers
    marker: str = "$"
    #: how a string value is written inline (for reading and printing)
    quote: Callable[[str], str] = field(default_factory=lambda: literal)

    def add(self, value: object) -> str:
        """Bind a value; reuse the placeholder when the same value is bound twice."""
        for key, existing in self.values.items():
            if type(existing) is type(value) and existing == value:
                return self.marker + key
        key = f"p{len(self.values)}"
        self.values[key] = value
        return self.marker + key

    def inline(self, sql: str) -> str:
        """The SQL with each placeholder replaced by its value, for reading and printing only."""
        for key in sorted(self.values, key=len, reverse=True):
            value = self.values[key]
            text = self.quote(value) if isinstance(value, str) else repr(value)
            sql = sql.replace(self.marker + key, text)
        return sql
