"""Tests for split_by_time: exact boundaries, gaps, every frame kind, time types and errors."""

from __future__ import annotations

import datetime as dt
import re
from collections.abc import Callable
from typing import Any

import numpy as np
import pandas as pd
import polars as pl
import pyarrow as pa
import pytest

import asof_join as aj

C1 = dt.datetime(2024, 3, 1)
C2 = dt.datetime(2024, 6, 1)
US = dt.timedelta(microseconds=1)
DAY = dt.timedelta(days=1)

# (time, expected split) at and around every boundary, cuts C1, C2 and a 1-day gap.
BOUNDARIES = [
    (dt.datetime(2023, 1, 1), "train"),
    (C1 - US, "train"),
    (C1, "gap"),
    (C1 + DAY - US, "gap"),
    (C1 + DAY, "valid"),
    (C2 - US, "valid"),
    (C2, "gap"),
    (C2 + DAY - US, "gap"),
    (C2 + DAY, "test"),
    (dt.datetime(2030, 1, 1), "test"),
]


def _pandas(times: list[Any]) -> pd.DataFrame:
    return pd.DataFrame({"id": range(len(times)), "t": pd.Series(times, dtype="datetime64[us]")})


def _polars(times: list[Any]) -> pl.DataFrame:
    return pl.DataFrame({"id": list(range(len(times))), "t": times})


def _arrow(times: list[Any]) -> pa.Table:
    return pa.table({"id": list(range(len(times))), "t": pa.array(times, pa.timestamp("us"))})


def _splits(out: Any) -> list[str | None]:
    if isinstance(out, pd.DataFrame):
        return list(out["split"])
    if isinstance(out, pl.DataFrame):
        return out["split"].to_list()
    return out.column("split").to_pylist()


KINDS: dict[str, Callable[[list[Any]], Any]] = {
    "pandas": _pandas,
    "polars": _polars,
    "arrow": _arrow,
}


@pytest.fixture(params=list(KINDS))
def make(request: pytest.FixtureRequest) -> Callable[[list[Any]], Any]:
    return KINDS[request.param]


def test_exact_boundaries(make: Callable[[list[Any]], Any]) -> None:
    frame = make([t for t, _ in BOUNDARIES])
    out = aj.split_by_time(frame, time="t", cuts=[C1, C2], gap="1d")
    assert type(out) is type(frame)
    assert _splits(out) == [s for _, s in BOUNDARIES]
    # input not modified, other columns unchanged and in order
    assert "split" not in (frame.columns if not isinstance(frame, pa.Table) else frame.schema.names)
    ids = out["id"] if not isinstance(out, pa.Table) else out.column("id").to_pylist()
    assert list(ids) == list(range(len(BOUNDARIES)))


def test_zero_gap_and_string_cuts() -> None:
    frame = _pandas([C1 - US, C1, C2 - US, C2])
    out = aj.split_by_time(frame, time="t", cuts=["2024-03-01", "2024-06-01"], gap="0s")
    assert list(out["split"]) == ["train", "valid", "valid", "test"]


def test_one_cut_and_custom_names_and_column() -> None:
    frame = _polars([C1 - US, C1, C1 + 2 * DAY])
    out = aj.split_by_time(
        frame, time="t", cuts=[C1], gap=dt.timedelta(days=2), names=("fit", "eval"), column="part"
    )
    assert out["part"].to_list() == ["fit", "gap", "eval"]


def test_many_cuts() -> None:
    cuts = [dt.datetime(2024, m, 1) for m in (2, 3, 4)]
    frame = _arrow([dt.datetime(2024, m, 15) for m in (1, 2, 3, 4)])
    out = aj.split_by_time(frame, time="t", cuts=cuts, gap="1d", names=["a", "b", "c", "d"])
    assert _splits(out) == ["a", "b", "c", "d"]


def test_pandas_index_kept() -> None:
    frame = _pandas([C1 - DAY, C2 + 2 * DAY]).set_axis([10, 20])
    out = aj.split_by_time(frame, time="t", cuts=[C1, C2])
    assert list(out.index) == [10, 20]
    assert list(out["split"]) == ["train", "test"]


def test_nanosecond_timestamps_floor_to_microseconds() -> None:
    frame = pd.DataFrame(
        {"t": pd.to_datetime(["2024-02-29 23:59:59.999999999", "2024-03-02 00:00:00.000000001"])}
    )
    out = aj.split_by_time(frame, time="t", cuts=[C1, C2])
    assert list(out["split"]) == ["train", "valid"]


