"""The only place names and values become SQL text: quote_ident, literal, bound parameters."""

from __future__ import annotations

from dataclasses import dataclass, field


def quote_ident(name: str) -> str:
    """Always quote an identifier, doubling any quote inside; refuse empty names and NUL."""
    if not isinstance(name, str) or not name:
        msg = f"an SQL identifier must be a non-empty string, got {name!r}"
        raise ValueError(msg)
    if "\x00" in name:
        msg = f"an SQL identifier cannot contain NUL: {name!r}"
        raise ValueError(msg)
    return '"' + name.replace('"', '""') + '"'


def literal(value: str) -> str:
    """A string literal for the few places SQL takes no parameter (COPY targets, options)."""
    if "\x00" in value:
        msg = f"an SQL string cannot contain NUL: {value!r}"
        raise ValueError(msg)
    return "'" + value.replace("'", "''") + "'"


@dataclass
class Params:
    """Collects bound parameters and hands out their placeholders ($p0, $p1, ...)."""

    values: dict[str, object] = field(default_factory=dict)

    def add(self, value: object) -> str:
        """Bind a value; reuse the placeholder when the same value is bound twice."""
        for key, existing in self.values.items():
            if type(existing) is type(value) and existing == value:
                return "$" + key
        key = f"p{len(self.values)}"
        self.values[key] = value
        return "$" + key

    def inline(self, sql: str) -> str:
        """The SQL with each placeholder replaced by its value, for reading and printing only."""
        for key in sorted(self.values, key=len, reverse=True):
            value = self.values[key]
            text = literal(value) if isinstance(value, str) else repr(value)
            sql = sql.replace("$" + key, text)
        return sql
