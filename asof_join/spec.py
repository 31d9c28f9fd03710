"""The declaration: entities, event tables, features, the training-set spec (pure, serializable)."""

from __future__ import annotations

import datetime as dt
import hashlib
import json
import zoneinfo
from collections.abc import Iterable, Mapping
from typing import Any, Literal

from pydantic import BaseModel, ConfigDict, Field, ValidationError, field_validator

from .durations import format_duration, parse_duration
from .errors import SpecError

NullTimes = Literal["error", "skip", "keep"]
Agg = Literal["count", "count_distinct", "sum", "mean", "min", "max", "std", "last"]
AGGREGATES: tuple[str, ...] = (
    "count",
    "count_distinct",
    "sum",
    "mean",
    "min",
    "max",
    "std",
    "last",
)
SPEC_VERSION = 1


def _format_validation_error(model: str, err: ValidationError) -> SpecError:
    """Turn pydantic's report into one SpecError listing each problem with its field."""
    problems: list[str] = []
    for item in err.errors():
        inner = (item.get("ctx") or {}).get("error")
        if isinstance(inner, SpecError):
            problems.extend(inner.problems or (str(inner),))
            continue
        where = ".".join(str(p) for p in item["loc"])
        text = str(item["msg"]).removeprefix("Value error, ")
        problems.append(f"{model}.{where}: {text}" if where else f"{model}: {text}")
    return SpecError.collected(problems)


class _Model(BaseModel):
    """Frozen, strict-keys base: a typo in a YAML key is an error, and specs hash stably."""

    model_config = ConfigDict(frozen=True, extra="forbid", arbitrary_types_allowed=False)

    def __init__(self, **data: Any) -> None:
        try:
            super().__init__(**data)
        except ValidationError as err:
            raise _format_validation_error(type(self).__name__, err) from None


def _check_name(value: str, what: str) -> str:
    if not isinstance(value, str) or not value or "\x00" in value:
        msg = f"{what} must be a non-empty string without NUL, got {value!r}"
        raise ValueError(msg)
    return value


def _check_names(values: Iterable[str], what: str) -> tuple[str, ...]:
    names = tuple(_check_name(v, what) for v in values)
    dupes = sorted({n for n in names if names.count(n) > 1})
    if dupes:
        msg = f"{what} lists {dupes} more than once; list each column once"
        raise ValueError(msg)
    return names


class Entity(_Model):
    """A kind of thing features describe (customer, plant), identified by key columns."""

    name: str
    keys: tuple[str, ...]

    def __init__(self, name: str | None = None, /, **data: Any) -> None:
        if name is not None:
            data["name"] = name
        super().__init__(**data)

    @field_validator("name")
    @classmethod
    def _name(cls, v: str) -> str:
        return _check_name(v, "entity name")

    @field_validator("keys", mode="before")
    @classmethod
    def _keys(cls, v: Any) -> tuple[str, ...]:
        if isinstance(v, str):
            v = [v]
        keys = _check_names(v, "keys")
        if not keys:
            msg = "an entity needs at least one key column, e.g. keys=['customer_id']"
            raise ValueError(msg)
        return keys


class EntityRef(_Model):
    """An entity as one table carries it: its name and this table's key columns."""

    entity: str
    columns: tuple[str, ...]
    keys: tuple[str, ...] = ()  #: the entity's own key names (default label-side columns)


