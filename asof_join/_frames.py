"""Frame kinds (pandas, polars, pyarrow) for the helpers that take and return user frames."""

from __future__ import annotations

import glob
from enum import Enum
from pathlib import Path
from typing import TYPE_CHECKING, Any

import numpy as np
import pyarrow as pa

from .errors import (
    ColumnNotFoundError,
    InputError,
    NullTimeError,
    TimeTypeError,
    UnreadableInputError,
)

if TYPE_CHECKING:
    from collections.abc import Sequence

_MICROS = {"s": 1_000_000, "ms": 1_000, "us": 1, "ns": None}


class FrameKind(str, Enum):
    """The frame libraries the ranking and split helpers accept and return."""

    PANDAS = "pandas"
    POLARS = "polars"
    ARROW = "arrow"


def frame_kind(frame: object, what: str) -> FrameKind:
    """Which library ``frame`` comes from; InputError for anything else."""
    module = type(frame).__module__.split(".")[0]
    name = type(frame).__name__
    if module == "pandas" and name == "DataFrame":
        return FrameKind.PANDAS
    if module == "polars" and name == "DataFrame":
        return FrameKind.POLARS
    if module == "pyarrow" and name == "Table":
        return FrameKind.ARROW
    if module == "polars" and name == "LazyFrame":
        msg = f"{what} is a polars LazyFrame; pass a DataFrame (call .collect() first)"
        raise InputError(msg)
    msg = (
        f"{what} must be a pandas DataFrame, a polars DataFrame or a pyarrow Table, "
        f"got {type(frame).__module__}.{name}"
    )
    raise InputError(msg)


def columns_of(frame: Any, kind: FrameKind) -> list[str]:
    """The frame's column names, as strings."""
    if kind is FrameKind.ARROW:
        return list(frame.schema.names)
    return [str(c) for c in frame.columns]


def require_columns(frame: Any, kind: FrameKind, what: str, needed: dict[str, str]) -> None:
    """Raise ColumnNotFoundError for the first column in ``needed`` (column -> role) missing."""
    names = columns_of(frame, kind)
    for column, role in needed.items():
        if column not in names:
            fix = f"Fix {role.split()[0]}= or the data."
            raise ColumnNotFoundError.missing(what, column, role, names, fix)


def column_to_arrow(frame: Any, kind: FrameKind, column: str) -> pa.Array:
    """One column as a single Arrow array (chunks combined)."""
    if kind is FrameKind.ARROW:
        col = frame.column(column)
    elif kind is FrameKind.POLARS:
        col = frame.get_column(column).to_arrow()
    else:
        col = pa.array(frame[column])
    if isinstance(col, pa.ChunkedArray):
        col = col.combine_chunks()
    return col


def to_arrow(frame: Any, kind: FrameKind) -> pa.Table:
    """The frame as a pyarrow Table (a pandas index is dropped)."""
    if kind is FrameKind.ARROW:
        return frame
    if kind is FrameKind.POLARS:
        return frame.to_arrow()
    return pa.Table.from_pandas(frame, preserve_index=False)


def from_arrow(table: pa.Table, kind: FrameKind) -> Any:
    """An Arrow table back in the caller's frame library."""
    if kind is FrameKind.ARROW:
        return table
    if kind is FrameKind.POLARS:
        import polars as pl

        return pl.from_arrow(table)
    return table.to_pandas()


def time_micros(array: pa.Array, what: str, column: str, role: str) -> tuple[np.ndarray, bool]:
    """Microseconds since the epoch (int64, nulls as 0) and whether the times are zone-aware.

    Timestamps of any unit are floored to microseconds; a date is its midnight. Zone-aware
    values are instants (UTC microseconds). Nulls are reported by :func:`null_positions`.
    """
    typ = array.type
    if pa.types.is_date(typ):
        days = array.cast(pa.date32()).cast(pa.int32()).to_numpy(zero_copy_only=False)
        values = np.nan_to_num(days.astype("float64")).astype(np.int64) * 86_400_000_000
        return values, False
    if not pa.types.is_timestamp(typ):
        msg = (
            f"{what} column {column!r} (its {role}) has type {typ}, not a timestamp or date; "
            "convert it (e.g. pandas.to_datetime) or point the argument at a timestamp column"
        )
        raise TimeTypeError(msg, table=what, column=column)
    raw = array.cast(pa.int64()).fill_null(0).to_numpy(zero_copy_only=False).astype(np.int64)
    scale = _MICROS[typ.unit]
    values = raw // 1_000 if scale is None else raw * scale
    return values, typ.tz is not None


