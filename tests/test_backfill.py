"""Tests for backfill: snapshots equal build() on the spine, incremental runs, crashes, locking."""

from __future__ import annotations

import datetime as dt
import fcntl
import json
import os
import random
import re
import signal
import subprocess
import sys
import textwrap
import time
from pathlib import Path
from typing import Any

import duckdb
import numpy as np
import pandas as pd
import polars as pl
import pyarrow as pa
import pyarrow.dataset as ds
import pyarrow.parquet as pq
import pytest
import yaml

import asof_join as aj
from asof_join.backfill import LOCK, MANIFEST, SLEEP_ENV, partition_time
from asof_join.cli import main
from asof_join.demo import make_demo_data

customer = aj.Entity("customer", keys=["customer_id"])
plant = aj.Entity("plant", keys=["plant_id"])
profiles = aj.EventTable("profiles", time="updated_at", known_at="loaded_at", entities=[customer])
orders = aj.EventTable("orders", time="ordered_at", entities=[customer, plant])
views = aj.EventTable("views", time="viewed_at", entities=[customer, plant])
returns = aj.EventTable("returns", time="returned_at", entities=[customer, plant])

#: Customer features of the nursery: one latest lookup and trailing windows on three tables.
FEATURES = [
    aj.Latest(profiles, ["tier", "region"], max_age="365d"),
    aj.Trailing(orders, "amount", "sum", over="30d", entity=customer, name="spend_30d"),
    aj.Trailing(orders, None, "count", over="365d", entity=customer, name="orders_365d"),
    aj.Trailing(orders, "amount", "mean", over="90d", entity=customer, name="mean_90d"),
    aj.Trailing(views, None, "count", over="7d", entity=customer, name="views_7d"),
    aj.Trailing(returns, None, "count", over="180d", entity=customer, name="returns_180d"),
]
#: The columns of every partition file: the key, then the features (as_of is the folder name).
NAMES = ["customer_id", "tier", "region", "spend_30d", "orders_365d", "mean_90d"]
NAMES += ["views_7d", "returns_180d"]


@pytest.fixture(scope="module")
def nursery() -> dict[str, pa.Table]:
    tables = make_demo_data(1_500, seed=3)
    return {name: tables[name] for name in ("profiles", "orders", "views", "returns")}


@pytest.fixture(scope="module")
def nursery_files(nursery: dict[str, pa.Table], tmp_path_factory: pytest.TempPathFactory) -> Path:
    root = tmp_path_factory.mktemp("nursery")
    for name, table in nursery.items():
        pq.write_table(table, root / f"{name}.parquet")
    spec = aj.TrainingSetSpec(labels=orders, features=FEATURES)
    (root / "spec.yaml").write_text(spec.to_yaml(), encoding="utf-8")
    return root


def first_known(tables: dict[str, pa.Table]) -> pd.Series:
    """Brute force: each customer's earliest known time over the features' tables."""
    parts = []
    for name, table in tables.items():
        frame = table.to_pandas()
        if name == "profiles":
            known = frame[["updated_at", "loaded_at"]].max(axis=1)
        else:
            known = frame[{"orders": "ordered_at", "views": "viewed_at"}.get(name, "returned_at")]
        parts.append(pd.DataFrame({"customer_id": frame["customer_id"], "known": known}))
    return pd.concat(parts).groupby("customer_id")["known"].min()


def explicit_build(features: list[Any], data: dict[str, Any], spine: pd.DataFrame) -> pd.DataFrame:
    """build() over an explicit (customer_id, as_of) label table."""
    labels = aj.EventTable("spine", time="as_of", entities=[customer])
    spec = aj.TrainingSetSpec(labels=labels, features=features)
    return aj.build(spec, data={**data, "spine": spine}).to_pandas()


def read_partition(out: Path, name: str) -> pd.DataFrame:
    return pq.read_table(out / name / "part-0.parquet").to_pandas()


def assert_frames_equal(got: pd.DataFrame, want: pd.DataFrame) -> None:
    """Equal values; floating-point aggregates to 1e-9 (their rounding depends on the batch)."""
    got = got.reset_index(drop=True)
    want = want.reset_index(drop=True)
    assert list(got.columns) == list(want.columns)
    pd.testing.assert_frame_equal(got, want, check_dtype=False, rtol=1e-9, atol=1e-9)


