"""Invented demo data (a mail-order plant nursery) and the naive-join comparison the demo prints."""

from __future__ import annotations

from collections.abc import Mapping
from dataclasses import dataclass
from pathlib import Path
from typing import TYPE_CHECKING

import numpy as np

if TYPE_CHECKING:
    import pyarrow as pa

    from asof_join import TrainingSetSpec

__all__ = [
    "END",
    "REGIONS",
    "START",
    "TIERS",
    "NaiveLeak",
    "make_demo_data",
    "naive_leak_count",
    "write_demo_data",
]

#: The demo's two years: [START, END). A few rows (first prices, early profiles) predate START.
START = np.datetime64("2023-01-01T00:00:00", "us")
END = np.datetime64("2025-01-01T00:00:00", "us")
#: Loyalty tiers, lowest first.
TIERS = ("seed", "sprout", "bloom", "evergreen")
REGIONS = ("north", "south", "east", "west", "coast", "highlands")

_HOUR = 3_600_000_000  # microseconds
_DAY = 24 * _HOUR
_T0 = int(START.astype(np.int64))
_T1 = int(END.astype(np.int64))
# Orders and page views by hour of day: quiet at night, busiest in the evening.
_HOURLY = np.array(
    [1, 1, 1, 1, 1, 2, 3, 5, 7, 8, 8, 8, 9, 9, 8, 8, 8, 9, 11, 13, 13, 11, 6, 3], dtype=float
)
_HOURLY /= _HOURLY.sum()


