"""Tests for the invented nursery data, the packaged demo spec and the naive-join comparison."""

from __future__ import annotations

import datetime as dt
from importlib import resources
from pathlib import Path

import numpy as np
import pandas as pd
import pyarrow as pa
import pyarrow.parquet as pq
import pytest

import asof_join as aj
from asof_join.demo import (
    END,
    REGIONS,
    START,
    TIERS,
    NaiveLeak,
    make_demo_data,
    naive_leak_count,
    write_demo_data,
)
from tests.oracle import is_null, oracle_build

N = 4_000


@pytest.fixture(scope="module")
def tables() -> dict[str, pa.Table]:
    return make_demo_data(N, seed=3)


@pytest.fixture(scope="module")
def frames(tables: dict[str, pa.Table]) -> dict[str, pd.DataFrame]:
    return {name: t.to_pandas() for name, t in tables.items()}


def nursery_spec() -> aj.TrainingSetSpec:
    with resources.as_file(resources.files("asof_join") / "specs" / "nursery.yaml") as path:
        return aj.load_spec(path)


def test_same_seed_same_tables_other_seed_other_tables() -> None:
    first, again, other = make_demo_data(500, seed=11), make_demo_data(500, 11), make_demo_data(500)
    assert list(first) == list(again)
    assert all(first[name].equals(again[name]) for name in first)
    assert not first["orders"].equals(other["orders"])


def test_schemas(tables: dict[str, pa.Table]) -> None:
    ts, i64, f64, s = pa.timestamp("us"), pa.int64(), pa.float64(), pa.string()
    expected = {
        "customers": {"customer_id": i64, "joined_at": ts},
        "orders": {
            "order_id": i64,
            "customer_id": i64,
            "plant_id": i64,
            "ordered_at": ts,
            "quantity": i64,
            "amount": f64,
            "returned": pa.bool_(),
        },
        "profiles": {"customer_id": i64, "tier": s, "region": s, "updated_at": ts, "loaded_at": ts},
        "prices": {"plant_id": i64, "effective_at": ts, "price": f64},
        "stock": {"plant_id": i64, "counted_at": ts, "in_stock": i64},
        "views": {"customer_id": i64, "plant_id": i64, "viewed_at": ts},
        "returns": {"order_id": i64, "customer_id": i64, "plant_id": i64, "returned_at": ts},
    }
    got = {name: {f.name: f.type for f in t.schema} for name, t in tables.items()}
    assert got == expected
    assert all(t.column(c).null_count == 0 for t in tables.values() for c in t.column_names)


def test_sizes_grow_with_n_orders(tables: dict[str, pa.Table]) -> None:
    big = make_demo_data(4 * N, seed=3)
    assert tables["orders"].num_rows == N
    assert tables["customers"].num_rows == N // 8
    for name in ("customers", "profiles", "prices", "stock", "views", "returns"):
        ratio = big[name].num_rows / tables[name].num_rows
        assert 3.0 < ratio < 5.0, name
    assert 2.0 < tables["profiles"].num_rows / tables["customers"].num_rows < 4.5
    assert 3.5 * N < tables["views"].num_rows < 6.0 * N


def test_orders(frames: dict[str, pd.DataFrame]) -> None:
    orders, customers = frames["orders"], frames["customers"]
    assert orders["order_id"].is_unique
    assert orders["ordered_at"].is_monotonic_increasing
    assert orders["ordered_at"].min() >= pd.Timestamp(START)
    assert orders["ordered_at"].max() < pd.Timestamp(END)
    joined = orders["customer_id"].map(customers.set_index("customer_id")["joined_at"])
    assert (orders["ordered_at"] >= joined).all()
    assert orders["quantity"].between(1, 6).all()
    assert 0.03 < orders["returned"].mean() < 0.25
    # Spring is the busy season.
    month = orders["ordered_at"].dt.month
    assert month.isin([4, 5]).mean() > 1.5 * month.isin([11, 12]).mean()