def snapshot(out: Path) -> dict[str, tuple[bytes, int]]:
    """Every file of a backfill folder (but its lock file): relative path -> (bytes, mtime)."""
    files = {}
    for path in sorted(out.rglob("*")):
        if path.is_file() and path.name != LOCK:
            files[str(path.relative_to(out))] = (path.read_bytes(), path.stat().st_mtime_ns)
    return files


def contents(out: Path) -> dict[str, bytes]:
    return {k: v[0] for k, v in snapshot(out).items()}


# --- semantics ---------------------------------------------------------------------------------


def test_grid_equals_build_on_explicit_spine(nursery: dict[str, pa.Table], tmp_path: Path) -> None:
    out = tmp_path / "snap"
    result = aj.backfill(
        FEATURES,
        data=nursery,
        start="2023-01-01",
        end="2023-01-20",
        out=out,
        chunk=6,
        progress=False,
    )
    times = pd.date_range("2023-01-01", "2023-01-20", freq="D")
    assert result.written == tuple(f"as_of={t.date().isoformat()}" for t in times)
    assert result.skipped == ()
    known = first_known(nursery)
    spine = pd.DataFrame(
        [(k, t) for t in times for k in sorted(known.index) if known[k] < t],
        columns=["customer_id", "as_of"],
    )
    assert spine["as_of"].nunique() == len(times)  # keys enter over the grid: not all at once
    assert spine.groupby("as_of").size().is_monotonic_increasing
    assert spine.groupby("as_of").size().iloc[0] < spine.groupby("as_of").size().iloc[-1]
    want = explicit_build(FEATURES, nursery, spine)
    manifest = json.loads((out / MANIFEST).read_text())
    for t in times:
        name = f"as_of={t.date().isoformat()}"
        got = read_partition(out, name)
        assert list(got.columns) == NAMES
        expected = want[want["as_of"] == t].drop(columns="as_of")
        assert_frames_equal(got, expected)
        assert manifest["partitions"][name]["rows"] == len(expected)
        assert partition_time(name) == t.to_pydatetime()
    assert result.rows == len(spine)


def test_spec_and_feature_list_give_the_same_snapshots(
    nursery: dict[str, pa.Table], tmp_path: Path
) -> None:
    # A spec's label table only maps the entity (buyer_id); its data is not needed.
    labels = aj.EventTable("orders_by_buyer", time="at", entities={customer: ["buyer_id"]})
    spec = aj.TrainingSetSpec(labels=labels, features=FEATURES[:2])
    data = {
        "profiles": nursery["profiles"],
        "orders": nursery["orders"],
        "orders_by_buyer": pd.DataFrame({"buyer_id": [1]}),  # declared, read by no feature
    }
    a = aj.backfill(spec, data=data, start="2023-03-01", end="2023-03-03", out=tmp_path / "a")
    b = aj.backfill(
        FEATURES[:2],
        data=nursery,
        start="2023-03-01",
        end="2023-03-03",
        out=tmp_path / "b",
        progress=False,
    )
    assert a.written == b.written
    for name in a.written:
        got = read_partition(tmp_path / "a", name)
        assert list(got.columns) == ["buyer_id", "tier", "region", "spend_30d"]
        assert_frames_equal(
            got.rename(columns={"buyer_id": "customer_id"}), read_partition(tmp_path / "b", name)
        )


