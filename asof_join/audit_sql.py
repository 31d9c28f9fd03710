"""SQL expressions and small conversions shared by the audit's checks.

Times are normalized through the engine's renderer so the audit reads them exactly as
``build()`` does; values compare by type family, floats within the report's tolerance.
"""

from __future__ import annotations

import datetime as dt
from typing import TYPE_CHECKING

import numpy as np
import pyarrow as pa

from .audit_report import _EDGES, ABS_TOLERANCE, REL_TOLERANCE
from .engines.sql import Params
from .errors import TimeTypeError
from .plan import TimeKind, TimeRef
from .spec import Latest, Trailing

if TYPE_CHECKING:
    import duckdb

    from .spec import Feature

_INT_TYPES = frozenset(
    {"TINYINT", "SMALLINT", "INTEGER", "BIGINT", "HUGEINT"}
    | {"UTINYINT", "USMALLINT", "UINTEGER", "UBIGINT", "UHUGEINT"}
)
_NUMERIC = frozenset({"int", "float", "bool"})
_POS = "__aj_pos"
_AUD = "__aj_aud"
_AWARE = ("TIMESTAMP WITH TIME ZONE", "TIMESTAMPTZ_NS")


def _rows(n: int) -> str:
    return f"{n:,} row{'' if n == 1 else 's'}"


def _describe(feat: Feature) -> str:
    if isinstance(feat, Latest):
        return f"Latest({feat.table.name!r}, {list(feat.columns)})"
    assert isinstance(feat, Trailing)
    return f"Trailing({feat.table.name!r}, {feat.column!r}, {feat.agg!r})"


def _unbounded(feat: Feature) -> Feature:
    """A latest feature without max_age, so the audit sees the row a stale value came from."""
    if isinstance(feat, Latest) and feat.max_age is not None:
        return feat.model_copy(update={"max_age": None})
    return feat


def _params(**values: object) -> Params:
    p = Params()
    p.values.update(values)
    return p


def _duck_types(con: duckdb.DuckDBPyConnection, relation: str) -> dict[str, str]:
    rel = con.sql(f"SELECT * FROM {relation} LIMIT 0")
    return {name: str(typ) for name, typ in zip(rel.columns, rel.types, strict=True)}


def _family(duck_type: str) -> str:
    """The comparison family of a DuckDB type: int, float, bool, text, or the type itself."""
    t = duck_type.upper()
    if t in _INT_TYPES:
        return "int"
    if t in ("FLOAT", "DOUBLE") or t.startswith("DECIMAL"):
        return "float"
    if t == "BOOLEAN":
        return "bool"
    if t == "VARCHAR" or t.startswith("ENUM"):
        return "text"
    return t


def _eq_sql(a: str, b: str, fa: str, fb: str) -> str:
    """Never-null equality: null equals null; floats (NaN as null) within the tolerance."""
    if fa == fb and fa != "float":
        return f"({a} IS NOT DISTINCT FROM {b})"
    if fa in _NUMERIC and fb in _NUMERIC:
        x = f"nullif(CAST({a} AS DOUBLE), 'NaN'::DOUBLE)"
        y = f"nullif(CAST({b} AS DOUBLE), 'NaN'::DOUBLE)"
        close = (
            f"isfinite({x}) AND isfinite({y}) AND abs({x} - {y}) <= "
            f"greatest({ABS_TOLERANCE!r}, {REL_TOLERANCE!r} * greatest(abs({x}), abs({y})))"
        )
        return (
            f"(CASE WHEN {x} IS NULL OR {y} IS NULL THEN {x} IS NULL AND {y} IS NULL "
            f"ELSE {x} = {y} OR ({close}) END)"
        )
    return f"(CAST({a} AS VARCHAR) IS NOT DISTINCT FROM CAST({b} AS VARCHAR))"


def _canon_sql(x: str, own: str, other: str) -> str:
    """The value an ASOF join matches on: floats as float32 (the tolerance is checked after)."""
    if own == other and own != "float":
        return x
    if own in _NUMERIC and other in _NUMERIC:
        return f"CAST(nullif(CAST({x} AS DOUBLE), 'NaN'::DOUBLE) AS FLOAT)"
    return f"CAST({x} AS VARCHAR)"


def _micros_sql(duck_type: str, name: str, p: Params, zone: str | None) -> str:
    """Epoch microseconds of a time column, normalized exactly as build() does (the engine's
    renderer): an aware value is its instant; a naive one (or a date, at midnight) is read in
    ``zone`` when given; nanoseconds are floored."""
    from .engines.duckdb import DuckDBRenderer

    if duck_type in _AWARE:
        kind = TimeKind.AWARE
    elif duck_type == "DATE":
        kind = TimeKind.DATE
    elif duck_type.startswith("TIMESTAMP"):
        kind = TimeKind.NAIVE
    else:
        msg = (
            f"column {name!r} has type {duck_type}, not a timestamp or date; the audit compares "
            "it as a time: convert it (e.g. pandas.to_datetime)"
        )
        raise TimeTypeError(msg, column=name)
    ref = TimeRef(
        name, kind, None if kind == TimeKind.AWARE else zone, nanos=duck_type.endswith("_NS")
    )
    return f"epoch_us({DuckDBRenderer.for_expressions(p).time_expr(ref)})"


def _bin_sql(age: str) -> str:
    parts = [f"WHEN ({age}) <= {int(edge)} THEN {i}" for i, edge in enumerate(_EDGES)]
    return f"CASE {' '.join(parts)} ELSE {len(_EDGES)} END"


def _bins(age_us: np.ndarray) -> np.ndarray:
    """AGE_BINS index per age in microseconds (same bins as _bin_sql)."""
    out: np.ndarray = np.searchsorted(_EDGES, np.asarray(age_us, dtype=np.int64), side="left")
    return out


def _filled(column: pa.ChunkedArray | pa.Array) -> np.ndarray:
    out: np.ndarray = column.fill_null(0).to_numpy(zero_copy_only=False).astype(np.int64)
    return out


def _micros_to_py(column: pa.ChunkedArray | pa.Array) -> list[dt.datetime | None]:
    """Epoch microseconds as naive datetimes (UTC when the set is timezone-aware)."""
    typed = column.cast(pa.int64()).cast(pa.timestamp("us"))
    values: list[dt.datetime | None] = typed.to_pylist()
    return values