def make_demo_data(n_orders: int = 200_000, seed: int = 0) -> dict[str, pa.Table]:
    """Generate the nursery's tables; every size is proportional to ``n_orders``.

    Tables: ``customers``, ``orders`` (the labels: ``returned`` is True when the order was
    sent back within 30 days), ``profiles`` (loyalty tier and region, valid from
    ``updated_at``, loaded ``loaded_at`` hours later, with a few late corrections),
    ``prices`` (price changes per plant), ``stock`` (stock counts every 3 days),
    ``views`` (page views, many just before an order, some after) and ``returns``.
    ``returned`` depends on the tier at order time, the price, the stock level, the views
    before the order and a hidden per-customer habit that past returns reveal; customers who
    return a lot tend to lose tiers later, so a tier read from the future leaks the label.
    Times are naive microsecond timestamps. The same seed gives the same tables.

    Example:
        >>> tables = make_demo_data(2_000, seed=1)
        >>> tables["orders"].num_rows
        2000
        >>> sorted(tables)
        ['customers', 'orders', 'prices', 'profiles', 'returns', 'stock', 'views']
    """
    import pyarrow as pa

    if n_orders < 1:
        msg = f"n_orders must be at least 1, got {n_orders}"
        raise ValueError(msg)
    rng = np.random.default_rng(seed)
    n_customers = max(20, n_orders // 8)
    n_plants = max(10, n_orders // 200)

    # Customers: a third joined before the demo period; activity is skewed; `habit` is the
    # hidden tendency to send plants back.
    pre = rng.random(n_customers) < 0.35
    joined = np.where(
        pre,
        _T0 - _randint(rng, 0, 365 * _DAY, n_customers),
        _randint(rng, _T0, _T1 - 30 * _DAY, n_customers),
    )
    activity = rng.gamma(0.8, 1.0, n_customers)
    habit = rng.normal(0.0, 1.0, n_customers)

    # Plants: popularity falls off with rank; a base price per plant.
    popularity = 1.0 / (rng.permutation(n_plants) + 5.0) ** 0.9
    popularity /= popularity.sum()

    prices = _prices(rng, n_plants)
    stock = _stock(rng, n_plants, popularity)
    profiles, true_tier = _profiles(rng, joined, pre, habit)

    # Orders: customer by activity x time as a member; time by season and hour.
    first_day = np.maximum(joined, _T0)
    weight = activity * (_T1 - first_day)
    cust = rng.choice(n_customers, size=n_orders, p=weight / weight.sum())
    when = _order_times(rng, first_day[cust])
    order = np.argsort(when, kind="stable")
    cust, when = cust[order], when[order]
    plant = rng.choice(n_plants, size=n_orders, p=popularity)
    # Every order finds a price, a profile and a stock count below: each plant's first price and
    # count predate START, and each customer's first profile is stamped when they joined.
    quantity = np.minimum(1 + rng.poisson(0.5, n_orders), 6)
    price_row = _asof_positions(prices["plant"], prices["time"], plant, when)
    price = prices["price"][price_row]
    amount = np.round(quantity * price, 2)

    views, views_before = _views(rng, cust, plant, when, first_day, activity, popularity)

    # Returns: the label. The tier is the true one (corrections applied) valid at order time.
    tier_row = _asof_positions(profiles["cust"][true_tier], profiles["time"][true_tier], cust, when)
    tier_at_order = profiles["tier"][true_tier][tier_row]
    stock_row = _asof_positions(stock["plant"], stock["time"], plant, when)
    low_stock = stock["level"][stock_row] < 5
    logit = (
        -2.2
        + 0.9 * habit[cust]
        - 0.4 * tier_at_order
        + 0.5 * np.log(price / 15.0)
        + 0.4 * low_stock
        - 0.15 * np.minimum(views_before, 6)
    )
    returned = rng.random(n_orders) < 1.0 / (1.0 + np.exp(-logit))
    returned_at = when + _randint(rng, 2 * _DAY, 30 * _DAY, n_orders)
    ret = np.flatnonzero(returned)
    ret = ret[np.argsort(returned_at[ret], kind="stable")]

    order_id = np.arange(100_001, 100_001 + n_orders, dtype=np.int64)
    customer_id = np.arange(1, n_customers + 1, dtype=np.int64)
    plant_id = np.arange(1, n_plants + 1, dtype=np.int64)
    return {
        "customers": pa.table({"customer_id": customer_id, "joined_at": _ts(joined)}),
        "orders": pa.table(
            {
                "order_id": order_id,
                "customer_id": customer_id[cust],
                "plant_id": plant_id[plant],
                "ordered_at": _ts(when),
                "quantity": quantity.astype(np.int64),
                "amount": amount,
                "returned": returned,
            }
        ),
        "profiles": pa.table(
            {
                "customer_id": customer_id[profiles["cust"]],
                "tier": np.array(TIERS)[profiles["tier"]],
                "region": np.array(REGIONS)[profiles["region"]],
                "updated_at": _ts(profiles["time"]),
                "loaded_at": _ts(profiles["loaded"]),
            }
        ),
        "prices": pa.table(
            {
                "plant_id": plant_id[prices["plant"]],
                "effective_at": _ts(prices["time"]),
                "price": prices["price"],
            }
        ),
        "stock": pa.table(
            {
                "plant_id": plant_id[stock["plant"]],
                "counted_at": _ts(stock["time"]),
                "in_stock": stock["level"],
            }
        ),
        "views": pa.table(
            {
                "customer_id": customer_id[views["cust"]],
                "plant_id": plant_id[views["plant"]],
                "viewed_at": _ts(views["time"]),
            }
        ),
        "returns": pa.table(
            {
                "order_id": order_id[ret],
                "customer_id": customer_id[cust[ret]],
                "plant_id": plant_id[plant[ret]],
                "returned_at": _ts(returned_at[ret]),
            }
        ),
    }


def write_demo_data(
    directory: str | Path, n_orders: int = 200_000, seed: int = 0
) -> dict[str, Path]:
    """Write each demo table to ``<directory>/<table>.parquet``; returns the paths by table.

    Example:
        >>> import tempfile
        >>> with tempfile.TemporaryDirectory() as tmp:
        ...     paths = write_demo_data(tmp, 1_000)
        ...     sorted(p.name for p in paths.values())[:2]
        ['customers.parquet', 'orders.parquet']
    """
    import pyarrow.parquet as pq

    out = Path(directory)
    out.mkdir(parents=True, exist_ok=True)
    paths = {}
    for name, table in make_demo_data(n_orders, seed).items():
        paths[name] = out / f"{name}.parquet"
        pq.write_table(table, paths[name])
    return paths


@dataclass(frozen=True)
class NaiveLeak:
    """What a join on the key alone would have put in one latest-feature column."""

    #: Output column of the latest feature.
    feature: str
    #: Label rows whose naive value came from a row valid at or after the label time.
    from_future: int
    #: Label rows whose naive value differs from the built (point-in-time) value.
    differs: int


def naive_leak_count(
    spec: TrainingSetSpec,
    data: Mapping[str, pa.Table | str | Path],
    train: pa.Table,
) -> list[NaiveLeak]:
    """Compare each latest feature of ``train`` with a join on the key alone.

    The naive join takes, for every key, the table's newest row overall (greatest valid time,
    then known time) whatever the label time: the common mistake that leaks the future.
    ``train`` is the training set built from ``spec`` (label columns kept), and ``data`` binds
    the feature tables to Arrow tables or Parquet paths. Times of the label and feature tables
    must be comparable (all naive or all aware).

    Example:
        >>> import asof_join as aj
        >>> import pyarrow as pa
        >>> from datetime import datetime as dt
        >>> user = aj.Entity("user", keys=["user_id"])
        >>> clicks = aj.EventTable("clicks", time="t", entities=[user])
        >>> plans = aj.EventTable("plans", time="t", entities=[user])
        >>> spec = aj.TrainingSetSpec(labels=clicks, features=[aj.Latest(plans, ["plan"])])
        >>> labels = pa.table({"user_id": [1], "t": [dt(2024, 1, 2)]})
        >>> rows = pa.table({"user_id": [1, 1], "t": [dt(2024, 1, 1), dt(2024, 1, 3)],
        ...                  "plan": ["free", "pro"]})
        >>> train = aj.build(spec, data={"clicks": labels, "plans": rows}).to_arrow()
        >>> naive_leak_count(spec, {"plans": rows}, train)
        [NaiveLeak(feature='plan', from_future=1, differs=1)]
    """
    import duckdb

    from asof_join import Latest
    from asof_join.engines.sql import quote_ident as q

    leaks: list[NaiveLeak] = []
    con = duckdb.connect()
    try:
        con.register("_aj_train", train)
        label_time = q(spec.labels.time)
        for i, feature in enumerate(f for f in spec.features if isinstance(f, Latest)):
            view = f"_aj_feature_{i}"
            source = data[feature.table.name]
            if isinstance(source, (str, Path)):
                con.read_parquet(str(source)).create_view(view)
            else:
                con.register(view, source)
            label_keys, table_keys = spec.join_keys(feature)
            time = q(feature.table.time)
            known = q(feature.table.known_at or feature.table.time)
            outputs = feature.output_names()
            partition = ", ".join(q(k) for k in table_keys)
            picked = ", ".join(f"{q(c)} AS _aj_v{j}" for j, c in enumerate(feature.columns))
            on = " AND ".join(
                f"l.{q(a)} = n.{q(b)}" for a, b in zip(label_keys, table_keys, strict=True)
            )
            differs = ", ".join(
                f"count(*) FILTER (WHERE n._aj_v{j} IS DISTINCT FROM l.{q(name)})"
                for j, name in enumerate(outputs)
            )
            sql = (
                f"WITH n AS (SELECT {partition}, {time} AS _aj_t, {picked} FROM {view} "
                f"QUALIFY row_number() OVER (PARTITION BY {partition} "
                f"ORDER BY {time} DESC, {known} DESC) = 1) "
                f"SELECT count(*) FILTER (WHERE n._aj_t >= l.{label_time}), {differs} "
                f"FROM _aj_train AS l LEFT JOIN n ON {on}"
            )
            (row,) = con.execute(sql).fetchall()  # an aggregate without GROUP BY: one row
            leaks += [
                NaiveLeak(name, int(row[0]), int(row[1 + j])) for j, name in enumerate(outputs)
            ]
    finally:
        con.close()
    return leaks


# --- generators: flat numpy arrays, times as int64 microseconds since the epoch ------------


def _prices(rng: np.random.Generator, n_plants: int) -> dict[str, np.ndarray]:
    """A first price before START, then a few changes per plant at dawn; rounded to .49/.99."""
    changes = rng.poisson(3.0, n_plants)
    plant = np.repeat(np.arange(n_plants), 1 + changes)
    first = _starts_mask(1 + changes)
    time = np.where(
        first,
        _T0 - _randint(rng, _DAY, 90 * _DAY, len(plant)),
        _T0 + rng.integers(0, (_T1 - _T0) // _DAY, len(plant)) * _DAY + 5 * _HOUR,
    ) + _randint(rng, 0, _HOUR, len(plant))
    order = np.lexsort((time, plant))
    plant, time = plant[order], time[order]
    base = np.clip(np.exp(rng.normal(np.log(14.0), 0.6, n_plants)), 2.5, 150.0)
    step = np.where(first, 0.0, rng.normal(0.0, 0.12, len(plant)))
    raw = base[plant] * np.exp(_group_cumsum(step, first))
    price = np.maximum(np.round(raw * 2.0) / 2.0 - 0.01, 0.99)
    by_time = np.argsort(time, kind="stable")  # a change log: oldest first
    return {"plant": plant[by_time], "time": time[by_time], "price": price[by_time]}


def _stock(
    rng: np.random.Generator, n_plants: int, popularity: np.ndarray
) -> dict[str, np.ndarray]:
    """Counts every third morning: a saw-tooth (sell down, restock) with noise; some missed."""
    n_counts = (_T1 - _T0) // (3 * _DAY) + 2
    plant = np.repeat(np.arange(n_plants), n_counts)
    j = np.tile(np.arange(n_counts), n_plants)
    capacity = rng.integers(10, 200, n_plants)
    rate = 0.05 + 0.3 * rng.random(n_plants) + 0.3 * popularity / popularity.max()
    phase = rng.random(n_plants)
    sawtooth = 1.0 - np.mod(phase[plant] + j * rate[plant], 1.0)
    noise = rng.normal(0.0, 0.05, len(plant))
    level = np.round(capacity[plant] * (sawtooth + noise - 0.15)).clip(0).astype(np.int64)
    time = _T0 + (j - 1) * 3 * _DAY + 7 * _HOUR + _randint(rng, 0, _HOUR, len(plant))
    keep = (j == 0) | (rng.random(len(plant)) >= 0.05)
    plant, time, level = plant[keep], time[keep], level[keep]
    by_time = np.argsort(time, kind="stable")
    return {"plant": plant[by_time], "time": time[by_time], "level": level[by_time]}


def _profiles(
    rng: np.random.Generator, joined: np.ndarray, pre: np.ndarray, habit: np.ndarray
) -> tuple[dict[str, np.ndarray], np.ndarray]:
    """Profile updates per customer; the tier walks up with time and down with returns.

    Returns the rows in load order and a mask of the rows holding true values (a few rows were
    loaded with a wrong tier and corrected by a later row with the same ``updated_at``).
    """
    n_customers = len(joined)
    years = (_T1 - joined) / (365 * _DAY)
    updates = 1 + rng.poisson(2.0 * years)  # about two changes a year of membership
    cust = np.repeat(np.arange(n_customers), updates)
    first = _starts_mask(updates)
    m = len(cust)
    span = (_T1 - joined[cust]).astype(float)
    time = np.where(first, joined[cust], joined[cust] + (rng.random(m) * span).astype(np.int64))
    order = np.lexsort((time, cust))
    time = time[order]  # cust is already grouped, and the first row of a group stays first
    h = habit[cust]
    up = rng.random(m) < 0.55 / (1.0 + np.exp(-(0.3 - 0.8 * h)))
    down = rng.random(m) < 0.5 / (1.0 + np.exp(-(-1.2 + 1.0 * h)))
    start_tier = np.where(pre, rng.integers(0, 3, n_customers), 0)
    step = np.where(first, start_tier[cust], up.astype(np.int64) - down.astype(np.int64))
    tier = np.clip(_group_cumsum(step, first), 0, len(TIERS) - 1)
    moved = first | (rng.random(m) < 0.04)
    moved_to = rng.choice(len(REGIONS), m, p=[0.22, 0.2, 0.18, 0.18, 0.14, 0.08])
    region = moved_to[np.maximum.accumulate(np.where(moved, np.arange(m), 0))]
    lag = rng.gamma(1.5, 4.0, m) * _HOUR
    lag += np.where(rng.random(m) < 0.03, rng.uniform(24.0, 120.0, m) * _HOUR, 0.0)
    loaded = time + lag.astype(np.int64)

    # Late corrections: the first load carried a wrong tier, a later row with the same valid
    # time carries the true one.
    wrong = ~first & (rng.random(m) < 0.03)
    fixed = np.flatnonzero(wrong)
    shown = tier.copy()
    shown[fixed] = np.where(tier[fixed] > 0, tier[fixed] - 1, tier[fixed] + 1)
    fix_loaded = loaded[fixed] + _randint(rng, _HOUR, 72 * _HOUR, len(fixed))

    rows = {
        "cust": np.concatenate([cust, cust[fixed]]),
        "time": np.concatenate([time, time[fixed]]),
        "loaded": np.concatenate([loaded, fix_loaded]),
        "tier": np.concatenate([shown, tier[fixed]]),
        "region": np.concatenate([region, region[fixed]]),
    }
    true = np.concatenate([~wrong, np.ones(len(fixed), dtype=bool)])
    by_load = np.argsort(rows["loaded"], kind="stable")  # the warehouse's load order
    return {k: v[by_load] for k, v in rows.items()}, true[by_load]


def _order_times(rng: np.random.Generator, earliest: np.ndarray) -> np.ndarray:
    """Order times with a spring peak and an autumn bump, none before the customer joined."""
    n_days = (_T1 - _T0) // _DAY
    doy = (np.arange(n_days) % 365).astype(float)
    season = 1.0 + 2.0 * np.exp(-(((doy - 120.0) / 35.0) ** 2))
    season += 0.4 * np.exp(-(((doy - 270.0) / 25.0) ** 2))
    season /= season.sum()
    when = np.full(len(earliest), -1, dtype=np.int64)
    pending = np.arange(len(earliest))
    for _ in range(8):  # rejection rounds (a loop over rounds, not rows)
        day = rng.choice(n_days, size=len(pending), p=season)
        candidate = _T0 + day * _DAY + _time_of_day(rng, len(pending))
        ok = candidate >= earliest[pending]
        when[pending[ok]] = candidate[ok]
        pending = pending[~ok]
        if not len(pending):
            break
    lo = earliest[pending]
    when[pending] = lo + (rng.random(len(pending)) * (_T1 - lo)).astype(np.int64)
    return when


def _views(
    rng: np.random.Generator,
    cust: np.ndarray,
    plant: np.ndarray,
    when: np.ndarray,
    first_day: np.ndarray,
    activity: np.ndarray,
    popularity: np.ndarray,
) -> tuple[dict[str, np.ndarray], np.ndarray]:
    """Page views: before each order (most within the hour), some after it, and browsing.

    Also returns, per order, how many views of the ordered plant were made for it beforehand.
    """
    n = len(cust)
    before = rng.poisson(2.5, n)
    b_order = np.repeat(np.arange(n), before)
    just_before = rng.random(len(b_order)) < 0.65
    back = np.where(
        just_before,
        rng.exponential(40 * 60e6, len(b_order)),
        rng.uniform(0.0, 14 * _DAY, len(b_order)),
    ).astype(np.int64)
    after = np.flatnonzero(rng.random(n) < 0.25)
    a_time = when[after] + _randint(rng, 60_000_000, 48 * _HOUR, len(after))
    n_browse = 2 * n
    weight = activity * (_T1 - first_day)
    b_cust = rng.choice(len(activity), size=n_browse, p=weight / weight.sum())
    lo = first_day[b_cust]
    b_time = lo + (rng.random(n_browse) * (_T1 - lo)).astype(np.int64)
    views = {
        "cust": np.concatenate([cust[b_order], cust[after], b_cust]),
        "plant": np.concatenate(
            [plant[b_order], plant[after], rng.choice(len(popularity), n_browse, p=popularity)]
        ),
        "time": np.concatenate([when[b_order] - 1 - back, a_time, b_time]),
    }
    by_time = np.argsort(views["time"], kind="stable")
    return {k: v[by_time] for k, v in views.items()}, before


# --- small vectorised helpers ---------------------------------------------------------------


def _asof_positions(
    ev_group: np.ndarray, ev_time: np.ndarray, q_group: np.ndarray, q_time: np.ndarray
) -> np.ndarray:
    """Per query, the event with its group and the greatest time <= its time (-1: none).

    Events tied on group and time resolve to the last in input order.
    """
    n_ev = len(ev_group)
    group = np.concatenate([ev_group, q_group])
    time = np.concatenate([ev_time, q_time])
    is_query = np.concatenate([np.zeros(n_ev, dtype=bool), np.ones(len(q_group), dtype=bool)])
    order = np.lexsort((is_query, time, group))  # events before queries at equal times
    last = np.maximum.accumulate(np.where(order < n_ev, np.arange(len(order)), -1))
    sorted_group = group[order]
    safe = np.maximum(last, 0)
    hit = (last >= 0) & (sorted_group[safe] == sorted_group)
    found = np.where(hit, order[safe], -1)
    out = np.empty(len(q_group), dtype=np.int64)
    queries = order >= n_ev
    out[order[queries] - n_ev] = found[queries]
    return out


def _starts_mask(counts: np.ndarray) -> np.ndarray:
    """For groups of the given sizes laid end to end, True on each group's first row."""
    mask = np.zeros(int(counts.sum()), dtype=bool)
    mask[(np.cumsum(counts) - counts)[counts > 0]] = True
    return mask


def _group_cumsum(values: np.ndarray, first: np.ndarray) -> np.ndarray:
    """Running sum of ``values`` restarting at each True of ``first`` (the first row is True)."""
    total = np.cumsum(values)
    start = np.maximum.accumulate(np.where(first, np.arange(len(values)), 0))
    out: np.ndarray = total - total[start] + values[start]
    return out


def _randint(rng: np.random.Generator, lo: int, hi: int, size: int) -> np.ndarray:
    return rng.integers(lo, hi, size, dtype=np.int64)


def _time_of_day(rng: np.random.Generator, size: int) -> np.ndarray:
    hour = rng.choice(24, size=size, p=_HOURLY)
    out: np.ndarray = hour * _HOUR + _randint(rng, 0, _HOUR, size)
    return out


def _ts(micros: np.ndarray) -> np.ndarray:
    return micros.astype("datetime64[us]")
