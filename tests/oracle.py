"""Brute-force point-in-time reference that the engine's results are compared against."""

from __future__ import annotations

import datetime as dt
import math
import statistics
from dataclasses import dataclass
from typing import TYPE_CHECKING, Any

import numpy as np
import pandas as pd

if TYPE_CHECKING:
    from collections.abc import Sequence

__all__ = ["is_null", "oracle_build", "to_instant"]


def is_null(value: object) -> bool:
    """Say whether a cell is missing: None, pandas NA, NaT, or a float NaN."""
    if value is None or value is pd.NA or value is pd.NaT:
        return True
    if isinstance(value, float | np.floating):
        return math.isnan(value)
    if isinstance(value, np.datetime64 | np.timedelta64):
        return bool(np.isnat(value))
    return False


def _py(value: object) -> Any:
    """Turn a cell into a plain Python value (numpy scalars unwrapped, every null to None)."""
    if is_null(value):
        return None
    if isinstance(value, np.generic) and not isinstance(value, np.datetime64):
        return value.item()
    return value


def to_instant(value: object, *, aware: bool, timezone: str | None) -> pd.Timestamp | None:
    """Read one time cell the way the contract does.

    A date is its midnight; values are truncated to microseconds. When any table of the spec is
    timezone-aware (``aware``), every value becomes a UTC instant and naive values are read in
    ``timezone``; otherwise values stay naive.
    """
    if is_null(value):
        return None
    if isinstance(value, dt.date) and not isinstance(value, dt.datetime):
        stamp = pd.Timestamp(value.year, value.month, value.day)
    else:
        stamp = pd.Timestamp(value)  # type: ignore[arg-type]  # datetime, np.datetime64, str
    stamp = stamp.floor("us")
    if not aware:
        return stamp
    if stamp.tzinfo is None:
        if timezone is None:
            msg = "naive and timezone-aware times are mixed but the spec sets no timezone="
            raise ValueError(msg)
        stamp = stamp.tz_localize(timezone)
    return stamp.tz_convert("UTC")


def _column_is_aware(column: pd.Series) -> bool:
    """Say whether a time column holds timezone-aware values."""
    if isinstance(column.dtype, pd.DatetimeTZDtype):
        return True
    return any(
        isinstance(v, dt.datetime) and v.tzinfo is not None for v in column if not is_null(v)
    )


@dataclass(frozen=True)
class _Row:
    """One feature-table row: its position, key, valid time s, known time k and cells."""

    position: int
    key: tuple[Any, ...] | None  # None when any key column is null (never matches)
    s: pd.Timestamp
    k: pd.Timestamp
    cells: dict[str, Any]


def _key(cells: Sequence[object]) -> tuple[Any, ...] | None:
    """Build a comparable key; None when any part is null (a null key never matches)."""
    parts = [_py(c) for c in cells]
    if any(p is None for p in parts):
        return None
    return tuple(parts)


def _table_rows(
    table: Any,
    frame: pd.DataFrame,
    key_columns: Sequence[str],
    *,
    aware: bool,
    timezone: str | None,
) -> list[_Row]:
    """Read a feature table into rows, in input order, skipping rows with a null valid time."""
    delay = table.delay if table.delay is not None else dt.timedelta(0)
    rows: list[_Row] = []
    records = frame.to_dict("records")
    for position, record in enumerate(records):
        s = to_instant(record[table.time], aware=aware, timezone=timezone)
        if s is None:
            # The contract: a null valid time is an error unless the table says "skip".
            assert table.null_times == "skip", f"table {table.name!r} has a null valid time"
            continue
        if table.known_at is not None:
            k = to_instant(record[table.known_at], aware=aware, timezone=timezone)
            assert k is not None, f"table {table.name!r} has a null known_at"
        else:
            k = s + pd.Timedelta(delay)
        k = max(k, s)  # a row is never known before it is valid
        cells = {str(name): _py(value) for name, value in record.items()}
        rows.append(_Row(position, _key([record[c] for c in key_columns]), s, k, cells))
    return rows


def _newest(rows: Sequence[_Row]) -> _Row | None:
    """Latest's ordering: greatest s, then greatest k, then last in input order."""
    if not rows:
        return None
    return max(rows, key=lambda r: (r.s, r.k, r.position))