def test_amount_is_quantity_times_the_price_then_in_effect(frames: dict[str, pd.DataFrame]) -> None:
    # Reference: pandas merge_asof (backward, exact matches allowed) finds the price in effect.
    orders = frames["orders"]
    prices = frames["prices"].sort_values("effective_at", kind="stable")
    priced = pd.merge_asof(
        orders, prices, left_on="ordered_at", right_on="effective_at", by="plant_id"
    )
    assert priced["price"].notna().all()
    assert np.allclose(priced["amount"], (priced["quantity"] * priced["price"]).round(2))


def test_profiles(frames: dict[str, pd.DataFrame]) -> None:
    profiles, customers = frames["profiles"], frames["customers"]
    assert (profiles["loaded_at"] >= profiles["updated_at"]).all()
    lag = profiles["loaded_at"] - profiles["updated_at"]
    assert pd.Timedelta(hours=2) < lag.median() < pd.Timedelta(hours=12)
    assert set(profiles["tier"]) == set(TIERS)
    assert set(profiles["region"]) <= set(REGIONS)
    assert profiles["loaded_at"].is_monotonic_increasing  # the warehouse's load order
    # Every customer's first profile is stamped when they joined.
    first = profiles.groupby("customer_id")["updated_at"].min()
    assert first.sort_index().equals(
        customers.set_index("customer_id")["joined_at"].sort_index().rename("updated_at")
    )
    # Tiers change over time for many customers.
    assert (profiles.groupby("customer_id")["tier"].nunique() > 1).mean() > 0.2
    # A few late corrections: same customer and valid time, loaded later.
    dupes = profiles.duplicated(["customer_id", "updated_at"], keep=False)
    assert 0 < dupes.sum() < 0.1 * len(profiles)


def test_prices_stock_views_returns(frames: dict[str, pd.DataFrame]) -> None:
    prices, stock, views = frames["prices"], frames["stock"], frames["views"]
    orders, returns = frames["orders"], frames["returns"]
    assert (prices["price"] > 0).all()
    assert (prices.groupby("plant_id")["effective_at"].min() < pd.Timestamp(START)).all()
    assert prices.groupby("plant_id").size().mean() > 2
    assert (stock["in_stock"] >= 0).all()
    assert 0.02 < (stock["in_stock"] == 0).mean() < 0.4
    gaps = stock.sort_values(["plant_id", "counted_at"]).groupby("plant_id")["counted_at"].diff()
    assert gaps.dropna().min() > pd.Timedelta(days=2)
    # Views: many within the hour before an order of the same plant by the same customer.
    before = pd.merge_asof(
        orders[["customer_id", "plant_id", "ordered_at"]],
        views.sort_values("viewed_at", kind="stable"),
        left_on="ordered_at",
        right_on="viewed_at",
        by=["customer_id", "plant_id"],
        allow_exact_matches=False,
    )
    recent = before["ordered_at"] - before["viewed_at"] < pd.Timedelta(hours=1)
    assert recent.mean() > 0.5
    # Returns are exactly the returned orders, 2 to 30 days after the order.
    assert set(returns["order_id"]) == set(orders.loc[orders["returned"], "order_id"])
    back = returns.merge(orders, on=["order_id", "customer_id", "plant_id"])
    delay = back["returned_at"] - back["ordered_at"]
    assert len(back) == len(returns)
    assert delay.between(pd.Timedelta(days=2), pd.Timedelta(days=30)).all()


def test_returned_depends_on_what_was_known() -> None:
    tables = make_demo_data(20_000, seed=5)
    orders, profiles = tables["orders"].to_pandas(), tables["profiles"].to_pandas()
    # Tier in effect at the order (pandas merge_asof on valid time, the reference here).
    tiers = pd.merge_asof(
        orders,
        profiles.sort_values("updated_at", kind="stable"),
        left_on="ordered_at",
        right_on="updated_at",
        by="customer_id",
    )
    rate = tiers.groupby("tier")["returned"].mean()
    assert rate["seed"] > rate["evergreen"] + 0.02
    # Past returns predict the next: customers' earlier return share vs. the rest.
    orders["earlier_returns"] = orders.groupby("customer_id")["returned"].cumsum() - orders[
        "returned"
    ].astype(int)
    has_history = orders.groupby("customer_id").cumcount() > 0
    with_returns = orders.loc[has_history & (orders["earlier_returns"] > 0), "returned"].mean()
    without = orders.loc[has_history & (orders["earlier_returns"] == 0), "returned"].mean()
    assert with_returns > without + 0.03


