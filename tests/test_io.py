"""Every input kind gives the same result; every output kind carries the same values and types."""

from __future__ import annotations

from pathlib import Path

import duckdb
import pandas as pd
import polars as pl
import pyarrow as pa
import pyarrow.parquet as pq
import pytest

import asof_join as aj
from asof_join.demo import make_demo_data
from tests.compare import assert_frames_match

SPEC = aj.load_spec(Path(__file__).parent / "fixtures" / "specs" / "nursery.yaml")


@pytest.fixture(scope="module")
def demo() -> dict[str, pa.Table]:
    data = make_demo_data(n_orders=2_000, seed=3)
    return {name: table for name, table in data.items() if name in SPEC.tables()}


@pytest.fixture(scope="module")
def expected(demo: dict[str, pa.Table]) -> pd.DataFrame:
    return aj.build(SPEC, data=demo).to_pandas()


def _as(kind: str, table: pa.Table, tmp: Path, name: str) -> object:
    if kind == "pandas":
        return table.to_pandas()
    if kind == "polars":
        return pl.from_arrow(table)
    if kind == "polars_lazy":
        frame = pl.from_arrow(table)
        assert isinstance(frame, pl.DataFrame)
        return frame.lazy()
    if kind == "arrow":
        return table
    if kind == "duckdb":
        return duckdb.from_arrow(table)
    if kind == "parquet":
        path = tmp / f"{name}.parquet"
        pq.write_table(table, path)
        return str(path)
    if kind == "parquet_glob":
        folder = tmp / name
        folder.mkdir()
        half = table.num_rows // 2
        pq.write_table(table.slice(0, half), folder / "part-0.parquet")
        pq.write_table(table.slice(half), folder / "part-1.parquet")
        return str(folder / "*.parquet")
    if kind == "csv":
        path = tmp / f"{name}.csv"
        table.to_pandas().to_csv(path, index=False)
        return path
    raise AssertionError(kind)


@pytest.mark.parametrize(
    "kind",
    ["pandas", "polars", "polars_lazy", "arrow", "duckdb", "parquet", "parquet_glob", "csv"],
)
def test_every_input_kind_gives_the_same_result(
    kind: str, demo: dict[str, pa.Table], expected: pd.DataFrame, tmp_path: Path
) -> None:
    data = {name: _as(kind, table, tmp_path, name) for name, table in demo.items()}
    got = aj.build(SPEC, data=data).to_pandas()
    assert_frames_match(got, expected)


def test_every_output_kind_agrees(demo: dict[str, pa.Table], tmp_path: Path) -> None:
    ts = aj.build(SPEC, data=demo)
    arrow = ts.to_arrow()
    pandas = ts.to_pandas()
    polars = ts.to_polars()
    ts.write_parquet(tmp_path / "train.parquet")
    ts.write_csv(tmp_path / "train.csv")
    from_file = pq.read_table(tmp_path / "train.parquet")
    assert len(ts) == arrow.num_rows == len(pandas) == polars.height == from_file.num_rows
    assert arrow.column_names == ts.columns == list(pandas.columns) == polars.columns
    assert_frames_match(polars.to_pandas(), pandas)
    assert_frames_match(from_file.to_pandas(), pandas)
    csv = pd.read_csv(tmp_path / "train.csv", parse_dates=["ordered_at"])
    assert list(csv.columns) == ts.columns
    assert len(csv) == len(pandas)
    meta = pq.read_schema(tmp_path / "train.parquet").metadata
    assert meta[b"asof_join.fingerprint"].decode() == SPEC.fingerprint()
    assert arrow.schema.metadata[b"asof_join.fingerprint"].decode() == SPEC.fingerprint()


def test_label_columns_keep_value_and_type() -> None:
    """int8 stays int8, a zone-aware time keeps its zone, dates stay dates, order kept."""
    who = aj.Entity("customer", keys=["customer_id"])
    labels = aj.EventTable("orders", time="ordered_at", entities=[who])
    tiers = aj.EventTable("tiers", time="changed_at", entities=[who])
    spec = aj.TrainingSetSpec(labels=labels, features=[aj.Latest(tiers, ["tier"])])
    orders = pa.table(
        {
            "customer_id": pa.array([3, 1, 3, 1], pa.int8()),
            "ordered_at": pa.array(
                pd.to_datetime(
                    ["2024-05-02", "2024-05-01", "2024-05-01", "2024-05-03"]
                ).tz_localize("Europe/Paris"),
                pa.timestamp("us", tz="Europe/Paris"),
            ),
            "ship_day": pa.array(pd.to_datetime(["2024-05-04"] * 4).date, pa.date32()),
            "note": pa.array(["a", None, "c", "d"], pa.large_string()),
        }
    )
    changes = pa.table(
        {
            "customer_id": pa.array([1, 3], pa.int64()),
            "changed_at": pa.array(
                pd.to_datetime(["2024-04-30 20:00", "2024-05-01 12:00"]).tz_localize("UTC"),
                pa.timestamp("ns", tz="UTC"),
            ),
            "tier": ["seed", "bloom"],
        }
    )
    out = aj.build(spec, data={"orders": orders, "tiers": changes}).to_arrow()
    assert out.select(orders.column_names).cast(orders.schema).equals(orders)
    assert out.schema.field("ordered_at").type == pa.timestamp("us", tz="Europe/Paris")
    assert out.schema.field("customer_id").type == pa.int8()
    assert out.schema.field("ship_day").type == pa.date32()
    # 2024-05-02 00:00 Paris = 05-01 22:00 UTC, after 05-01 12:00 UTC; 05-01 00:00 Paris is
    # 04-30 22:00 UTC, before customer 3's change
    assert out["tier"].to_pylist() == ["bloom", "seed", None, "seed"]


def test_memory_limit_spills_and_matches(demo: dict[str, pa.Table], tmp_path: Path) -> None:
    expected = aj.build(SPEC, data=demo).to_pandas()
    ts = aj.build(SPEC, data=demo, memory_limit="64MB", temp_dir=tmp_path / "spill", threads=1)
    assert_frames_match(ts.to_pandas(), expected)


def test_duplicate_label_rows_are_kept_in_order() -> None:
    who = aj.Entity("customer", keys=["customer_id"])
    labels = aj.EventTable("orders", time="t", entities=[who])
    tiers = aj.EventTable("tiers", time="t", entities=[who])
    spec = aj.TrainingSetSpec(labels=labels, features=[aj.Latest(tiers, ["tier"])])
    t = pd.to_datetime(["2024-01-02"] * 3 + ["2024-01-01"])
    orders = pd.DataFrame({"customer_id": [1, 1, 2, 1], "t": t, "i": [0, 1, 2, 3]})
    src = pd.DataFrame({"customer_id": [1], "t": pd.to_datetime(["2024-01-01"]), "tier": ["x"]})
    out = aj.build(spec, data={"orders": orders, "tiers": src}).to_pandas()
    assert out["i"].tolist() == [0, 1, 2, 3]
    assert out["tier"].tolist()[:2] == ["x", "x"] and out["tier"].isna().tolist()[2:] == [True] * 2
