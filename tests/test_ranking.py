"""Tests for sample_negatives: point-in-time pools, exclusions, counts, determinism, weights."""

from __future__ import annotations

import datetime as dt
import re
from collections import Counter
from typing import Any

import numpy as np
import pandas as pd
import polars as pl
import pyarrow as pa
import pytest

import asof_join as aj
from asof_join.ranking import NoCandidatesError

T0 = np.datetime64("2024-01-01T00:00:00", "us")
HOUR = np.timedelta64(3_600_000_000, "us")


def _random_case(
    seed: int, n_pos: int = 600, n_items: int = 60, n_users: int = 25
) -> tuple[pd.DataFrame, pd.DataFrame]:
    """Positives and items on a coarse hour grid, so equal times (ties) are common."""
    rng = np.random.default_rng(seed)
    items = pd.DataFrame(
        {
            "item": np.arange(n_items, dtype=np.int64),
            "t": T0 + rng.integers(0, 200, n_items) * HOUR,
        }
    )
    # a few items listed twice: valid from the earliest row
    items = pd.concat([items, items.iloc[:5].assign(t=items["t"].iloc[:5] + 50 * HOUR)])
    users = rng.zipf(1.6, n_pos) % n_users  # a few heavy users who see most items
    positives = pd.DataFrame(
        {
            "user": users.astype(np.int64),
            "item": rng.integers(0, n_items + 5, n_pos).astype(np.int64),  # some not in items
            "t": T0 + rng.integers(0, 240, n_pos) * HOUR,
            "amount": rng.random(n_pos),
        }
    )
    return positives, items


def _pools(
    positives: pd.DataFrame,
    items: pd.DataFrame,
    *,
    popular: bool,
    exclude_seen: bool,
    log: pd.DataFrame | None = None,
) -> list[dict[int, int]]:
    """Brute force: per positive, candidate item -> weight (1, or interactions before t)."""
    log = positives if log is None else log
    valid = items.groupby("item")["t"].min()
    cand, cand_s = valid.index.to_numpy(), valid.to_numpy()
    lu, li, lt = log["user"].to_numpy(), log["item"].to_numpy(), log["t"].to_numpy()
    out = []
    for row in positives.itertuples(index=False):
        ok = (cand_s < np.datetime64(row.t)) & (cand != row.item)
        if exclude_seen:
            seen = li[(lu == row.user) & (lt <= np.datetime64(row.t))]
            ok &= ~np.isin(cand, seen)
        if popular:
            earlier = li[lt < np.datetime64(row.t)]
            weight = (cand[:, None] == earlier[None, :]).sum(axis=1)
        else:
            weight = np.ones(len(cand), dtype=np.int64)
        ok &= weight > 0
        out.append({int(i): int(w) for i, w in zip(cand[ok], weight[ok], strict=True)})
    return out


def _check(out: pd.DataFrame, positives: pd.DataFrame, pools: list[dict[int, int]], k: int) -> None:
    assert (out.groupby("group_id")["label"].sum() == 1).all()
    for g, rows in out.groupby("group_id", sort=True):
        pos = positives.iloc[int(g)]
        first = rows.iloc[0]
        assert first["label"] == 1
        assert first["item"] == pos["item"]
        assert first["amount"] == pos["amount"]
        negs = rows.iloc[1:]
        assert (negs["label"] == 0).all()
        assert (negs["user"] == pos["user"]).all()
        assert (negs["t"] == pos["t"]).all()
        assert negs["amount"].isna().all()
        drawn = negs["item"].astype(np.int64).tolist()
        assert len(set(drawn)) == len(drawn), "duplicate negative in a group"
        assert set(drawn) <= set(pools[int(g)]), f"group {g}: {drawn} outside its pool"
        assert len(drawn) == min(k, len(pools[int(g)]))


@pytest.mark.parametrize("sampler", ["uniform", "popular"])
@pytest.mark.parametrize("exclude_seen", [True, False])
@pytest.mark.parametrize("k", [1, 5, 40])
def test_negatives_respect_time_and_history(sampler: str, exclude_seen: bool, k: int) -> None:
    positives, items = _random_case(seed=k + 7 * exclude_seen)
    out = aj.sample_negatives(
        positives,
        items,
        user="user",
        item="item",
        time="t",
        per_positive=k,
        sampler=sampler,
        exclude_seen=exclude_seen,
        seed=3,
    )
    assert isinstance(out, pd.DataFrame)
    assert list(out.columns) == ["user", "item", "t", "amount", "group_id", "label"]
    pools = _pools(positives, items, popular=sampler == "popular", exclude_seen=exclude_seen)
    _check(out, positives, pools, k)
    # the groups are in the input order, each positive first
    assert out["group_id"].is_monotonic_increasing
    assert out["group_id"].nunique() == len(positives)


