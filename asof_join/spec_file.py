"""The spec file format (YAML or JSON): tables and entities by name; load, dump, JSON Schema."""

from __future__ import annotations

import json
from pathlib import Path
from typing import Any, Literal

from pydantic import BaseModel, ConfigDict, Field, ValidationError

from .durations import format_duration
from .errors import SpecError
from .spec import (
    SPEC_VERSION,
    Agg,
    Entity,
    EventTable,
    Feature,
    Latest,
    NullTimes,
    Trailing,
    TrainingSetSpec,
)

Duration = str | float | int


class _Doc(BaseModel):
    model_config = ConfigDict(extra="forbid")


class TableDoc(_Doc):
    """One event table in a spec file."""

    time: str = Field(description="valid-time column")
    entities: list[str] | dict[str, list[str]] = Field(
        default_factory=list,
        description="entity names (their key names are the columns) or {entity: [columns]}",
    )
    known_at: str | None = Field(default=None, description="known-time column")
    delay: Duration | None = Field(default=None, description="fixed known-time delay, e.g. 1h")
    inclusive: bool = Field(default=False, description="visible when known time <= label time")
    null_times: NullTimes = "error"
    path: str | None = Field(default=None, description="Parquet/CSV path or glob")


class LatestDoc(_Doc):
    """A latest feature: `latest: <table>`."""

    latest: str = Field(description="table name")
    columns: list[str]
    max_age: Duration | None = None
    prefix: str = ""
    name: str | None = None
    entity: str | None = None


class TrailingDoc(_Doc):
    """A trailing-window feature: `trailing: <table>`."""

    trailing: str = Field(description="table name")
    column: str | None = None
    agg: Agg
    over: Duration
    prefix: str = ""
    name: str | None = None
    entity: str | None = None


class SpecDocument(_Doc):
    """A whole spec file."""

    version: Literal[1] = SPEC_VERSION
    timezone: str | None = None
    entities: dict[str, list[str]] = Field(default_factory=dict)
    tables: dict[str, TableDoc]
    labels: str
    features: list[LatestDoc | TrailingDoc] = Field(default_factory=list)


def spec_json_schema() -> dict[str, Any]:
    """JSON Schema of the spec file format, for editors and validators."""
    schema = SpecDocument.model_json_schema()
    schema["title"] = "asof_join training-set spec"
    return schema


def _duration_text(value: Any) -> Any:
    if isinstance(value, (int, float)) and not isinstance(value, bool):
        return f"{value}s"
    return value


def document_to_spec(doc: dict[str, Any], *, base_dir: Path | None = None) -> TrainingSetSpec:
    """Build a TrainingSetSpec from a parsed spec file (names resolved, paths made absolute)."""
    try:
        parsed = SpecDocument.model_validate(doc)
    except ValidationError as err:
        problems = []
        for item in err.errors():
            where = ".".join(str(p) for p in item["loc"])
            problems.append(f"{where}: {item['msg']}")
        raise SpecError.collected(problems) from None
    problems: list[str] = []
    entities = {name: Entity(name, keys=keys) for name, keys in parsed.entities.items()}
    tables: dict[str, EventTable] = {}
    for name, t in parsed.tables.items():
        if isinstance(t.entities, dict):
            ent_arg: Any = {}
            for ent_name, cols in t.entities.items():
                ent_arg[entities.get(ent_name, ent_name)] = cols
        else:
            missing = [e for e in t.entities if e not in entities]
            if missing:
                problems.append(
                    f"table {name!r} lists entities {missing} that the file's 'entities:' "
                    f"section does not declare (declared: {sorted(entities)}); declare them"
                )
                continue
            ent_arg = [entities[e] for e in t.entities]
        path = t.path
        if path is not None and base_dir is not None and not _is_absolute(path):
            path = str(base_dir / path)
        tables[name] = EventTable(
            name,
            time=t.time,
            entities=ent_arg,
            known_at=t.known_at,
            delay=_duration_text(t.delay),
            inclusive=t.inclusive,
            null_times=t.null_times,
            path=path,
        )
    if parsed.labels not in tables:
        problems.append(
            f"labels: {parsed.labels!r} is not a table of this file; tables: {sorted(tables)}"
        )
    features: list[Feature] = []
    for i, f in enumerate(parsed.features):
        table_name = f.latest if isinstance(f, LatestDoc) else f.trailing
        if table_name not in tables:
            problems.append(
                f"features[{i}] names table {table_name!r}, which is not declared; "
                f"tables: {sorted(tables)}"
            )
            continue
        table = tables[table_name]
        if isinstance(f, LatestDoc):
            features.append(
                Latest(
                    table,
                    f.columns,
                    max_age=_duration_text(f.max_age),
                    prefix=f.prefix,
                    name=f.name,
                    entity=f.entity,
                )
            )
        else:
            features.append(
                Trailing(
                    table,
                    f.column,
                    f.agg,
                    over=_duration_text(f.over),
                    prefix=f.prefix,
                    name=f.name,
                    entity=f.entity,
                )
            )
    if problems:
        raise SpecError.collected(problems)
    return TrainingSetSpec(
        labels=tables[parsed.labels], features=features, timezone=parsed.timezone
    )


