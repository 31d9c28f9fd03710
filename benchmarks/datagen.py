"""Deterministic, unsorted Parquet inputs for the asof_join core benchmarks."""

from __future__ import annotations

import argparse
import json
import os
import sys
from dataclasses import dataclass
from pathlib import Path

import numpy as np
import pyarrow as pa
import pyarrow.parquet as pq

# Bump when the generated data changes, so stale caches are rebuilt instead of reused.
GEN_VERSION = 2

DEFAULT_CACHE = Path(__file__).resolve().parent / ".data"

US_PER_HOUR = 3_600_000_000
US_PER_DAY = 24 * US_PER_HOUR
# Labels fall in 2024; feature rows start a month earlier so that most labels find a row.
LABEL_START_US = 1_704_067_200_000_000  # 2024-01-01T00:00:00
LABEL_SPAN_US = 366 * US_PER_DAY
FEATURE_START_US = LABEL_START_US - 31 * US_PER_DAY
FEATURE_SPAN_US = LABEL_SPAN_US + 31 * US_PER_DAY

NULL_VALUE_FRACTION = 0.01  # share of null values in each feature value column
UNKNOWN_CUSTOMER_FRACTION = 0.02  # labels whose customer has no feature rows at all
UNKNOWN_PLANT_FRACTION = 0.01  # labels whose plant has no price rows at all
LATE_LOAD_FRACTION = 0.10  # profile rows loaded days or weeks after their valid time
# Labels stamped exactly at a feature row's time (same key), so strictness is exercised.
TIE_FRACTION_PROFILES = 0.01
TIE_FRACTION_KNOWN = 0.005
TIE_FRACTION_PRICES = 0.005
TIE_FRACTION_STATS = 0.005

FEATURE_TABLES = ("profiles", "prices", "stats")


@dataclass(frozen=True)
class Dataset:
    """Paths of one generated benchmark dataset."""

    labels: Path
    profiles: Path
    prices: Path
    stats: Path
    n_labels: int
    n_rows: int
    seed: int

    def paths(self) -> dict[str, str]:
        """Table name to Parquet path, as `aj.build(data=...)` takes it."""
        return {
            "labels": str(self.labels),
            "profiles": str(self.profiles),
            "prices": str(self.prices),
            "stats": str(self.stats),
        }


def parse_count(text: str) -> int:
    """Parse a row count such as ``100000``, ``100k``, ``1M`` or ``10m``."""
    t = text.strip().lower().replace("_", "")
    mult = 1
    if t.endswith("k"):
        mult, t = 1_000, t[:-1]
    elif t.endswith("m"):
        mult, t = 1_000_000, t[:-1]
    elif t.endswith("g") or t.endswith("b"):
        mult, t = 1_000_000_000, t[:-1]
    value = float(t) * mult
    if value < 1 or value != int(value):
        msg = f"not a positive row count: {text!r}"
        raise argparse.ArgumentTypeError(msg)
    return int(value)