def _aggregate(agg: str, column: str | None, window: Sequence[_Row], zero: float) -> Any:
    """Apply one trailing aggregate to the rows of a window (nulls ignored, as SQL does).

    ``zero`` is the empty sum in the column's type: 0 for integers, 0.0 for floats.
    """
    if agg == "last":
        newest = _newest(window)
        return None if newest is None or column is None else newest.cells[column]
    if column is None:
        assert agg == "count", f"only count may have no column, got {agg!r}"
        return len(window)
    values = [r.cells[column] for r in window if r.cells[column] is not None]
    if agg == "count":
        return len(values)
    if agg == "count_distinct":
        return len(set(values))
    if agg == "sum":
        return sum(values, zero)
    if not values:
        return None
    if agg == "mean":
        return math.fsum(float(v) for v in values) / len(values)
    if agg == "min":
        return min(values)
    if agg == "max":
        return max(values)
    if agg == "std":
        if len(values) < 2:
            return None
        return statistics.stdev(float(v) for v in values)
    msg = f"unknown aggregate {agg!r}"
    raise ValueError(msg)


def _visible(row: _Row, t: pd.Timestamp, *, inclusive: bool) -> bool:
    """Rule 1: a row is visible at t iff k < t (k <= t for an inclusive table)."""
    return row.k <= t if inclusive else row.k < t


def _spec_is_aware(spec: Any, data: dict[str, pd.DataFrame]) -> bool:
    """Say whether any time column used by the spec is timezone-aware."""
    tables = [spec.labels, *(f.table for f in spec.features)]
    for table in tables:
        frame = data[table.name]
        columns = [table.time] + ([table.known_at] if table.known_at is not None else [])
        if any(_column_is_aware(frame[c]) for c in columns):
            return True
    return False


def oracle_build(
    spec: Any, data: dict[str, pd.DataFrame], provenance: bool = False
) -> pd.DataFrame:
    """Build the training set by brute force: the reference the engine must equal.

    Written from the "Semantics (normative)" section of CONTRACT.md and nothing else: for each
    label row, in input order, and each feature, it scans every row of the feature table. That
    is O(labels x rows) per feature, fine for the small generated cases it checks.

    Feature columns are ``object`` columns of plain Python values (None for null); timestamps
    are naive when every input is naive, else UTC instants. ``spec`` is any object with the
    attributes of ``asof_join.TrainingSetSpec``.
    """
    aware = _spec_is_aware(spec, data)
    timezone = getattr(spec, "timezone", None)
    labels_table = spec.labels
    labels = data[labels_table.name]
    label_records = labels.to_dict("records")
    label_times = [
        to_instant(r[labels_table.time], aware=aware, timezone=timezone) for r in label_records
    ]
    if any(t is None for t in label_times):
        assert labels_table.null_times == "keep", "null label time without null_times='keep'"

    out = labels.reset_index(drop=True).copy()
    for feature in spec.features:
        label_keys, table_keys = spec.join_keys(feature)
        table = feature.table
        rows = _table_rows(table, data[table.name], table_keys, aware=aware, timezone=timezone)
        names = feature.output_names()
        is_trailing = hasattr(feature, "agg")
        zero: float = 0
        if is_trailing and feature.column is not None:
            dtype = data[table.name][feature.column].dtype
            zero = 0.0 if pd.api.types.is_float_dtype(dtype) else 0
        columns: dict[str, list[Any]] = {}
        if is_trailing:
            columns[names[0]] = []
        else:
            for name in names:
                columns[name] = []
                if provenance:
                    columns[f"{name}__time"] = []
                    columns[f"{name}__known_at"] = []

        for record, t in zip(label_records, label_times, strict=True):
            key = _key([record[c] for c in label_keys])
            matching = []
            if t is not None and key is not None:
                matching = [
                    r for r in rows if r.key == key and _visible(r, t, inclusive=table.inclusive)
                ]
            if is_trailing:
                if t is None:  # null_times="keep": every feature null, counts included
                    columns[names[0]].append(None)
                    continue
                start = t - pd.Timedelta(feature.over)
                window = [r for r in matching if r.s > start]
                columns[names[0]].append(_aggregate(feature.agg, feature.column, window, zero))
                continue
            chosen = _newest(matching)
            if (
                chosen is not None
                and t is not None
                and feature.max_age is not None
                and t - chosen.s > pd.Timedelta(feature.max_age)
            ):
                chosen = None
            for source, name in zip(feature.columns, names, strict=True):
                columns[name].append(None if chosen is None else chosen.cells[source])
                if provenance:
                    columns[f"{name}__time"].append(None if chosen is None else chosen.s)
                    columns[f"{name}__known_at"].append(None if chosen is None else chosen.k)

        for name, values in columns.items():
            assert name not in out.columns, f"output column {name!r} already exists"
            out[name] = pd.Series(values, dtype=object, index=out.index)
    return out