def test_fewer_candidates_than_asked_gives_all_of_them() -> None:
    items = pd.DataFrame({"item": [1, 2, 3, 4], "t": [T0, T0, T0 + HOUR, T0 + 5 * HOUR]})
    positives = pd.DataFrame(
        {"user": [1, 1, 2], "item": [1, 2, 9], "t": [T0 + HOUR, T0 + 2 * HOUR, T0 + HOUR]}
    )
    out = aj.sample_negatives(positives, items, user="user", item="item", time="t")
    by_group = out[out["label"] == 0].groupby("group_id")["item"].apply(sorted).to_dict()
    # group 0 at T0+1h: items 1, 2 valid (3 valid *at* T0+1h is not before it); own item 1
    assert by_group[0] == [2]
    # group 1: items 1..3 valid; 1 seen earlier, 2 is its own: only 3
    assert by_group[1] == [3]
    # group 2 (another user, an item not in the table): 1 and 2
    assert by_group[2] == [1, 2]


def test_positive_with_empty_pool_is_kept_alone() -> None:
    items = pd.DataFrame({"item": [1, 2], "t": [T0, T0 + 10 * HOUR]})
    positives = pd.DataFrame({"user": [1, 2], "item": [1, 1], "t": [T0, T0 + 20 * HOUR]})
    out = aj.sample_negatives(positives, items, user="user", item="item", time="t")
    assert out[["group_id", "item", "label"]].values.tolist() == [[0, 1, 1], [1, 1, 1], [1, 2, 0]]


def test_deterministic_per_seed() -> None:
    positives, items = _random_case(seed=1)
    kwargs: dict[str, Any] = {"user": "user", "item": "item", "time": "t", "per_positive": 5}
    a = aj.sample_negatives(positives, items, seed=11, **kwargs)
    b = aj.sample_negatives(positives, items, seed=11, **kwargs)
    c = aj.sample_negatives(positives, items, seed=12, **kwargs)
    pd.testing.assert_frame_equal(a, b)
    assert not a["item"].equals(c["item"])
    # input order of items or positives' other columns does not change the draw
    shuffled = items.sample(frac=1.0, random_state=0)
    d = aj.sample_negatives(positives, shuffled, seed=11, **kwargs)
    pd.testing.assert_frame_equal(a, d)


@pytest.mark.parametrize("sampler", ["uniform", "popular"])
def test_future_interactions_do_not_change_past_draws(sampler: str) -> None:
    positives, items = _random_case(seed=5)
    kwargs: dict[str, Any] = {
        "user": "user",
        "item": "item",
        "time": "t",
        "per_positive": 5,
        "sampler": sampler,
    }
    before = aj.sample_negatives(positives, items, **kwargs)
    # the future: 5,000 interactions on item 7 after every event, by many users
    last = positives["t"].max()
    future = pd.DataFrame(
        {
            "user": np.arange(5_000, dtype=np.int64) % 40,
            "item": np.full(5_000, 7, dtype=np.int64),
            "t": last + HOUR + np.arange(5_000) * np.timedelta64(1, "s"),
            "amount": 1.0,
        }
    )
    after = aj.sample_negatives(pd.concat([positives, future], ignore_index=True), items, **kwargs)
    past = after[after["group_id"] < len(positives)].reset_index(drop=True)
    pd.testing.assert_frame_equal(before, past)
    # and the future is visible to the future groups: item 7 dominates popular draws there
    if sampler == "popular":
        late = after[(after["group_id"] >= len(positives) + 1_000) & (after["label"] == 0)]
        assert (late["item"] == 7).sum() == 0  # the users have seen it (exclude_seen)
        assert len(late) > 0


def test_popular_weights_only_earlier_interactions() -> None:
    # Item 1 is bought at exactly the event time by others; item 2 once, strictly before.
    items = pd.DataFrame({"item": [1, 2, 3], "t": [T0] * 3})
    log = pd.DataFrame(
        {
            "user": [100, 101, 102, 103, 104],
            "item": [2, 1, 1, 1, 1],
            "t": [T0 + HOUR] + [T0 + 5 * HOUR] * 4,
        }
    )
    positives = pd.DataFrame({"user": [1], "item": [3], "t": [T0 + 5 * HOUR]})
    out = aj.sample_negatives(
        positives,
        items,
        user="user",
        item="item",
        time="t",
        sampler="popular",
        interactions=log,
    )
    assert out[out["label"] == 0]["item"].tolist() == [2]


