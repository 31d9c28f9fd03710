"""Value-by-value comparison of two result frames, with nulls, float tolerance and instants."""

from __future__ import annotations

import datetime as dt
import decimal
import math
from typing import Any

import numpy as np
import pandas as pd

from tests.oracle import is_null

__all__ = ["assert_frames_match", "frame_mismatches"]

_MAX_REPORTED = 12


def _normalize(value: object) -> tuple[str, Any]:
    """Reduce a cell to (kind, comparable value); kind is null|bool|int|float|str|time|other."""
    if is_null(value):
        return "null", None
    if isinstance(value, np.generic) and not isinstance(value, np.datetime64):
        value = value.item()
    if isinstance(value, bool):
        return "bool", value
    if isinstance(value, int):
        return "int", value
    if isinstance(value, decimal.Decimal):
        # DuckDB sums integers into HUGEINT, which Arrow carries as decimal128(38, 0)
        return ("int", int(value)) if value == value.to_integral_value() else ("float", value)
    if isinstance(value, float):
        return "float", value
    if isinstance(value, str):
        return "str", value
    if isinstance(value, dt.datetime | np.datetime64):
        stamp = pd.Timestamp(value)
        return "time", stamp.tz_convert("UTC") if stamp.tzinfo is not None else stamp
    if isinstance(value, dt.date):
        return "time", pd.Timestamp(value.year, value.month, value.day)
    return "other", value


def _column_has_nulls(series: pd.Series) -> bool:
    return bool(series.isna().any())


def _kinds_compatible(a_kind: str, b_kind: str, a_series: pd.Series, b_series: pd.Series) -> bool:
    """An int may meet a float only where pandas had to make the column float for its nulls."""
    if a_kind == b_kind:
        return True
    if {a_kind, b_kind} != {"int", "float"}:
        return False
    float_side = a_series if a_kind == "float" else b_series
    return _column_has_nulls(float_side) or float_side.dtype == object


def _equal(a: tuple[str, Any], b: tuple[str, Any], rel_tol: float, abs_tol: float) -> bool:
    (a_kind, a_val), (b_kind, b_val) = a, b
    if a_kind == "null" or b_kind == "null":
        return a_kind == b_kind
    if {a_kind, b_kind} <= {"int", "float"}:
        if a_kind == "float" or b_kind == "float":
            x, y = float(a_val), float(b_val)
            if math.isinf(x) or math.isinf(y):
                return x == y
            return math.isclose(x, y, rel_tol=rel_tol, abs_tol=abs_tol)
        return bool(a_val == b_val)
    if a_kind == "time" and b_kind == "time":
        if (a_val.tzinfo is None) != (b_val.tzinfo is None):
            return False  # a naive value is not an instant; that is a type difference
        return bool(a_val == b_val)
    return a_kind == b_kind and bool(a_val == b_val)


def frame_mismatches(
    actual: pd.DataFrame,
    expected: pd.DataFrame,
    *,
    rel_tol: float = 1e-9,
    abs_tol: float = 1e-9,
) -> list[str]:
    """List the differences between two frames (empty when they match).

    Same columns in the same order, same number of rows, and cell by cell: null equals null
    (None, NaN, NA and NaT alike), numbers within ``rel_tol`` (``abs_tol`` near zero), an int
    against a float only in a column where nulls forced pandas to use floats, timestamps as
    instants (timezone-aware ones compared in UTC; naive never equals aware), dates as their
    midnight. The index is ignored.
    """
    problems: list[str] = []
    if list(actual.columns) != list(expected.columns):
        problems.append(
            f"columns differ:\n  actual   {list(actual.columns)}"
            f"\n  expected {list(expected.columns)}"
        )
        return problems
    if len(actual) != len(expected):
        problems.append(f"row counts differ: actual {len(actual)}, expected {len(expected)}")
        return problems
    for column in expected.columns:
        a_series = actual[column].reset_index(drop=True)
        b_series = expected[column].reset_index(drop=True)
        a_cells = [_normalize(v) for v in a_series.astype(object)]
        b_cells = [_normalize(v) for v in b_series.astype(object)]
        a_kinds = {k for k, _ in a_cells} - {"null"}
        b_kinds = {k for k, _ in b_cells} - {"null"}
        if len(a_kinds) == 1 and len(b_kinds) == 1:
            a_kind, b_kind = next(iter(a_kinds)), next(iter(b_kinds))
            if not _kinds_compatible(a_kind, b_kind, a_series, b_series):
                problems.append(
                    f"column {column!r}: actual holds {a_kind} ({a_series.dtype}), expected "
                    f"{b_kind} ({b_series.dtype})"
                )
                continue
        for row, (a, b) in enumerate(zip(a_cells, b_cells, strict=True)):
            if not _equal(a, b, rel_tol, abs_tol):
                problems.append(
                    f"row {row}, column {column!r}: actual {a_series.iloc[row]!r}, "
                    f"expected {b_series.iloc[row]!r}"
                )
    return problems


def assert_frames_match(
    actual: pd.DataFrame,
    expected: pd.DataFrame,
    *,
    context: str = "",
    rel_tol: float = 1e-9,
    abs_tol: float = 1e-9,
) -> None:
    """Fail with a readable list of differences when two frames do not match."""
    problems = frame_mismatches(actual, expected, rel_tol=rel_tol, abs_tol=abs_tol)
    if not problems:
        return
    shown = problems[:_MAX_REPORTED]
    more = len(problems) - len(shown)
    lines = [f"{len(problems)} difference(s):", *(f"  - {p}" for p in shown)]
    if more:
        lines.append(f"  ... and {more} more")
    if context:
        lines.append(context)
    raise AssertionError("\n".join(lines))