def test_population_enters_at_first_visible_time(tmp_path: Path) -> None:
    day = pd.Timestamp("2024-01-01")
    # strict table: visible when known time < T
    seen = aj.EventTable("seen", time="at", entities=[customer])
    # inclusive table: visible when known time <= T
    signup = aj.EventTable("signup", time="at", entities=[customer], inclusive=True)
    # known-at table: visible once loaded, whatever the valid time
    loaded = aj.EventTable("loaded", time="at", known_at="loaded_at", entities=[customer])
    # delayed table: visible 1 day after the valid time
    late = aj.EventTable("late", time="at", delay="1d", entities=[customer])
    data = {
        "seen": pd.DataFrame(
            {
                "customer_id": [1, 2, None],
                "at": [day + pd.Timedelta("12h"), day + pd.Timedelta(days=2), day],
            }
        ),
        "signup": pd.DataFrame({"customer_id": [3], "at": [day + pd.Timedelta(days=2)]}),
        "loaded": pd.DataFrame(
            {"customer_id": [4], "at": [day], "loaded_at": [day + pd.Timedelta(days=3)]}
        ),
        "late": pd.DataFrame({"customer_id": [5], "at": [day]}),
    }
    features = [
        aj.Trailing(seen, None, "count", over="30d", name="seen"),
        aj.Trailing(signup, None, "count", over="30d", name="signups"),
        aj.Latest(loaded, ["at"], name="loaded_at_valid"),
        aj.Trailing(late, None, "count", over="30d", name="late"),
    ]
    data["seen"]["customer_id"] = data["seen"]["customer_id"].astype("Int64")
    out = tmp_path / "snap"
    aj.backfill(features, data=data, start=day, end=day + pd.Timedelta(days=4), out=out)
    keys = {
        name: read_partition(out, name)["customer_id"].tolist()
        for name in sorted(p.name for p in out.glob("as_of=*"))
    }
    assert keys == {
        "as_of=2024-01-01": [],  # nothing is known before the first instant
        "as_of=2024-01-02": [1],  # 1 at 12:00 the day before; 5 is known exactly at T
        "as_of=2024-01-03": [1, 3, 5],  # 2 is stamped exactly at T (strict); 3 inclusive
        "as_of=2024-01-04": [1, 2, 3, 5],  # 4 is loaded exactly at T: not yet
        "as_of=2024-01-05": [1, 2, 3, 4, 5],
    }
    last = read_partition(out, "as_of=2024-01-05").set_index("customer_id")
    assert last.loc[4, "loaded_at_valid"] == day
    assert last["seen"].tolist() == [1, 1, 0, 0, 0]
    empty = pq.read_table(out / "as_of=2024-01-01" / "part-0.parquet")
    assert empty.num_rows == 0
    assert empty.column_names == ["customer_id", "seen", "signups", "loaded_at_valid", "late"]


def test_population_frame_gives_every_key_at_every_time(
    nursery: dict[str, pa.Table], tmp_path: Path
) -> None:
    keys = [3, 1, 2, 1, 99_999]  # duplicates dropped; 99999 has no rows at all
    population = pl.DataFrame({"customer_id": keys, "ignored": list(range(len(keys)))})
    out = tmp_path / "snap"
    aj.backfill(
        FEATURES, data=nursery, start="2023-01-01", end="2023-01-03", out=out, population=population
    )
    times = pd.date_range("2023-01-01", "2023-01-03", freq="D")
    spine = pd.DataFrame(
        [(k, t) for t in times for k in (1, 2, 3, 99_999)], columns=["customer_id", "as_of"]
    )
    want = explicit_build(FEATURES, nursery, spine)
    for t in times:
        got = read_partition(out, f"as_of={t.date()}")
        assert got["customer_id"].tolist() == [1, 2, 3, 99_999]
        assert_frames_equal(got, want[want["as_of"] == t].drop(columns="as_of"))
    row = got.set_index("customer_id").loc[99_999]
    assert row["orders_365d"] == 0 and row["views_7d"] == 0 and pd.isna(row["tier"])
    manifest = json.loads((out / MANIFEST).read_text())
    assert manifest["population"]["keys"] == 4

    # The population is part of the fingerprint: another population is another folder.
    with pytest.raises(aj.InputError, match="fingerprint"):
        aj.backfill(
            FEATURES,
            data=nursery,
            start="2023-01-01",
            end="2023-01-03",
            out=out,
            population=population.head(2),
        )
    # ... and a population read from a file gives the same fingerprint as the frame.
    path = tmp_path / "population.parquet"
    population.write_parquet(path)
    again = aj.backfill(
        FEATURES, data=nursery, start="2023-01-01", end="2023-01-03", out=out, population=str(path)
    )
    assert again.written == ()