def check_local_path(name: str, path: str, *, directories: bool = False) -> None:
    """Fail before reading when a local path or glob matches nothing (or, unless
    `directories`, something that is not a file); remote URLs are left to the reader."""
    if "://" in path:
        return
    matches = glob.glob(path) if glob.has_magic(path) else [path]
    found = Path.exists if directories else Path.is_file
    missing = path if not matches else next((m for m in matches if not found(Path(m))), None)
    if missing is None:
        return
    msg = (
        f"table {name!r}: cannot read {missing!r} (no such file or no match for the glob); "
        "fix the path in data= or the spec's path:"
    )
    raise UnreadableInputError(msg, table=name, value=path)


def null_positions(array: pa.Array) -> np.ndarray:
    """0-based positions of the nulls in ``array``."""
    if array.null_count == 0:
        return np.empty(0, dtype=np.int64)
    return np.flatnonzero(array.is_null().to_numpy(zero_copy_only=False))


def null_values_error(
    what: str,
    column: str,
    role: str,
    positions: np.ndarray,
    fix: str,
    error: type[InputError] = NullTimeError,
) -> None:
    """Raise `error` (NullTimeError for times) naming the count and first positions of nulls."""
    first = ", ".join(str(int(p)) for p in positions[:5])
    more = ", ..." if len(positions) > 5 else ""
    msg = (
        f"{what} column {column!r} (its {role}) has {len(positions)} null value(s), at rows "
        f"[{first}{more}] (0-based); {fix}"
    )
    raise error(msg, table=what, column=column, value=len(positions))


def instant_micros(value: object, what: str, *, aware: bool, timezone: str | None) -> int:
    """A user-given time (str, datetime, date, numpy or pandas) in the column's microseconds.

    ``aware`` says whether the column it is compared with holds zone-aware instants; a naive
    value is then read in ``timezone`` and an aware one against a naive column is converted to
    ``timezone`` wall-clock time. Without ``timezone`` such a mix is a TimeTypeError.
    """
    import pandas as pd

    try:
        parsed = pd.Timestamp(value)  # type: ignore[arg-type]  # any input; checked just below
    except (TypeError, ValueError):
        parsed = None
    if not isinstance(parsed, pd.Timestamp):  # None, or NaT for None / "NaT"
        msg = (
            f"{what} {value!r} is not a time; give a datetime, a date or an ISO string like "
            "'2024-06-01' or '2024-06-01T12:00'"
        )
        raise InputError(msg)
    stamp = parsed
    has_zone = stamp.tzinfo is not None
    if has_zone != aware and timezone is None:
        side = "naive" if aware else "timezone-aware"
        column = "timezone-aware" if aware else "naive"
        msg = (
            f"{what} {value!r} is {side} but the time column is {column}; give {column} "
            "times or pass timezone='<IANA zone>' to read naive times in that zone"
        )
        raise TimeTypeError(msg)
    if aware:
        # Compare as instants: naive values are read in `timezone`.
        zoned = stamp if has_zone else stamp.tz_localize(timezone)
        stamp = zoned.tz_convert("UTC").tz_localize(None)
    elif has_zone:
        # A naive column holds wall-clock times in `timezone`.
        stamp = stamp.tz_convert(timezone).tz_localize(None)
    nanos = int(stamp.to_datetime64().astype("datetime64[ns]").astype(np.int64))
    return nanos // 1_000


def duration_micros(value: object, what: str) -> int:
    """A duration argument ('1d', '36h', ISO 8601 or timedelta) in microseconds."""
    from .durations import parse_duration, to_micros

    try:
        parsed = parse_duration(value, what=what)
    except ValueError as exc:
        raise InputError(str(exc)) from None
    return to_micros(parsed)


def check_names(names: Sequence[object], what: str) -> list[str]:
    """Names must be non-empty strings."""
    out = []
    for n in names:
        if not isinstance(n, str) or not n:
            msg = f"{what} must be non-empty strings, got {n!r}"
            raise InputError(msg)
        out.append(n)
    return out
