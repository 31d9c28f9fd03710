"""Minimal stand-ins for the spec classes, so the oracle can be tested without the engine.

They mirror the constructor signatures and attributes of the public spec classes and nothing
more: no validation, no serialization. Tests that exercise the oracle alone use them; tests
that compare the engine with the oracle use the real ``asof_join`` classes.
"""

from __future__ import annotations

import datetime as dt
import re
from dataclasses import dataclass, field
from typing import Any

__all__ = ["Entity", "EntityRef", "EventTable", "Latest", "Trailing", "TrainingSetSpec"]

_UNITS = {"s": "seconds", "m": "minutes", "h": "hours", "d": "days"}


def _duration(value: str | dt.timedelta | None) -> dt.timedelta | None:
    """Read "90s", "15m", "36h", "7d" or a timedelta (enough for the tests)."""
    if value is None or isinstance(value, dt.timedelta):
        return value
    match = re.fullmatch(r"(\d+)([smhd])", value)
    if match is None:
        msg = f"stub durations are <n>s|m|h|d, got {value!r}"
        raise ValueError(msg)
    return dt.timedelta(**{_UNITS[match.group(2)]: int(match.group(1))})


@dataclass(frozen=True)
class Entity:
    """A kind of thing features describe, identified by key columns."""

    name: str
    keys: tuple[str, ...]

    def __init__(self, name: str, keys: list[str] | tuple[str, ...]) -> None:
        object.__setattr__(self, "name", name)
        object.__setattr__(self, "keys", tuple(keys))


@dataclass(frozen=True)
class EntityRef:
    """An entity as one table names its key columns."""

    entity: str
    columns: tuple[str, ...]


@dataclass(frozen=True)
class EventTable:
    """A table of rows stamped with a valid time."""

    name: str
    time: str
    entities: tuple[EntityRef, ...] = ()
    known_at: str | None = None
    delay: dt.timedelta = field(default=dt.timedelta(0))
    inclusive: bool = False
    null_times: str = "error"
    path: str | None = None

    def __init__(
        self,
        name: str,
        time: str,
        entities: list[Entity] | dict[str, list[str]],
        known_at: str | None = None,
        delay: str | dt.timedelta | None = None,
        inclusive: bool = False,
        null_times: str = "error",
        path: str | None = None,
    ) -> None:
        if isinstance(entities, dict):
            refs = tuple(EntityRef(n, tuple(c)) for n, c in entities.items())
        else:
            refs = tuple(EntityRef(e.name, e.keys) for e in entities)
        values = {
            "name": name,
            "time": time,
            "entities": refs,
            "known_at": known_at,
            "delay": _duration(delay) or dt.timedelta(0),
            "inclusive": inclusive,
            "null_times": null_times,
            "path": path,
        }
        for key, value in values.items():
            object.__setattr__(self, key, value)

    def columns_for(self, entity_name: str) -> tuple[str, ...] | None:
        """The key columns this table uses for an entity, or None."""
        for ref in self.entities:
            if ref.entity == entity_name:
                return ref.columns
        return None


@dataclass(frozen=True)
class Latest:
    """The newest visible row's values."""

    table: EventTable
    columns: tuple[str, ...]
    max_age: dt.timedelta | None = None
    prefix: str = ""
    name: str | None = None
    entity: Entity | None = None

    def __init__(
        self,
        table: EventTable,
        columns: list[str] | tuple[str, ...],
        *,
        max_age: str | dt.timedelta | None = None,
        prefix: str = "",
        name: str | None = None,
        entity: Entity | None = None,
    ) -> None:
        values = {
            "table": table,
            "columns": tuple(columns),
            "max_age": _duration(max_age),
            "prefix": prefix,
            "name": name,
            "entity": entity,
        }
        for key, value in values.items():
            object.__setattr__(self, key, value)

    def output_names(self) -> list[str]:
        """prefix + column, or name= when exactly one column."""
        if self.name is not None:
            return [self.name]
        return [self.prefix + c for c in self.columns]


@dataclass(frozen=True)
class Trailing:
    """An aggregate over the visible rows of a window ending at the label time."""

    table: EventTable
    column: str | None
    agg: str
    over: dt.timedelta
    entity: Entity | None = None
    name: str | None = None
    prefix: str = ""

    def __init__(
        self,
        table: EventTable,
        column: str | None,
        agg: str,
        *,
        over: str | dt.timedelta,
        entity: Entity | None = None,
        name: str | None = None,
        prefix: str = "",
    ) -> None:
        values = {
            "table": table,
            "column": column,
            "agg": agg,
            "over": _duration(over),
            "entity": entity,
            "name": name,
            "prefix": prefix,
        }
        for key, value in values.items():
            object.__setattr__(self, key, value)

    def output_names(self) -> list[str]:
        """name=, else prefix + (column or "count")."""
        if self.name is not None:
            return [self.name]
        return [self.prefix + (self.column or "count")]


@dataclass(frozen=True)
class TrainingSetSpec:
    """Labels plus features."""

    labels: EventTable
    features: tuple[Any, ...]
    timezone: str | None = None

    def __init__(
        self, labels: EventTable, features: list[Any], timezone: str | None = None
    ) -> None:
        object.__setattr__(self, "labels", labels)
        object.__setattr__(self, "features", tuple(features))
        object.__setattr__(self, "timezone", timezone)

    def tables(self) -> dict[str, EventTable]:
        """Labels and every feature table, by name."""
        found = {self.labels.name: self.labels}
        for feature in self.features:
            found.setdefault(feature.table.name, feature.table)
        return found

    def join_keys(self, feature: Any) -> tuple[tuple[str, ...], tuple[str, ...]]:
        """(label columns, table columns) the feature joins on."""
        if feature.entity is not None:
            refs = [EntityRef(feature.entity.name, feature.table.columns_for(feature.entity.name))]
        else:
            refs = list(feature.table.entities)
        label_columns: list[str] = []
        table_columns: list[str] = []
        for ref in refs:
            label_columns += self.labels.columns_for(ref.entity) or ref.columns
            table_columns += ref.columns
        return tuple(label_columns), tuple(table_columns)