def test_population_errors(nursery: dict[str, pa.Table], tmp_path: Path) -> None:
    kw: dict[str, Any] = {"data": nursery, "start": "2023-01-01", "end": "2023-01-02"}
    with pytest.raises(aj.ColumnNotFoundError, match=re.escape("'customer_id'")):
        aj.backfill(FEATURES, out=tmp_path / "a", population=pd.DataFrame({"id": [1]}), **kw)
    with pytest.raises(aj.InputError, match=r"1 row.*null key"):
        aj.backfill(
            FEATURES,
            out=tmp_path / "b",
            population=pd.DataFrame({"customer_id": [1.0, None]}),
            **kw,
        )
    assert not (tmp_path / "a" / MANIFEST).exists()


def test_sub_day_grid_names_parse_back(nursery: dict[str, pa.Table], tmp_path: Path) -> None:
    out = tmp_path / "snap"
    result = aj.backfill(
        FEATURES[:1],
        data=nursery,
        start="2023-01-01T03:00",
        every="6h",
        end="2023-01-02T05:00",
        out=out,
    )
    assert result.written == tuple(
        f"as_of=2023-01-{d}T{h}%3A00%3A00"
        for d, h in [("01", "03"), ("01", "09"), ("01", "15"), ("01", "21"), ("02", "03")]
    )
    assert [partition_time(n) for n in result.written][-1] == dt.datetime(2023, 1, 2, 3)
    got = duckdb.sql(
        f"SELECT DISTINCT CAST(as_of AS TIMESTAMP) AS t FROM read_parquet("
        f"'{out}/*/*.parquet', hive_partitioning = true) ORDER BY t"
    ).fetchall()
    assert [r[0] for r in got] == [partition_time(n) for n in result.written]
    frame = pl.read_parquet(f"{out}/*/*.parquet", hive_partitioning=True)
    assert sorted(frame["as_of"].unique().to_list()) == [partition_time(n) for n in result.written]


def test_aware_grid_is_named_in_utc(nursery: dict[str, pa.Table], tmp_path: Path) -> None:
    aware = {
        name: table.cast(
            pa.schema(
                [
                    pa.field(f.name, pa.timestamp("us", tz="UTC"))
                    if pa.types.is_timestamp(f.type)
                    else f
                    for f in table.schema
                ]
            )
        )
        for name, table in nursery.items()
    }
    start = dt.datetime(2023, 1, 1, 1, tzinfo=dt.timezone(dt.timedelta(hours=1)))  # 00:00 UTC
    out = tmp_path / "snap"
    result = aj.backfill(FEATURES, data=aware, start=start, end="2023-01-03T00:00Z", out=out)
    assert result.written == ("as_of=2023-01-01", "as_of=2023-01-02", "as_of=2023-01-03")
    naive = tmp_path / "naive"
    aj.backfill(FEATURES, data=nursery, start="2023-01-01", end="2023-01-03", out=naive)
    for name in result.written:
        assert_frames_equal(read_partition(out, name), read_partition(naive, name))
    twelve = aj.backfill(
        FEATURES[:1],
        data=aware,
        start=start,
        every="12h",
        end="2023-01-01T12:00Z",
        out=tmp_path / "12h",
    )
    assert twelve.written[-1] == "as_of=2023-01-01T12%3A00%3A00Z"
    with pytest.raises(aj.TimeTypeError, match="timezone"):
        aj.backfill(
            FEATURES, data=aware, start="2023-01-01", end="2023-01-02", out=tmp_path / "mixed"
        )


