"""Checks bound data against the spec using Arrow schemas only: columns, key types, time types."""

from __future__ import annotations

from collections.abc import Mapping
from dataclasses import dataclass

import pyarrow as pa

from .errors import (
    ColumnNotFoundError,
    InputError,
    KeyTypeMismatchError,
    SpecError,
    TimeTypeError,
    UnknownTableError,
)
from .plan import TableTimes, TimeKind, TimeRef
from .spec import Latest, Trailing, TrainingSetSpec


@dataclass(frozen=True)
class CheckedInputs:
    """What the planner needs to know about the data."""

    times: dict[str, TableTimes]
    label_columns: tuple[str, ...]
    aware: bool
    integer_columns: frozenset[tuple[str, str]] = frozenset()


def check_known_tables(spec: TrainingSetSpec, data: Mapping[str, object]) -> None:
    """data= names only tables the spec declares (UnknownTableError naming the first)."""
    tables = spec.tables()
    unknown = [k for k in data if k not in tables]
    if unknown:
        msg = (
            f"data= binds {unknown}, which the spec does not declare; declared tables: "
            f"{list(tables)}. Fix the name in data= or add the table to the spec"
        )
        raise UnknownTableError(msg, table=unknown[0])


def check_bindings(spec: TrainingSetSpec, data: Mapping[str, object] | None) -> None:
    """Every declared table has data (or a path); data= names nothing undeclared."""
    tables = spec.tables()
    data = data or {}
    check_known_tables(spec, data)
    missing = [n for n, t in tables.items() if n not in data and t.path is None]
    if missing:
        msg = (
            f"no data for table(s) {missing}: pass data={{{missing[0]!r}: frame_or_path}} to "
            "build(), or set path: on the table in the spec"
        )
        raise UnknownTableError(msg, table=missing[0])


def _time_kind(typ: pa.DataType) -> TimeKind | None:
    if pa.types.is_timestamp(typ):
        return TimeKind.AWARE if typ.tz is not None else TimeKind.NAIVE
    if pa.types.is_date(typ):
        return TimeKind.DATE
    return None


def key_family(typ: pa.DataType) -> str:
    """The family keys compare in: numbers (any width), strings, or the type itself."""
    if pa.types.is_dictionary(typ):
        typ = typ.value_type
    if pa.types.is_integer(typ) or pa.types.is_floating(typ) or pa.types.is_decimal(typ):
        return "number"  # widths may differ; pandas turns nullable integers into floats
    if pa.types.is_string(typ) or pa.types.is_large_string(typ) or pa.types.is_string_view(typ):
        return "string"
    return str(typ)


def _time_column(schema: pa.Schema, table: str, column: str, role: str) -> TimeKind:
    """The kind of a declared time column; a clear error when missing or not a time."""
    typ = _require(schema, table, column, role, f"Fix {role}= or the data.")
    kind = _time_kind(typ)
    if kind is None:
        msg = (
            f"table {table!r} column {column!r} (its {role}) has type {typ}, not a timestamp "
            f"or date; convert it (e.g. pandas.to_datetime) or point {role}= at a timestamp"
        )
        raise TimeTypeError(msg, table=table, column=column)
    return kind


def _require(schema: pa.Schema, table: str, column: str, role: str, fix: str) -> pa.DataType:
    if column not in schema.names:
        raise ColumnNotFoundError.missing(table, column, role, schema.names, fix)
    return schema.field(column).type