def test_write_demo_data(tmp_path: Path) -> None:
    paths = write_demo_data(tmp_path / "nursery", 600, seed=2)
    tables = make_demo_data(600, seed=2)
    assert sorted(paths) == sorted(tables)
    for name, path in paths.items():
        assert path == tmp_path / "nursery" / f"{name}.parquet"
        assert pq.read_table(path).equals(tables[name])


def test_bad_size() -> None:
    with pytest.raises(ValueError, match="n_orders must be at least 1"):
        make_demo_data(0)


def test_nursery_spec_loads() -> None:
    spec = nursery_spec()
    assert spec.labels.name == "orders"
    assert all(t.path is None for t in spec.tables().values())
    assert spec.tables()["profiles"].known_at == "loaded_at"
    assert spec.tables()["prices"].delay == dt.timedelta(hours=1)
    assert spec.output_columns() == [
        "tier",
        "region",
        "plant_price",
        "in_stock",
        "views_7d",
        "spend_30d",
        "orders_365d",
        "returns_180d",
    ]


def test_nursery_build_matches_oracle() -> None:
    # Reference: tests/oracle.py, the brute-force reading of CONTRACT.md's semantics.
    spec = nursery_spec()
    tables = make_demo_data(300, seed=4)
    data = {name: tables[name] for name in spec.tables()}
    got = aj.build(spec, data=data).to_pandas()
    want = oracle_build(spec, {name: t.to_pandas() for name, t in data.items()})
    assert list(got.columns) == list(want.columns)
    for name in spec.output_columns():
        for a, b in zip(got[name], want[name], strict=True):
            assert (is_null(a) and is_null(b)) or a == pytest.approx(b), name


def test_naive_leak_count_by_hand() -> None:
    user = aj.Entity("user", keys=["user_id"])
    clicks = aj.EventTable("clicks", time="t", entities=[user])
    plans = aj.EventTable("plans", time="t", known_at="k", entities=[user])
    spec = aj.TrainingSetSpec(
        labels=clicks, features=[aj.Latest(plans, ["plan", "seats"], prefix="p_")]
    )
    day = [dt.datetime(2024, 1, d) for d in range(1, 8)]
    labels = pa.table({"user_id": [1, 1, 2, 3], "t": [day[1], day[4], day[3], day[2]]})
    rows = pa.table(
        {
            "user_id": [1, 1, 1, 2],
            "t": [day[0], day[3], day[3], day[0]],
            "k": [day[0], day[3], day[5], day[0]],  # user 1's day-4 row was corrected on day 6
            "plan": ["free", "pro", "team", "free"],
            "seats": [1, 5, 5, 1],
        }
    )
    train = aj.build(spec, data={"clicks": labels, "plans": rows}).to_arrow()
    # Newest rows overall: user 1 -> the day-6 correction (valid day 4), user 2 -> day 1.
    # From the future: user 1's day-2 label (day 4 >= day 2); the day-5 label sees a valid day-4
    # row, not from the future, but its value ("team", corrected on day 6) differs from the
    # point-in-time value ("pro"). Seats agree there. User 3 has no rows.
    assert naive_leak_count(spec, {"plans": rows}, train) == [
        NaiveLeak("p_plan", from_future=1, differs=2),
        NaiveLeak("p_seats", from_future=1, differs=1),
    ]


def test_naive_leak_count_reads_parquet_paths(tmp_path: Path) -> None:
    spec = nursery_spec()
    paths = write_demo_data(tmp_path, 800, seed=6)
    data = {name: str(paths[name]) for name in spec.tables()}
    train = aj.build(spec, data=data).to_arrow()
    from_paths = naive_leak_count(spec, data, train)
    tables = {name: pq.read_table(path) for name, path in data.items()}
    assert from_paths == naive_leak_count(spec, tables, train)
    assert [leak.feature for leak in from_paths] == ["tier", "region", "plant_price", "in_stock"]
    # The newest stock count is after nearly every order: a naive join reads the future.
    stock = from_paths[-1]
    assert stock.from_future > 0.9 * train.num_rows
    assert all(0 <= leak.differs <= train.num_rows for leak in from_paths)
