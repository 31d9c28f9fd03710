"""Benchmark aj.audit: a five-feature set audited by provenance and by recomputation vs its build.

Uses the core benchmarks' generated data (datagen.py). Five latest features over three tables:
``score`` and ``score_7d`` (max_age 7d) from ``profiles`` (known_at = loaded_at), ``price`` and
``price_1d`` (max_age 1d) from ``prices`` (delay 1h), ``orders_90d`` from ``stats``. Each step
runs ``--repeat`` times in this process (median reported):

- build: ``aj.build(spec, data).to_arrow()``, without and with ``provenance=True``
- audit by provenance: the provenance set, no data (future_row, not_yet_known, stale_value)
- audit by provenance + sources: the same with data= (adds the two source rules)
- audit by recomputation: the set without provenance columns, with data= (rebuilds and compares)
- audit by recomputation, 3% planted: as above after replacing 3% of ``price`` with a later
  row's price; the run checks that exactly those rows are reported

    python benchmarks/bench_audit.py                          # 100k labels, 100k rows per table
    python benchmarks/bench_audit.py --labels 10M --rows 10M  # the full size (needs ~16 GB RAM)
"""

from __future__ import annotations

import argparse
import json
import statistics
import sys
import time
from collections.abc import Callable
from pathlib import Path
from typing import Any

import duckdb
import numpy as np
import pyarrow as pa

sys.path.insert(0, str(Path(__file__).resolve().parent))

from datagen import DEFAULT_CACHE, ensure_dataset, parse_count

import asof_join as aj


def make_spec() -> aj.TrainingSetSpec:
    customer = aj.Entity("customer", keys=["customer_id"])
    plant = aj.Entity("plant", keys=["plant_id"])
    labels = aj.EventTable("labels", time="event_at", entities=[customer, plant])
    profiles = aj.EventTable(
        "profiles", time="updated_at", known_at="loaded_at", entities=[customer]
    )
    prices = aj.EventTable("prices", time="effective_at", delay="1h", entities=[plant])
    stats = aj.EventTable("stats", time="computed_at", entities=[customer])
    return aj.TrainingSetSpec(
        labels=labels,
        features=[
            aj.Latest(profiles, ["score"]),
            aj.Latest(profiles, ["score"], max_age="7d", name="score_7d"),
            aj.Latest(prices, ["price"]),
            aj.Latest(prices, ["price"], max_age="1d", name="price_1d"),
            aj.Latest(stats, ["orders_90d"]),
        ],
    )


def plant_leaks(
    train: pa.Table, prices_path: str, share: float, seed: int
) -> tuple[pa.Table, set[int]]:
    """Replace `share` of `price` with the price of the first row valid at or after the label
    (same plant) when it differs; returns the new table and the planted positions."""
    rng = np.random.default_rng(seed)
    n = train.num_rows
    picks = np.sort(rng.choice(n, size=int(share * n), replace=False))
    con = duckdb.connect()
    con.register(
        "picked",
        pa.table(
            {
                "pos": picks,
                "plant_id": train["plant_id"].take(picks),
                "t": train["event_at"].take(picks),
                "price": train["price"].take(picks),
            }
        ),
    )
    rows = con.sql(
        f"""
        SELECT p.pos, r.price AS later
        FROM picked AS p ASOF JOIN (SELECT * FROM read_parquet('{prices_path}')
                                    WHERE price IS NOT NULL) AS r
          ON p.plant_id = r.plant_id AND r.effective_at >= p.t
        WHERE p.price IS DISTINCT FROM r.price
        """
    ).to_arrow_table()
    con.close()
    pos = rows["pos"].to_numpy()
    price = train["price"].to_numpy(zero_copy_only=False).copy()
    price[pos] = rows["later"].to_numpy()
    mask = np.zeros(n, dtype=bool)
    mask[pos] = True
    column = pa.array(price, mask=~mask & ~train["price"].is_valid().to_numpy(zero_copy_only=False))
    leaked = train.set_column(train.schema.get_field_index("price"), "price", column)
    return leaked, {int(p) for p in pos}


def timed(fn: Callable[[], Any], repeat: int) -> tuple[float, Any]:
    times, result = [], None
    for _ in range(repeat):
        start = time.perf_counter()
        result = fn()
        times.append(time.perf_counter() - start)
    return statistics.median(times), result


def main(argv: list[str] | None = None) -> int:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--labels", type=parse_count, default=100_000, help="default 100k")
    parser.add_argument("--rows", type=parse_count, default=None, help="per table (= labels)")
    parser.add_argument("--repeat", type=int, default=3)
    parser.add_argument("--threads", type=int, default=None)
    parser.add_argument("--cache-dir", type=Path, default=DEFAULT_CACHE)
    parser.add_argument("--out", type=Path, default=None, help="write results JSON here")
    args = parser.parse_args(argv)

    ds = ensure_dataset(args.labels, args.rows or args.labels, cache_dir=args.cache_dir)
    data = ds.paths()
    spec = make_spec()
    sources = {k: v for k, v in data.items() if k != "labels"}

    def build(provenance: bool) -> pa.Table:
        return aj.build(spec, data=data, provenance=provenance, threads=args.threads).to_arrow()

    results: dict[str, float] = {}
    results["build"], plain = timed(lambda: build(False), args.repeat)
    results["build, provenance=True"], prov = timed(lambda: build(True), args.repeat)

    def run(frame: pa.Table, with_data: bool) -> aj.AuditReport:
        return aj.audit(frame, spec, data=sources if with_data else None, threads=args.threads)

    checks: dict[str, Any] = {}
    for name, frame, with_data in (
        ("audit by provenance (no data)", prov, False),
        ("audit by provenance + source rules", prov, True),
        ("audit by recomputation", plain, True),
    ):
        results[name], report = timed(lambda f=frame, d=with_data: run(f, d), args.repeat)
        checks[name] = {"ok": report.ok, "findings": [f.to_dict()["rule"] for f in report.findings]}
        if not report.ok:
            print(report, file=sys.stderr)
            return 1

    leaked, planted = plant_leaks(plain, data["prices"], 0.03, seed=1)
    name = "audit by recomputation, 3% planted"
    results[name], report = timed(lambda: run(leaked, True), args.repeat)
    found = {
        p
        for f in report.findings
        if f.rule is aj.Rule.VALUE_MISMATCH and f.feature == "price"
        for p in f.positions
    }
    others = [
        f for f in report.findings if f.rule is not aj.Rule.VALUE_MISMATCH or f.feature != "price"
    ]
    checks[name] = {"planted": len(planted), "found": len(found), "exact": found == planted}
    if found != planted or others:
        print(f"planted {len(planted)} leaks, audit found {len(found)}", file=sys.stderr)
        print(report, file=sys.stderr)
        return 1

    build_s = results["build"]
    print(
        f"labels {ds.n_labels:,}, rows per feature table {ds.n_rows:,}, 5 latest features, "
        f"median of {args.repeat}"
    )
    print("| step | seconds | x build |\n|---|---:|---:|")
    for step, seconds in results.items():
        print(f"| {step} | {seconds:.2f} | {seconds / build_s:.2f} |")
    print(
        f"planted leaks: {len(planted):,}, reported: {len(found):,}, exactly the planted rows: "
        f"{found == planted}"
    )
    if args.out is not None:
        args.out.write_text(
            json.dumps(
                {
                    "labels": ds.n_labels,
                    "rows": ds.n_rows,
                    "repeat": args.repeat,
                    "seconds": results,
                    "checks": checks,
                },
                indent=2,
            )
        )
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