def n_customers(n_rows: int) -> int:
    """Customers with feature rows: about 10 profile and 10 stats rows each per year."""
    return max(100, n_rows // 10)


def n_plants(n_rows: int) -> int:
    """Plants with price rows: about 1000 price changes each per year."""
    return max(10, n_rows // 1000)


def _unique_times(rng: np.random.Generator, n: int, start: int, span: int) -> np.ndarray:
    """``n`` distinct microsecond instants in ``[start, start + span + n)``, in random order."""
    t = np.sort(rng.integers(0, span, size=n, dtype=np.int64))
    t += np.arange(n, dtype=np.int64)  # strictly increasing: no two rows share a valid time
    rng.shuffle(t)
    return t + start


def _values(rng: np.random.Generator, vals: np.ndarray) -> pa.Array:
    """Round ``vals`` and null out a random share of them."""
    n = len(vals)
    vals = np.round(vals, 4)
    mask = rng.random(n) < NULL_VALUE_FRACTION
    return pa.array(vals, type=pa.float64(), mask=mask)


def _ts(us: np.ndarray) -> pa.Array:
    return pa.array(us, type=pa.int64()).cast(pa.timestamp("us"))


def _write(table: pa.Table, path: Path) -> None:
    """Write atomically: a killed run never leaves a half-written cache file behind."""
    path.parent.mkdir(parents=True, exist_ok=True)
    tmp = path.with_name(path.name + f".tmp{os.getpid()}")
    pq.write_table(table, tmp, row_group_size=1_000_000, compression="snappy")
    os.replace(tmp, path)


def _feature_tables(n_rows: int, seed: int) -> dict[str, pa.Table]:
    rng = np.random.default_rng([seed, n_rows, 1])
    n_cust = n_customers(n_rows)
    n_plant = n_plants(n_rows)

    # Customer profiles: valid time updated_at, known time loaded_at = updated_at + lag.
    updated = _unique_times(rng, n_rows, FEATURE_START_US, FEATURE_SPAN_US)
    lag = rng.exponential(2 * US_PER_HOUR, size=n_rows).astype(np.int64)
    late = rng.random(n_rows) < LATE_LOAD_FRACTION
    lag[late] = rng.integers(US_PER_DAY, 30 * US_PER_DAY, size=int(late.sum()), dtype=np.int64)
    profiles = pa.table(
        {
            "customer_id": rng.integers(0, n_cust, size=n_rows, dtype=np.int64),
            "updated_at": _ts(updated),
            "loaded_at": _ts(updated + lag),
            "score": _values(rng, rng.beta(2.0, 2.0, size=n_rows)),
        }
    )

    prices = pa.table(
        {
            "plant_id": rng.integers(0, n_plant, size=n_rows, dtype=np.int64),
            "effective_at": _ts(_unique_times(rng, n_rows, FEATURE_START_US, FEATURE_SPAN_US)),
            "price": _values(rng, rng.lognormal(4.6, 0.15, size=n_rows)),
        }
    )

    stats = pa.table(
        {
            "customer_id": rng.integers(0, n_cust, size=n_rows, dtype=np.int64),
            "computed_at": _ts(_unique_times(rng, n_rows, FEATURE_START_US, FEATURE_SPAN_US)),
            "orders_90d": _values(rng, rng.gamma(2.0, 3.0, size=n_rows)),
        }
    )
    return {"profiles": profiles, "prices": prices, "stats": stats}


def _copy_ties(
    rng: np.random.Generator,
    fraction: float,
    free: np.ndarray,
    key_out: np.ndarray,
    time_out: np.ndarray,
    keys: np.ndarray,
    times: np.ndarray,
) -> None:
    """Give a ``fraction`` of the still-``free`` labels the key and time of a random row."""
    n = len(free)
    k = min(round(fraction * n), int(free.sum()))
    if k == 0:
        return
    idx = rng.choice(np.flatnonzero(free), size=k, replace=False)
    src = rng.integers(0, len(keys), size=k)
    key_out[idx] = keys[src]
    time_out[idx] = times[src]
    free[idx] = False


def _label_table(n_labels: int, n_rows: int, seed: int, features: dict[str, Path]) -> pa.Table:
    rng = np.random.default_rng([seed, n_rows, n_labels, 2])
    n_cust = n_customers(n_rows)
    n_plant = n_plants(n_rows)
    # Ids at or above n_cust / n_plant have no feature rows: those labels get nulls.
    cust = rng.integers(0, int(n_cust * (1 + UNKNOWN_CUSTOMER_FRACTION)), size=n_labels)
    plant = rng.integers(0, int(n_plant * (1 + UNKNOWN_PLANT_FRACTION)), size=n_labels)
    event = rng.integers(LABEL_START_US, LABEL_START_US + LABEL_SPAN_US, size=n_labels)
    cust = cust.astype(np.int64)
    plant = plant.astype(np.int64)
    event = event.astype(np.int64)

    def cols(name: str, key: str, time: str) -> tuple[np.ndarray, np.ndarray]:
        t = pq.read_table(features[name], columns=[key, time])
        return (
            t.column(key).to_numpy(),
            t.column(time).cast(pa.int64()).to_numpy(),
        )

    free = np.ones(n_labels, dtype=bool)
    pk, pt = cols("profiles", "customer_id", "updated_at")
    _copy_ties(rng, TIE_FRACTION_PROFILES, free, cust, event, pk, pt)
    pk, pt = cols("profiles", "customer_id", "loaded_at")
    _copy_ties(rng, TIE_FRACTION_KNOWN, free, cust, event, pk, pt)
    sk, st = cols("stats", "customer_id", "computed_at")
    _copy_ties(rng, TIE_FRACTION_STATS, free, cust, event, sk, st)
    qk, qt = cols("prices", "plant_id", "effective_at")
    _copy_ties(rng, TIE_FRACTION_PRICES, free, plant, event, qk, qt)

    return pa.table(
        {
            # label_id is the label's position in generation order; the file is shuffled below,
            # so input order differs from both label_id order and time order.
            "label_id": np.arange(n_labels, dtype=np.int64),
            "customer_id": cust,
            "plant_id": plant,
            "event_at": _ts(event),
            "amount": np.round(rng.lognormal(3.0, 1.0, size=n_labels), 2),
        }
    ).take(rng.permutation(n_labels))


def _manifest_ok(path: Path, expected: dict[str, int]) -> bool:
    try:
        return json.loads(path.read_text()) == expected
    except (OSError, ValueError):
        return False


def ensure_dataset(
    n_labels: int,
    n_rows: int,
    *,
    seed: int = 0,
    cache_dir: Path | str = DEFAULT_CACHE,
    force: bool = False,
    verbose: bool = True,
) -> Dataset:
    """Generate the dataset for ``n_labels`` labels and ``n_rows`` rows per feature table.

    Files are reused when present. Feature tables depend only on ``n_rows`` and ``seed``, so
    several label sizes share them.
    """
    cache = Path(cache_dir)
    fdir = cache / f"features_rows{n_rows}_seed{seed}"
    ldir = fdir / f"labels{n_labels}"
    features = {name: fdir / f"{name}.parquet" for name in FEATURE_TABLES}
    labels = ldir / "labels.parquet"

    fman = {"version": GEN_VERSION, "rows": n_rows, "seed": seed}
    fman_path = fdir / "manifest.json"
    if force or not _manifest_ok(fman_path, fman) or not all(p.exists() for p in features.values()):
        if verbose:
            print(f"generating feature tables: {n_rows:,} rows each -> {fdir}", file=sys.stderr)
        fman_path.unlink(missing_ok=True)
        for name, table in _feature_tables(n_rows, seed).items():
            _write(table, features[name])
        fdir.mkdir(parents=True, exist_ok=True)
        fman_path.write_text(json.dumps(fman))
        force = True  # labels copy times from the feature tables: rebuild them too

    lman = {**fman, "labels": n_labels}
    lman_path = ldir / "manifest.json"
    if force or not _manifest_ok(lman_path, lman) or not labels.exists():
        if verbose:
            print(f"generating label table: {n_labels:,} labels -> {labels}", file=sys.stderr)
        lman_path.unlink(missing_ok=True)
        _write(_label_table(n_labels, n_rows, seed, features), labels)
        lman_path.write_text(json.dumps(lman))

    return Dataset(
        labels=labels,
        profiles=features["profiles"],
        prices=features["prices"],
        stats=features["stats"],
        n_labels=n_labels,
        n_rows=n_rows,
        seed=seed,
    )


def main(argv: list[str] | None = None) -> int:
    """Command line: generate (or find in the cache) one or more datasets."""
    parser = argparse.ArgumentParser(description=__doc__)
    parser.add_argument(
        "--labels",
        type=parse_count,
        nargs="+",
        default=[100_000],
        help="label counts, e.g. 100k 1M 10M (default 100k)",
    )
    parser.add_argument(
        "--rows", type=parse_count, default=None, help="rows per feature table (default: = labels)"
    )
    parser.add_argument("--seed", type=int, default=0)
    parser.add_argument("--cache-dir", type=Path, default=DEFAULT_CACHE)
    parser.add_argument("--force", action="store_true", help="regenerate even if cached")
    args = parser.parse_args(argv)
    for n in args.labels:
        ds = ensure_dataset(
            n, args.rows or n, seed=args.seed, cache_dir=args.cache_dir, force=args.force
        )
        for name, path in ds.paths().items():
            meta = pq.read_metadata(path)
            print(f"{name:9s} {meta.num_rows:>12,} rows  {path}")
        args.force = False  # features are shared between label sizes: generate them once
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