def test_readable_as_hive_partitions(nursery: dict[str, pa.Table], tmp_path: Path) -> None:
    out = tmp_path / "snap"
    result = aj.backfill(FEATURES, data=nursery, start="2023-02-01", end="2023-02-05", out=out)
    parts = {partition_time(n).date(): read_partition(out, n) for n in result.written}
    total = sum(len(p) for p in parts.values())

    con = duckdb.connect()
    rel = con.sql(f"SELECT * FROM read_parquet('{out}/*/*.parquet', hive_partitioning = true)")
    assert dict(zip(rel.columns, rel.types, strict=True))["as_of"] == "DATE"
    got = rel.df()
    got["as_of"] = pd.to_datetime(got["as_of"])
    assert len(got) == total
    frame = pl.read_parquet(f"{out}/*/*.parquet", hive_partitioning=True)
    assert frame.schema["as_of"] == pl.Date and frame.height == total
    table = ds.dataset(out, format="parquet", partitioning="hive").to_table()
    assert table.num_rows == total  # _manifest.json and the dot files are ignored
    arrow = table.to_pandas()
    arrow["as_of"] = arrow["as_of"].astype(str)
    for day, want in parts.items():
        for rows in (
            got[got["as_of"] == pd.Timestamp(day)],
            frame.filter(pl.col("as_of") == day).to_pandas(),
            arrow[arrow["as_of"] == day.isoformat()],
        ):
            rows = rows.drop(columns="as_of").sort_values("customer_id")
            assert_frames_equal(rows[want.columns.tolist()], want)
    meta = pq.read_schema(out / result.written[0] / "part-0.parquet").metadata
    assert meta[b"asof_join.fingerprint"].decode() == result.fingerprint
    assert meta[b"asof_join.as_of"] == b"2023-02-01T00:00:00"


# --- incremental runs --------------------------------------------------------------------------


def test_rerun_is_a_no_op_and_extension_writes_only_new(
    nursery: dict[str, pa.Table], tmp_path: Path
) -> None:
    out = tmp_path / "snap"
    kw: dict[str, Any] = {"data": nursery, "out": out, "start": "2023-01-01"}
    first = aj.backfill(FEATURES, end="2023-01-05", **kw)
    before = snapshot(out)
    time.sleep(0.01)
    again = aj.backfill(FEATURES, end="2023-01-05", **kw)
    assert again.written == () and again.rows == 0
    assert again.skipped == first.written
    assert snapshot(out) == before  # same bytes, same mtimes: nothing touched

    longer = aj.backfill(FEATURES, end="2023-01-08", **kw)
    assert longer.written == ("as_of=2023-01-06", "as_of=2023-01-07", "as_of=2023-01-08")
    after = snapshot(out)
    for name, (data, mtime) in before.items():
        if name != MANIFEST:
            assert after[name] == (data, mtime)
    manifest = json.loads((out / MANIFEST).read_text())
    assert manifest["grid"] == {
        "start": "2023-01-01T00:00:00",
        "end": "2023-01-08T00:00:00",
        "every": "1d",
        "timezone_aware": False,
    }
    assert sorted(manifest["partitions"]) == sorted(first.written + longer.written)
    assert manifest["inflight"] is None

    # an earlier start on the same grid fills in; a shorter range skips everything
    earlier = aj.backfill(FEATURES, data=nursery, out=out, start="2022-12-30", end="2023-01-02")
    assert earlier.written == ("as_of=2022-12-30", "as_of=2022-12-31")
    # a partition deleted by hand is written again
    (out / "as_of=2023-01-03" / "part-0.parquet").unlink()
    redo = aj.backfill(FEATURES, data=nursery, out=out, start="2023-01-03", end="2023-01-04")
    assert redo.written == ("as_of=2023-01-03",)
    assert_frames_equal(
        read_partition(out, "as_of=2023-01-03"),
        pq.read_table(pa.BufferReader(before["as_of=2023-01-03/part-0.parquet"][0])).to_pandas(),
    )