def _entity_refs(value: Any) -> tuple[EntityRef, ...]:
    """Accept [Entity, ...], {Entity | name: [columns]} or already-built refs."""
    if value is None:
        return ()
    refs: list[EntityRef] = []
    if isinstance(value, Mapping):
        for ent, cols in value.items():
            columns = _check_names([cols] if isinstance(cols, str) else cols, "entity columns")
            if isinstance(ent, Entity):
                if len(columns) != len(ent.keys):
                    msg = (
                        f"entity {ent.name!r} has {len(ent.keys)} key(s) {list(ent.keys)} but "
                        f"{len(columns)} column(s) {list(columns)} were mapped; map one per key"
                    )
                    raise ValueError(msg)
                refs.append(EntityRef(entity=ent.name, columns=columns, keys=ent.keys))
            else:
                name = _check_name(ent, "entity name")
                refs.append(EntityRef(entity=name, columns=columns, keys=columns))
    else:
        if isinstance(value, (Entity, EntityRef, str)):
            value = [value]
        for item in value:
            if isinstance(item, Entity):
                refs.append(EntityRef(entity=item.name, columns=item.keys, keys=item.keys))
            elif isinstance(item, EntityRef):
                refs.append(item)
            elif isinstance(item, Mapping):
                refs.append(EntityRef(**item))
            else:
                msg = (
                    f"entities must be Entity objects or a mapping {{entity: [columns]}}, "
                    f"got {item!r}"
                )
                raise ValueError(msg)
    names = [r.entity for r in refs]
    dupes = sorted({n for n in names if names.count(n) > 1})
    if dupes:
        msg = f"entity {dupes} is listed more than once; list each entity once"
        raise ValueError(msg)
    return tuple(refs)


class EventTable(_Model):
    """A table whose rows are stamped with a valid time (and optionally a known time)."""

    name: str
    time: str
    entities: tuple[EntityRef, ...] = ()
    known_at: str | None = None
    delay: dt.timedelta = dt.timedelta(0)
    inclusive: bool = False
    null_times: NullTimes = "error"
    path: str | None = None

    def __init__(self, name: str | None = None, /, **data: Any) -> None:
        if name is not None:
            data["name"] = name
        super().__init__(**data)

    @field_validator("name")
    @classmethod
    def _name(cls, v: str) -> str:
        return _check_name(v, "table name")

    @field_validator("time", "known_at")
    @classmethod
    def _col(cls, v: str | None) -> str | None:
        return None if v is None else _check_name(v, "column name")

    @field_validator("entities", mode="before")
    @classmethod
    def _entities(cls, v: Any) -> tuple[EntityRef, ...]:
        return _entity_refs(v)

    @field_validator("delay", mode="before")
    @classmethod
    def _delay(cls, v: Any) -> dt.timedelta:
        return dt.timedelta(0) if v is None else parse_duration(v, what="delay")

    def model_post_init(self, context: Any, /) -> None:
        if self.known_at is not None and self.delay:
            msg = (
                f"table {self.name!r} declares both known_at={self.known_at!r} and "
                f"delay={format_duration(self.delay)!r}; declare one of them"
            )
            raise SpecError(msg)
        if self.known_at is not None and self.known_at == self.time:
            msg = (
                f"table {self.name!r}: known_at {self.known_at!r} is its time column; "
                "drop known_at (known time then equals valid time)"
            )
            raise SpecError(msg)

    def columns_for(self, entity: str) -> tuple[str, ...] | None:
        """This table's key columns for an entity, or None when it does not carry it."""
        for ref in self.entities:
            if ref.entity == entity:
                return ref.columns
        return None

    def key_columns(self) -> tuple[str, ...]:
        """All key columns of all entities this table carries, in declared order."""
        out: list[str] = []
        for ref in self.entities:
            out.extend(c for c in ref.columns if c not in out)
        return tuple(out)


class _Feature(_Model):
    table: EventTable
    entity: str | None = None
    name: str | None = None
    prefix: str = ""

    @field_validator("entity", mode="before")
    @classmethod
    def _entity(cls, v: Any) -> Any:
        return v.name if isinstance(v, Entity) else v

    def output_names(self) -> list[str]:  # pragma: no cover - overridden
        raise NotImplementedError