def test_uniform_frequencies_are_uniform() -> None:
    stats = pytest.importorskip("scipy.stats")
    n_items, n_pos = 50, 4_000
    items = pd.DataFrame({"item": np.arange(n_items), "t": [T0] * n_items})
    positives = pd.DataFrame(
        {"user": np.arange(n_pos), "item": np.zeros(n_pos, dtype=np.int64), "t": T0 + HOUR}
    )
    out = aj.sample_negatives(positives, items, user="user", item="item", time="t", per_positive=3)
    drawn = out.loc[out["label"] == 0, "item"]
    assert len(drawn) == 3 * n_pos and (drawn != 0).all()
    counts = np.bincount(drawn, minlength=n_items)[1:]
    assert stats.chisquare(counts).pvalue > 1e-4


def test_popular_frequencies_follow_earlier_counts() -> None:
    stats = pytest.importorskip("scipy.stats")
    items = pd.DataFrame({"item": [1, 2, 3, 4], "t": [T0] * 4})
    weights = {1: 1, 2: 2, 3: 3, 4: 10}
    log = pd.DataFrame(
        {
            "user": -np.arange(sum(weights.values())) - 1,
            "item": [i for i, w in weights.items() for _ in range(w)],
            "t": T0 + HOUR,
        }
    )
    n_pos = 6_000
    positives = pd.DataFrame({"user": np.arange(n_pos), "item": 99, "t": T0 + 2 * HOUR})
    out = aj.sample_negatives(
        positives,
        items,
        user="user",
        item="item",
        time="t",
        per_positive=1,
        sampler="popular",
        interactions=log,
        seed=4,
    )
    drawn = out.loc[out["label"] == 0, "item"]
    counts = np.array([(drawn == i).sum() for i in weights])
    expected = np.array(list(weights.values())) / sum(weights.values()) * n_pos
    assert stats.chisquare(counts, expected).pvalue > 1e-4
    # without replacement: two draws each, the second renormalized over the rest
    out2 = aj.sample_negatives(
        positives.iloc[:2_000],
        items,
        user="user",
        item="item",
        time="t",
        per_positive=2,
        sampler="popular",
        interactions=log,
    )
    pairs = out2[out2["label"] == 0].groupby("group_id")["item"].apply(tuple)
    assert pairs.map(len).eq(2).all() and pairs.map(lambda p: p[0] != p[1]).all()
    # P(first = 4) = 10/16; P(4 among two) = 10/16 + sum_{i != 4} w_i/16 * 10/(16 - w_i)
    p4 = 10 / 16 + sum(w / 16 * 10 / (16 - w) for i, w in weights.items() if i != 4)
    share = pairs.map(lambda p: 4 in p).mean()
    assert abs(share - p4) < 0.04


def test_heavy_user_and_tiny_pools_use_enumeration() -> None:
    # one user who has seen 95 of 100 items: rejection draws rarely succeed
    items = pd.DataFrame({"item": np.arange(100), "t": [T0] * 100})
    history = pd.DataFrame(
        {
            "user": 1,
            "item": np.arange(95),
            "t": T0 + HOUR + np.arange(95) * HOUR,
            "amount": np.arange(95.0),
        }
    )
    out = aj.sample_negatives(
        history, items, user="user", item="item", time="t", per_positive=10, seed=2
    )
    last = out[(out["group_id"] == 94) & (out["label"] == 0)]["item"]
    assert sorted(last) == [95, 96, 97, 98, 99]
    # others bought every item once, early: popularity weights exist for all of them
    others = pd.DataFrame({"user": np.arange(100) + 2, "item": np.arange(100), "t": T0 + HOUR / 2})
    log = pd.concat([history[["user", "item", "t"]], others], ignore_index=True)
    for sampler in ("uniform", "popular"):
        out = aj.sample_negatives(
            history,
            items,
            user="user",
            item="item",
            time="t",
            per_positive=3,
            sampler=sampler,
            interactions=log,
        )
        pools = _pools(history, items, popular=sampler == "popular", exclude_seen=True, log=log)
        assert [len(p) for p in pools[-3:]] == [7, 6, 5]
        _check(out, history, pools, 3)