def _is_absolute(path: str) -> bool:
    return Path(path).is_absolute() or "://" in path


def spec_to_document(spec: TrainingSetSpec, *, with_paths: bool = True) -> dict[str, Any]:
    """The file form of a spec: a plain, JSON-safe dict."""
    entities: dict[str, list[str]] = {}
    tables: dict[str, Any] = {}
    for name, table in spec.tables().items():
        for ref in table.entities:
            entities.setdefault(ref.entity, list(ref.keys or ref.columns))
        simple = all(tuple(entities[r.entity]) == r.columns for r in table.entities)
        t: dict[str, Any] = {"time": table.time}
        t["entities"] = (
            [r.entity for r in table.entities]
            if simple
            else {r.entity: list(r.columns) for r in table.entities}
        )
        if table.known_at is not None:
            t["known_at"] = table.known_at
        if table.delay:
            t["delay"] = format_duration(table.delay)
        if table.inclusive:
            t["inclusive"] = True
        if table.null_times != "error":
            t["null_times"] = table.null_times
        if with_paths and table.path is not None:
            t["path"] = table.path
        tables[name] = t
    features: list[dict[str, Any]] = []
    for feat in spec.features:
        if isinstance(feat, Latest):
            f: dict[str, Any] = {"latest": feat.table.name, "columns": list(feat.columns)}
            if feat.max_age is not None:
                f["max_age"] = format_duration(feat.max_age)
        else:
            assert isinstance(feat, Trailing)
            f = {"trailing": feat.table.name}
            if feat.column is not None:
                f["column"] = feat.column
            f["agg"] = feat.agg
            f["over"] = format_duration(feat.over)
        if feat.prefix:
            f["prefix"] = feat.prefix
        if feat.name is not None:
            f["name"] = feat.name
        if feat.entity is not None:
            f["entity"] = feat.entity
        features.append(f)
    doc: dict[str, Any] = {"version": SPEC_VERSION}
    if spec.timezone is not None:
        doc["timezone"] = spec.timezone
    doc["entities"] = entities
    doc["tables"] = tables
    doc["labels"] = spec.labels.name
    doc["features"] = features
    return doc


def load_spec(path: str | Path) -> TrainingSetSpec:
    """Read a YAML or JSON spec file; relative table paths resolve against the file's folder."""
    import yaml

    p = Path(path)
    try:
        text = p.read_text(encoding="utf-8")
    except OSError as err:
        msg = f"cannot read spec file {str(p)!r}: {err.strerror}; check the path"
        raise SpecError(msg) from None
    try:
        doc = json.loads(text) if p.suffix.lower() == ".json" else yaml.safe_load(text)
    except (json.JSONDecodeError, yaml.YAMLError) as err:
        first = str(err).splitlines()[0] if str(err) else type(err).__name__
        msg = f"spec file {str(p)!r} is not valid {p.suffix.lstrip('.') or 'YAML'}: {first}"
        raise SpecError(msg) from None
    if not isinstance(doc, dict):
        msg = f"spec file {str(p)!r} must hold a mapping with tables:, labels: and features:"
        raise SpecError(msg)
    return document_to_spec(doc, base_dir=p.resolve().parent)