class Latest(_Feature):
    """The newest visible row's values for the label's key (Semantics 2)."""

    kind: Literal["latest"] = "latest"
    columns: tuple[str, ...]
    max_age: dt.timedelta | None = None

    def __init__(
        self, table: EventTable | None = None, columns: Any = None, /, **data: Any
    ) -> None:
        if table is not None:
            data["table"] = table
        if columns is not None:
            data["columns"] = columns
        super().__init__(**data)

    @field_validator("columns", mode="before")
    @classmethod
    def _columns(cls, v: Any) -> tuple[str, ...]:
        cols = _check_names([v] if isinstance(v, str) else v, "columns")
        if not cols:
            msg = "Latest needs at least one column, e.g. Latest(profiles, ['tier'])"
            raise ValueError(msg)
        return cols

    @field_validator("max_age", mode="before")
    @classmethod
    def _max_age(cls, v: Any) -> dt.timedelta | None:
        return None if v is None else parse_duration(v, what="max_age")

    def model_post_init(self, context: Any, /) -> None:
        if self.name is not None and len(self.columns) != 1:
            msg = (
                f"Latest({self.table.name!r}, {list(self.columns)}) sets name={self.name!r} "
                "but has several columns; use prefix= instead, or one Latest per column"
            )
            raise SpecError(msg)

    def output_names(self) -> list[str]:
        """Output column names, in order."""
        if self.name is not None:
            return [self.name]
        return [self.prefix + c for c in self.columns]


class Trailing(_Feature):
    """An aggregate over the visible rows whose valid time lies in (t - over, t] (Semantics 3)."""

    kind: Literal["trailing"] = "trailing"
    column: str | None = None
    agg: Agg
    over: dt.timedelta

    def __init__(
        self,
        table: EventTable | None = None,
        column: str | None = None,
        agg: str | None = None,
        /,
        **data: Any,
    ) -> None:
        if table is not None:
            data["table"] = table
        if column is not None:
            data["column"] = column
        if agg is not None:
            data["agg"] = agg
        super().__init__(**data)

    @field_validator("over", mode="before")
    @classmethod
    def _over(cls, v: Any) -> dt.timedelta:
        d = parse_duration(v, what="over")
        if not d:
            msg = "over must be a positive duration such as '7d'"
            raise ValueError(msg)
        return d

    def model_post_init(self, context: Any, /) -> None:
        if self.column is None and self.agg != "count":
            msg = (
                f"Trailing({self.table.name!r}, None, {self.agg!r}) needs a column: only "
                "'count' can count rows without one"
            )
            raise SpecError(msg)

    def output_names(self) -> list[str]:
        """Output column name: name=, else prefix + column (or 'count' when counting rows)."""
        if self.name is not None:
            return [self.name]
        return [self.prefix + (self.column or "count")]


Feature = Latest | Trailing