def test_interactions_log_for_seen() -> None:
    items = pd.DataFrame({"item": [1, 2, 3], "t": [T0] * 3})
    views = pd.DataFrame({"user": [1, 1], "item": [2, 3], "t": [T0 + HOUR, T0 + 3 * HOUR]})
    positives = pd.DataFrame({"user": [1], "item": [1], "t": [T0 + 2 * HOUR]})
    out = aj.sample_negatives(
        positives, items, user="user", item="item", time="t", interactions=views
    )
    assert out[out["label"] == 0]["item"].tolist() == [3]  # 2 viewed before, 3 only after


@pytest.mark.parametrize("kind", ["pandas", "polars", "arrow"])
def test_frame_kinds_and_context(kind: str) -> None:
    positives, items = _random_case(seed=2, n_pos=50)
    positives = positives.assign(session=np.arange(50) + 1000)
    convert = {
        "pandas": lambda f: f,
        "polars": pl.from_pandas,
        "arrow": lambda f: pa.Table.from_pandas(f, preserve_index=False),
    }[kind]
    out = aj.sample_negatives(
        convert(positives),
        convert(items),
        user="user",
        item="item",
        time="t",
        per_positive=3,
        context=["session"],
    )
    expected_type = {"pandas": pd.DataFrame, "polars": pl.DataFrame, "arrow": pa.Table}[kind]
    assert isinstance(out, expected_type)
    frame = out if kind == "pandas" else (out.to_pandas())
    reference = aj.sample_negatives(
        positives, items, user="user", item="item", time="t", per_positive=3, context=["session"]
    )
    pd.testing.assert_frame_equal(frame, reference, check_dtype=False)
    assert frame["session"].notna().all()
    assert (frame.groupby("group_id")["session"].nunique() == 1).all()


def test_label_types_kept() -> None:
    items = pa.table({"sku": ["a", "b", "c"], "listed": [dt.date(2024, 1, 1)] * 3})
    positives = pa.table(
        {
            "who": pa.array(["u1", "u2"]),
            "sku": pa.array(["a", "b"], pa.large_string()),
            "at": pa.array(
                [dt.datetime(2024, 2, 1), dt.datetime(2024, 2, 2)], pa.timestamp("ns", "UTC")
            ),
        }
    )
    with pytest.raises(aj.TimeTypeError, match="timezone-aware"):
        aj.sample_negatives(positives, items, user="who", item="sku", time="at", item_time="listed")
    positives = positives.set_column(
        2, "at", pa.array([dt.datetime(2024, 2, 1), dt.datetime(2024, 2, 2)], pa.timestamp("ns"))
    )
    out = aj.sample_negatives(
        positives, items, user="who", item="sku", time="at", item_time="listed", per_positive=2
    )
    assert out.schema.field("sku").type == pa.large_string()
    assert out.schema.field("at").type == pa.timestamp("ns")
    assert out.num_rows == 6
    assert out.column("label").to_pylist() == [1, 0, 0, 1, 0, 0]


@pytest.mark.parametrize(
    ("kwargs", "error", "text"),
    [
        ({"per_positive": 0}, aj.SpecError, "per_positive must be at least 1"),
        ({"per_positive": 2.5}, aj.SpecError, "per_positive must be an integer"),
        ({"sampler": "pop"}, aj.SpecError, "sampler must be 'uniform' or 'popular'"),
        ({"seed": "x"}, aj.SpecError, "seed must be an integer"),
        ({"user": "usr"}, aj.ColumnNotFoundError, "Did you mean 'user'"),
        ({"item_time": "listed"}, aj.ColumnNotFoundError, "'listed' (its item_time)"),
        ({"label_column": "amount"}, aj.SpecError, "already has a column 'amount'"),
        ({"context": ["nope"]}, aj.ColumnNotFoundError, "'nope'"),
        ({"time": "amount", "item_time": "t"}, aj.TimeTypeError, "not a timestamp or date"),
    ],
)
def test_argument_errors(kwargs: dict[str, Any], error: type[Exception], text: str) -> None:
    positives, items = _random_case(seed=0, n_pos=10)
    args = {"user": "user", "item": "item", "time": "t", **kwargs}
    with pytest.raises(error, match=re.escape(text)):
        aj.sample_negatives(positives, items, **args)