def test_date_column_is_midnight() -> None:
    frame = pa.table({"d": [dt.date(2024, 2, 29), dt.date(2024, 3, 1), dt.date(2024, 3, 2)]})
    out = aj.split_by_time(frame, time="d", cuts=[dt.date(2024, 3, 1)], names=("a", "b"))
    assert _splits(out) == ["a", "gap", "b"]


def test_aware_column_compares_instants() -> None:
    times = pd.to_datetime(["2024-03-01T00:30:00+01:00", "2024-03-01T01:30:00+01:00"])
    frame = pd.DataFrame({"t": times})
    # 2024-03-01T00:00 UTC = 01:00 in +01:00: the first row is before it, the second after.
    out = aj.split_by_time(frame, time="t", cuts=["2024-03-01T00:00Z"], gap="0s", names=("a", "b"))
    assert list(out["split"]) == ["a", "b"]
    out = aj.split_by_time(
        frame,
        time="t",
        cuts=["2024-03-01T01:00"],
        gap="0s",
        names=("a", "b"),
        timezone="Europe/Paris",
    )
    assert list(out["split"]) == ["a", "b"]
    with pytest.raises(aj.TimeTypeError, match="timezone="):
        aj.split_by_time(frame, time="t", cuts=["2024-03-01"], names=("a", "b"))


def test_null_times() -> None:
    frame = pa.table({"t": pa.array([C1 - DAY, None, C2 + 2 * DAY], pa.timestamp("us"))})
    with pytest.raises(aj.NullTimeError, match=re.escape("1 null value(s), at rows [1]")):
        aj.split_by_time(frame, time="t", cuts=[C1, C2])
    out = aj.split_by_time(frame, time="t", cuts=[C1, C2], null_times="keep")
    assert _splits(out) == ["train", None, "test"]


def test_large_frame_vectorised() -> None:
    rng = np.random.default_rng(0)
    t = np.datetime64("2024-01-01", "us") + rng.integers(0, 365 * 86_400_000_000, 200_000)
    frame = pd.DataFrame({"t": t})
    out = aj.split_by_time(frame, time="t", cuts=[C1, C2])
    ts = out["t"]
    assert (ts[out["split"] == "train"] < C1).all()
    assert ((ts[out["split"] == "valid"] >= C1 + DAY) & (ts[out["split"] == "valid"] < C2)).all()
    assert (ts[out["split"] == "test"] >= C2 + DAY).all()
    assert (out["split"] == "gap").sum() == ((ts >= C1) & (ts < C1 + DAY)).sum() + (
        (ts >= C2) & (ts < C2 + DAY)
    ).sum()


@pytest.mark.parametrize(
    ("kwargs", "error", "text"),
    [
        ({"cuts": [C2, C1]}, aj.SpecError, "strictly increasing"),
        ({"cuts": [C1, C1]}, aj.SpecError, "strictly increasing"),
        ({"cuts": [C1, C1 + DAY / 2]}, aj.SpecError, "inside the gap"),
        ({"cuts": [C1]}, aj.SpecError, "names has 3"),
        ({"cuts": []}, aj.SpecError, "cuts is empty"),
        ({"cuts": "2024-03-01"}, aj.SpecError, "cuts must be a list"),
        ({"cuts": [C1, C2], "names": ("a", "gap", "c")}, aj.SpecError, "not 'gap'"),
        ({"cuts": [C1, C2], "names": ("a", "a", "c")}, aj.SpecError, "distinct"),
        ({"cuts": [C1, C2], "gap": "soon"}, aj.SpecError, "not a duration"),
        ({"cuts": [C1, "yesterday-ish"]}, aj.InputError, "is not a time"),
        ({"cuts": [C1, C2], "column": "id"}, aj.SpecError, "already has a column 'id'"),
        ({"cuts": [C1, C2], "time": "tt"}, aj.ColumnNotFoundError, "Did you mean 't'"),
        ({"cuts": [C1, C2], "time": "id"}, aj.TimeTypeError, "not a timestamp or date"),
        ({"cuts": [C1, C2], "null_times": "drop"}, aj.SpecError, "null_times"),
    ],
)
def test_errors(kwargs: dict[str, Any], error: type[Exception], text: str) -> None:
    kwargs = {"time": "t", **kwargs}
    with pytest.raises(error, match=re.escape(text)):
        aj.split_by_time(_pandas([C1]), **kwargs)


def test_rejects_other_objects() -> None:
    with pytest.raises(aj.InputError, match="pandas DataFrame, a polars DataFrame"):
        aj.split_by_time({"t": [C1]}, time="t", cuts=[C1])  # type: ignore[type-var]  # on purpose
    with pytest.raises(aj.InputError, match="collect"):
        aj.split_by_time(_polars([C1]).lazy(), time="t", cuts=[C1])  # type: ignore[type-var]  # on purpose