class TrainingSetSpec(_Model):
    """Labels plus features: everything build() needs except the data."""

    labels: EventTable
    features: tuple[Feature, ...] = Field(default=())
    timezone: str | None = None

    @field_validator("timezone")
    @classmethod
    def _tz(cls, v: str | None) -> str | None:
        if v is None:
            return v
        try:
            zoneinfo.ZoneInfo(v)
        except (zoneinfo.ZoneInfoNotFoundError, ValueError):
            msg = f"timezone {v!r} is not an IANA time zone name (e.g. 'Europe/Paris', 'UTC')"
            raise ValueError(msg) from None
        return v

    def model_post_init(self, context: Any, /) -> None:
        problems: list[str] = []
        if self.labels.null_times == "skip":
            problems.append(
                f"label table {self.labels.name!r} sets null_times='skip', but label rows are "
                "never dropped; use null_times='keep' (null features) or filter the labels"
            )
        tables: dict[str, EventTable] = {self.labels.name: self.labels}
        for feat in self.features:
            seen = tables.get(feat.table.name)
            if seen is not None and seen != feat.table:
                problems.append(
                    f"two different tables are named {feat.table.name!r}; give each its own name"
                )
            tables.setdefault(feat.table.name, feat.table)
        owner: dict[str, str] = {}
        for i, feat in enumerate(self.features):
            label = _describe(i, feat)
            for out in feat.output_names():
                if out in owner:
                    problems.append(
                        f"{label} and {owner[out]} both output {out!r}; set name= or prefix= "
                        "on one of them"
                    )
                else:
                    owner[out] = label
                if out.endswith(("__time", "__known_at")):
                    problems.append(
                        f"{label} outputs {out!r}, a name reserved for provenance columns"
                    )
            if feat.entity is not None and feat.table.columns_for(feat.entity) is None:
                problems.append(
                    f"{label} sets entity={feat.entity!r} but table {feat.table.name!r} carries "
                    f"{[r.entity for r in feat.table.entities]}; pick one of those"
                )
                continue
            if not feat.table.entities:
                problems.append(
                    f"{label}: table {feat.table.name!r} declares no entities, so it cannot be "
                    "joined; add entities=[...] to it"
                )
                continue
            try:
                self.join_keys(feat)
            except SpecError as err:
                problems.append(str(err))
            if feat.table.name == self.labels.name and self.labels.inclusive:
                problems.append(
                    f"{label} reads the label table {self.labels.name!r}, which is declared "
                    "inclusive=True, so it would see the labelled row itself; drop inclusive"
                )
        label_cols = {self.labels.time, *self.labels.key_columns()}
        for out, who in owner.items():
            if out in label_cols:
                problems.append(
                    f"{who} outputs {out!r}, which is also a column of the label table "
                    f"{self.labels.name!r}; set name= or prefix="
                )
        if problems:
            raise SpecError.collected(problems)

    # -- helpers used by planners and tests -------------------------------------------------

    def tables(self) -> dict[str, EventTable]:
        """Every table the spec uses (labels first), by name."""
        out = {self.labels.name: self.labels}
        for feat in self.features:
            out.setdefault(feat.table.name, feat.table)
        return out

    def join_keys(self, feature: Feature) -> tuple[tuple[str, ...], tuple[str, ...]]:
        """(label columns, table columns) a feature joins on."""
        refs = feature.table.entities
        if feature.entity is not None:
            refs = tuple(r for r in refs if r.entity == feature.entity)
        label_cols: list[str] = []
        table_cols: list[str] = []
        for ref in refs:
            mine = self.labels.columns_for(ref.entity)
            if mine is None:
                mine = ref.keys or ref.columns
            if len(mine) != len(ref.columns):
                msg = (
                    f"entity {ref.entity!r} has {len(mine)} key column(s) {list(mine)} in label "
                    f"table {self.labels.name!r} but {len(ref.columns)} {list(ref.columns)} in "
                    f"table {feature.table.name!r}; map the same number of columns"
                )
                raise SpecError(msg)
            label_cols.extend(mine)
            table_cols.extend(ref.columns)
        return tuple(label_cols), tuple(table_cols)

    def output_columns(self) -> list[str]:
        """Feature output names in declared order (label columns come first in the output)."""
        return [name for feat in self.features for name in feat.output_names()]

    # -- serialization ----------------------------------------------------------------------

    def to_document(self, *, with_paths: bool = True) -> dict[str, Any]:
        """The spec as a plain dict in the file format (tables and entities by name)."""
        from .spec_file import spec_to_document

        return spec_to_document(self, with_paths=with_paths)

    def to_yaml(self) -> str:
        """YAML text that load_spec reads back to an equal spec."""
        import yaml

        return yaml.safe_dump(self.to_document(), sort_keys=False, allow_unicode=True)

    def to_json(self) -> str:
        """JSON text that load_spec reads back to an equal spec."""
        return json.dumps(self.to_document(), indent=2, ensure_ascii=False)

    def fingerprint(self) -> str:
        """A stable hash of the canonical spec (paths excluded: they say where, not what)."""
        doc = self.to_document(with_paths=False)
        text = json.dumps(doc, sort_keys=True, separators=(",", ":"), ensure_ascii=True)
        return hashlib.sha256(text.encode("utf-8")).hexdigest()[:16]


def _describe(index: int, feat: Feature) -> str:
    if isinstance(feat, Latest):
        return f"feature #{index} Latest({feat.table.name!r}, {list(feat.columns)})"
    return f"feature #{index} Trailing({feat.table.name!r}, {feat.column!r}, {feat.agg!r})"


__all__ = [
    "AGGREGATES",
    "SPEC_VERSION",
    "Entity",
    "EntityRef",
    "EventTable",
    "Feature",
    "Latest",
    "Trailing",
    "TrainingSetSpec",
    "format_duration",
]