def test_data_errors() -> None:
    positives, items = _random_case(seed=0, n_pos=10)
    kw: dict[str, Any] = {"user": "user", "item": "item", "time": "t"}
    with pytest.raises(aj.InputError, match=re.escape("'user' (its user) has 1 null")):
        aj.sample_negatives(positives.assign(user=[None] + [1] * 9), items, **kw)
    with pytest.raises(aj.NullTimeError, match=re.escape("at rows [2]")):
        bad = positives.assign(t=positives["t"].where(positives.index != 2))
        aj.sample_negatives(bad, items, **kw)
    with pytest.raises(aj.KeyTypeMismatchError, match="item"):
        aj.sample_negatives(positives, items.assign(item=items["item"].astype(str)), **kw)
    with pytest.raises(aj.InputError, match="pandas DataFrame"):
        aj.sample_negatives(positives.to_dict(), items, **kw)


def test_no_candidates_anywhere() -> None:
    positives, items = _random_case(seed=0, n_pos=10)
    late = items.assign(t=positives["t"].max())  # valid *at* the last event: not before it
    with pytest.raises(NoCandidatesError, match="valid strictly before each event"):
        aj.sample_negatives(positives, late, user="user", item="item", time="t")
    with pytest.raises(aj.InputError, match="items is empty"):
        aj.sample_negatives(positives, items.iloc[:0], user="user", item="item", time="t")
    only_own = pd.DataFrame({"item": [1], "t": [T0]})
    with pytest.raises(NoCandidatesError, match="own item"):
        aj.sample_negatives(
            pd.DataFrame({"user": [1], "item": [1], "t": [T0 + HOUR]}),
            only_own,
            user="user",
            item="item",
            time="t",
        )


def test_counts_on_a_larger_case() -> None:
    positives, items = _random_case(seed=9, n_pos=20_000, n_items=2_000, n_users=500)
    out = aj.sample_negatives(
        positives, items, user="user", item="item", time="t", per_positive=10, sampler="popular"
    )
    sizes = out.groupby("group_id").size()
    assert len(sizes) == len(positives)
    assert sizes.max() == 11
    negs = out[out["label"] == 0]
    listed = items.groupby("item")["t"].min()
    assert (listed.reindex(negs["item"]).to_numpy() < negs["t"].to_numpy()).all()
    dup = negs.duplicated(["group_id", "item"]).sum()
    assert dup == 0
    assert Counter(out["label"])[1] == len(positives)


def test_same_time_basket_is_seen() -> None:
    # one basket: items 1 and 2 bought at the same instant; neither is the other's negative
    items = pd.DataFrame({"item": [1, 2, 3], "t": [T0] * 3})
    positives = pd.DataFrame({"user": [1, 1], "item": [1, 2], "t": [T0 + HOUR] * 2})
    out = aj.sample_negatives(positives, items, user="user", item="item", time="t")
    assert out[["group_id", "item", "label"]].values.tolist() == [
        [0, 1, 1],
        [0, 3, 0],
        [1, 2, 1],
        [1, 3, 0],
    ]
    kept = aj.sample_negatives(
        positives, items, user="user", item="item", time="t", exclude_seen=False
    )
    assert sorted(kept[kept["group_id"] == 0]["item"]) == [1, 2, 3]


@pytest.mark.parametrize("sampler", ["uniform", "popular"])
def test_frequencies_on_the_rejection_path(sampler: str) -> None:
    # 40 candidates, one draw each: pools far larger than asked, so no enumeration
    stats = pytest.importorskip("scipy.stats")
    n_items, n_pos = 40, 8_000
    items = pd.DataFrame({"item": np.arange(n_items), "t": [T0] * n_items})
    weights = np.arange(1, n_items + 1)
    log = pd.DataFrame(
        {
            "user": -np.arange(weights.sum()) - 1,
            "item": np.repeat(np.arange(n_items), weights),
            "t": T0 + HOUR,
        }
    )
    positives = pd.DataFrame({"user": np.arange(n_pos), "item": 99, "t": T0 + 2 * HOUR})
    out = aj.sample_negatives(
        positives,
        items,
        user="user",
        item="item",
        time="t",
        per_positive=1,
        sampler=sampler,
        interactions=log,
        seed=8,
    )
    counts = np.bincount(out.loc[out["label"] == 0, "item"], minlength=n_items)
    assert counts.sum() == n_pos
    p = weights / weights.sum() if sampler == "popular" else np.full(n_items, 1 / n_items)
    assert stats.chisquare(counts, p * n_pos).pvalue > 1e-4