def test_fingerprint_mismatch_and_overwrite(nursery: dict[str, pa.Table], tmp_path: Path) -> None:
    out = tmp_path / "snap"
    kw: dict[str, Any] = {"data": nursery, "out": out}
    first = aj.backfill(FEATURES, start="2023-01-01", end="2023-01-04", **kw)
    before = snapshot(out)
    other = FEATURES[:3]
    with pytest.raises(aj.InputError, match=re.escape(first.fingerprint)) as err:
        aj.backfill(other, start="2023-01-01", end="2023-01-04", **kw)
    assert "overwrite=True" in str(err.value) and str(out) in str(err.value)
    with pytest.raises(aj.InputError, match="grid every 1d"):
        aj.backfill(FEATURES, start="2023-01-01T06:00", end="2023-01-04", **kw)
    with pytest.raises(aj.InputError, match="grid every 1d"):
        aj.backfill(FEATURES, start="2023-01-01", end="2023-01-04", every="12h", **kw)
    assert snapshot(out) == before  # refused runs change nothing

    new = aj.backfill(other, start="2023-01-03", end="2023-01-05", overwrite=True, **kw)
    assert new.fingerprint != first.fingerprint
    assert new.written == ("as_of=2023-01-03", "as_of=2023-01-04", "as_of=2023-01-05")
    assert sorted(p.name for p in out.glob("as_of=*")) == list(new.written)
    manifest = json.loads((out / MANIFEST).read_text())
    assert manifest["fingerprint"] == new.fingerprint
    assert manifest["grid"]["start"] == "2023-01-03T00:00:00"
    for name in new.written:
        meta = pq.read_schema(out / name / "part-0.parquet").metadata
        assert meta[b"asof_join.fingerprint"].decode() == new.fingerprint
        assert read_partition(out, name).columns.tolist() == [
            "customer_id",
            "tier",
            "region",
            "spend_30d",
            "orders_365d",
        ]
    assert aj.backfill(other, start="2023-01-03", end="2023-01-05", **kw).written == ()


def test_foreign_partitions_without_manifest(nursery: dict[str, pa.Table], tmp_path: Path) -> None:
    out = tmp_path / "snap"
    aj.backfill(FEATURES, data=nursery, start="2023-01-01", end="2023-01-02", out=out)
    (out / MANIFEST).unlink()
    # partitions of the same spec are adopted from their file metadata ...
    again = aj.backfill(FEATURES, data=nursery, start="2023-01-01", end="2023-01-03", out=out)
    assert again.written == ("as_of=2023-01-03",)
    (out / MANIFEST).unlink()
    # ... those of another spec are refused
    with pytest.raises(aj.InputError, match="no manifest"):
        aj.backfill(FEATURES[:1], data=nursery, start="2023-01-01", end="2023-01-03", out=out)


def test_spec_errors(nursery: dict[str, pa.Table], tmp_path: Path) -> None:
    kw: dict[str, Any] = {"data": nursery, "out": tmp_path / "x"}
    mixed = [FEATURES[0], aj.Trailing(views, None, "count", over="7d", name="v")]
    with pytest.raises(aj.SpecError, match=r"keyed by \['customer'\] but .* by \['customer', "):
        aj.backfill(mixed, start="2023-01-01", end="2023-01-02", **kw)
    with pytest.raises(aj.SpecError, match="before start"):
        aj.backfill(FEATURES, start="2023-01-02", end="2023-01-01", **kw)
    with pytest.raises(aj.SpecError, match="every"):
        aj.backfill(FEATURES, start="2023-01-01", end="2023-01-02", every="0s", **kw)
    with pytest.raises(aj.SpecError, match="not a time"):
        aj.backfill(FEATURES, start="soon", end="2023-01-02", **kw)
    with pytest.raises(aj.SpecError, match="at least one feature"):
        aj.backfill([], start="2023-01-01", end="2023-01-02", **kw)
    clash = [aj.Latest(orders, ["ordered_at"], name="as_of", entity=customer)]
    with pytest.raises(aj.SpecError, match="as_of"):
        aj.backfill(clash, start="2023-01-01", end="2023-01-02", **kw)
    typo = {**nursery, "profile": nursery["profiles"]}
    del typo["profiles"]
    with pytest.raises(aj.UnknownTableError, match=r"\['profiles'\].*\['profile'\] bound too"):
        aj.backfill(
            FEATURES,
            data=typo,
            start="2023-01-01",
            end="2023-01-02",
            out=tmp_path / "y",
        )
    assert not (tmp_path / "y" / MANIFEST).exists()