def check_inputs(
    spec: TrainingSetSpec, schemas: Mapping[str, pa.Schema], *, provenance: bool = False
) -> CheckedInputs:
    """Check columns, key and time types; decide how each time column is normalized."""
    tables = spec.tables()
    kinds: dict[str, tuple[TimeKind, TimeKind | None]] = {}
    for name, table in tables.items():
        schema = schemas[name]
        vk = _time_column(schema, name, table.time, "time")
        kk = (
            None
            if table.known_at is None
            else _time_column(schema, name, table.known_at, "known_at")
        )
        kinds[name] = (vk, kk)
        for ref in table.entities:
            for col in ref.columns:
                _require(schema, name, col, f"key of entity {ref.entity!r}", "Fix entities=.")
    label_schema = schemas[spec.labels.name]
    reserved = [c for c in label_schema.names if c.startswith("__aj_")]
    if reserved:
        msg = (
            f"label table {spec.labels.name!r} has column(s) {reserved}; names starting with "
            "'__aj_' are reserved for asof_join's working columns: rename them"
        )
        raise InputError(msg, table=spec.labels.name, column=reserved[0])
    for feat in spec.features:
        name = feat.table.name
        schema = schemas[name]
        if isinstance(feat, Latest):
            for col in feat.columns:
                _require(schema, name, col, "feature column", "Fix the feature's columns.")
        elif isinstance(feat, Trailing) and feat.column is not None:
            _require(schema, name, feat.column, "feature column", "Fix the feature's column.")
        lkeys, tkeys = spec.join_keys(feat)
        for lcol, tcol in zip(lkeys, tkeys, strict=True):
            ltype = _require(
                label_schema,
                spec.labels.name,
                lcol,
                f"join key for table {name!r}",
                "Map the entity's columns on the label table: entities={'<entity>': [...]}.",
            )
            ttype = schema.field(tcol).type
            if key_family(ltype) != key_family(ttype):
                msg = (
                    f"key type mismatch: label table {spec.labels.name!r} column {lcol!r} is "
                    f"{ltype} but table {name!r} column {tcol!r} is {ttype}; cast one side so "
                    "both are integers or both are strings"
                )
                raise KeyTypeMismatchError(msg, table=name, column=tcol)
    outputs = spec.output_columns()
    if provenance:
        outputs = outputs + [
            f"{n}{s}"
            for f in spec.features
            if isinstance(f, Latest)
            for n in f.output_names()
            for s in ("__time", "__known_at")
        ]
    clash = [o for o in outputs if o in label_schema.names]
    if clash:
        msg = (
            f"feature output {clash[0]!r} has the name of a column of the label table "
            f"{spec.labels.name!r}; set name= or prefix= on that feature"
        )
        raise SpecError(msg)

    aware_cols = [
        (n, c)
        for n, t in tables.items()
        for c, k in ((t.time, kinds[n][0]), (t.known_at, kinds[n][1]))
        if c is not None and k == TimeKind.AWARE
    ]
    naive_cols = [
        (n, c)
        for n, t in tables.items()
        for c, k in ((t.time, kinds[n][0]), (t.known_at, kinds[n][1]))
        if c is not None and k in (TimeKind.NAIVE, TimeKind.DATE)
    ]
    aware = bool(aware_cols)
    if aware_cols and naive_cols and spec.timezone is None:
        (an, ac), (nn, nc) = aware_cols[0], naive_cols[0]
        msg = (
            f"time zones mixed: table {an!r} column {ac!r} is timezone-aware but table {nn!r} "
            f"column {nc!r} is naive; set timezone='<IANA zone>' on the spec to read naive "
            "times in that zone, or make both the same kind"
        )
        raise TimeTypeError(msg, table=nn, column=nc)
    zone = spec.timezone if aware else None

    def ref(name: str, column: str, kind: TimeKind) -> TimeRef:
        typ = schemas[name].field(column).type
        nanos = pa.types.is_timestamp(typ) and typ.unit == "ns"
        return TimeRef(column, kind, None if kind == TimeKind.AWARE else zone, nanos)

    times = {
        name: TableTimes(
            valid=ref(name, table.time, kinds[name][0]),
            known=None
            if table.known_at is None
            else ref(name, table.known_at, kinds[name][1] or TimeKind.NAIVE),
        )
        for name, table in tables.items()
    }
    integer_columns = frozenset(
        (name, f.name)
        for name in tables
        for f in schemas[name]
        if pa.types.is_integer(f.type) or pa.types.is_boolean(f.type)
    )
    return CheckedInputs(
        times=times,
        label_columns=tuple(label_schema.names),
        aware=aware,
        integer_columns=integer_columns,
    )