def test_progress_bar_on_request(
    nursery: dict[str, pa.Table], tmp_path: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    aj.backfill(
        FEATURES[:1],
        data=nursery,
        start="2023-01-01",
        end="2023-01-03",
        out=tmp_path / "a",
        progress=True,
    )
    assert "3/3" in capsys.readouterr().err
    aj.backfill(
        FEATURES[:1], data=nursery, start="2023-01-01", end="2023-01-03", out=tmp_path / "b"
    )  # not a terminal: quiet
    assert capsys.readouterr().err == ""


# --- crashes and concurrent runs -------------------------------------------------------------

RUNNER = textwrap.dedent(
    """
    import sys
    import asof_join as aj
    files, out, end = sys.argv[1:4]
    data = {n: f"{files}/{n}.parquet" for n in ("profiles", "orders", "views", "returns")}
    aj.backfill(aj.load_spec(f"{files}/spec.yaml"), data=data, start="2023-01-01", end=end,
                out=out, chunk=7, threads=1, wait=len(sys.argv) > 4)
    """
)
CRASH_END = "2023-02-04"  # 35 partitions in 5 chunks of 7
TABLES = ("profiles", "orders", "views", "returns")


def start_runner(
    files: Path, out: Path, *, sleep: float, wait: bool = False
) -> subprocess.Popen[bytes]:
    """backfill() in a child process; SLEEP_ENV pauses it around each partition's rename."""
    env = {**os.environ, SLEEP_ENV: str(sleep)}
    argv = [sys.executable, "-c", RUNNER, str(files), str(out), CRASH_END]
    return subprocess.Popen(
        argv + (["wait"] if wait else []), env=env, stdout=subprocess.PIPE, stderr=subprocess.PIPE
    )


def reference_run(files: Path, out: Path) -> dict[str, bytes]:
    data = {n: str(files / f"{n}.parquet") for n in TABLES}
    aj.backfill(
        aj.load_spec(files / "spec.yaml"),
        data=data,
        start="2023-01-01",
        end=CRASH_END,
        out=out,
        chunk=7,
        threads=1,
    )
    return contents(out)


@pytest.mark.slow
def test_killed_runs_end_with_the_files_of_an_uninterrupted_run(
    nursery_files: Path, tmp_path: Path
) -> None:
    want = reference_run(nursery_files, tmp_path / "reference")
    assert len([k for k in want if k.endswith(".parquet")]) == 35
    rng = random.Random(20240531)
    kills = 0
    for trial in range(4):
        out = tmp_path / f"run{trial}"
        finished = False
        for _kill in range(2):  # up to two kills at random moments, then a run to the end
            # 35 partitions x 2 pauses x 0.05 s keep a run longer than any kill delay below
            proc = start_runner(nursery_files, out, sleep=0.05)
            try:
                proc.wait(timeout=rng.uniform(0.8, 2.5))
            except subprocess.TimeoutExpired:
                proc.send_signal(signal.SIGKILL)
                proc.wait()
                kills += 1
                # between runs a reader sees only whole partitions
                for part in out.glob("as_of=*/*"):
                    assert part.name == "part-0.parquet"
                    pq.read_metadata(part)
            else:
                assert proc.returncode == 0, proc.stderr.read().decode()  # type: ignore[union-attr]
                finished = True
                break
        if not finished:
            proc = start_runner(nursery_files, out, sleep=0)
            assert proc.wait(timeout=60) == 0, proc.stderr.read().decode()  # type: ignore[union-attr]
        assert contents(out) == want
        assert not list(out.glob(".tmp-*"))
    assert kills >= 4  # the kills did land mid-run


@pytest.mark.slow
def test_a_second_run_on_the_same_folder_fails_or_waits(
    nursery_files: Path, tmp_path: Path
) -> None:
    out = tmp_path / "snap"
    first = start_runner(nursery_files, out, sleep=0.05)
    deadline = time.monotonic() + 30
    while not (out / MANIFEST).exists():  # the first run holds the lock by then
        assert time.monotonic() < deadline and first.poll() is None
        time.sleep(0.05)
    data = {n: str(nursery_files / f"{n}.parquet") for n in TABLES}
    spec = aj.load_spec(nursery_files / "spec.yaml")
    kw: dict[str, Any] = {"data": data, "start": "2023-01-01", "end": CRASH_END, "out": out}
    with pytest.raises(aj.InputError, match=f"pid {first.pid}.*{re.escape(str(out))}"):
        aj.backfill(spec, chunk=7, **kw)
    second = aj.backfill(spec, chunk=7, wait=True, **kw)  # queues behind the first run
    assert first.wait(timeout=60) == 0
    assert second.written == ()  # the first run wrote everything
    assert contents(out) == reference_run(nursery_files, tmp_path / "reference")


def test_lock_holder_pid_in_message(nursery: dict[str, pa.Table], tmp_path: Path) -> None:
    out = tmp_path / "snap"
    out.mkdir()
    with open(out / LOCK, "w") as fh:
        fcntl.flock(fh, fcntl.LOCK_EX)
        fh.write("4242\n")
        fh.flush()
        with pytest.raises(aj.InputError, match="pid 4242"):
            aj.backfill(FEATURES, data=nursery, start="2023-01-01", end="2023-01-02", out=out)
    assert aj.backfill(
        FEATURES, data=nursery, start="2023-01-01", end="2023-01-02", out=out
    ).written


def test_stale_scratch_and_empty_partition_folders_are_cleaned(
    nursery: dict[str, pa.Table], tmp_path: Path
) -> None:
    out = tmp_path / "snap"
    aj.backfill(FEATURES, data=nursery, start="2023-01-01", end="2023-01-02", out=out)
    want = contents(out)
    (out / ".tmp-dead").mkdir()
    (out / ".tmp-dead" / "part-3.partial").write_bytes(b"half a file")
    (out / "as_of=2023-01-03").mkdir()  # a run killed between mkdir and rename
    result = aj.backfill(FEATURES, data=nursery, start="2023-01-01", end="2023-01-02", out=out)
    assert result.written == ()
    assert contents(out) == want
    assert sorted(p.name for p in out.iterdir()) == [
        LOCK,
        MANIFEST,
        "as_of=2023-01-01",
        "as_of=2023-01-02",
    ]


# --- command line ------------------------------------------------------------------------------


def test_cli_backfill(
    nursery_files: Path, tmp_path: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    doc = {
        "version": 1,
        "entities": {"customer": ["customer_id"], "plant": ["plant_id"]},
        "tables": {
            "orders": {
                "time": "ordered_at",
                "entities": ["customer", "plant"],
                "path": str(nursery_files / "orders.parquet"),
            },
            "profiles": {
                "time": "updated_at",
                "known_at": "loaded_at",
                "entities": ["customer"],
                "path": str(nursery_files / "profiles.parquet"),
            },
        },
        "labels": "orders",
        "features": [
            {"latest": "profiles", "columns": ["tier"]},
            {
                "trailing": "orders",
                "agg": "count",
                "over": "30d",
                "entity": "customer",
                "name": "orders_30d",
            },
        ],
    }
    spec_path = tmp_path / "spec.yaml"
    spec_path.write_text(yaml.safe_dump(doc))
    pd.DataFrame({"customer_id": [1, 2, 3]}).to_parquet(tmp_path / "pop.parquet")
    out = tmp_path / "snap"
    argv = [
        "backfill",
        str(spec_path),
        "--start",
        "2023-01-01",
        "--end",
        "2023-01-03",
        "-o",
        str(out),
        "--population",
        str(tmp_path / "pop.parquet"),
    ]
    assert main(argv) == 0
    printed = capsys.readouterr()
    assert "wrote 3 partition(s), 9 rows" in printed.out
    assert read_partition(out, "as_of=2023-01-03").columns.tolist() == [
        "customer_id",
        "tier",
        "orders_30d",
    ]
    assert main(argv) == 0
    assert "wrote 0 partition(s)" in capsys.readouterr().out
    doc["features"] = doc["features"][:1]
    spec_path.write_text(yaml.safe_dump(doc))
    assert main(argv) == 2
    err = capsys.readouterr().err
    assert err.startswith("asof-join: error: ") and "fingerprint" in err and err.count("\n") == 1
    assert main([*argv, "--overwrite"]) == 0
    assert np.array_equal(read_partition(out, "as_of=2023-01-01")["customer_id"], [1, 2, 3])
