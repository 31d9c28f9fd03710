"""Backfill benchmark: aj.backfill of daily snapshots vs one aj.build over the explicit spine."""

from __future__ import annotations

import argparse
import datetime as dt
import json
import os
import platform
import re
import resource
import shutil
import subprocess
import sys
import time
from pathlib import Path
from typing import Any

HERE = Path(__file__).resolve().parent
DATA = HERE / ".data" / "backfill"
WORK = HERE / ".results" / "backfill"
RESULT_MARKER = "@@RESULT "
START = dt.datetime(2024, 7, 1)
TABLES = ("customers", "orders", "profiles", "views")
FEATURE_NAMES = ["tier", "region", "spend_30d", "orders_365d", "views_7d"]
MIB = 1024 * 1024
METHODS = {
    "build": "aj.build() over the explicit spine (keys x days), one write_parquet file",
    "backfill": "aj.backfill(), default chunk (about 4M spine rows per query)",
    "backfill_30": "aj.backfill(chunk=30): 30 snapshot times per query",
    "backfill_90": "aj.backfill(chunk=90): all snapshot times in one query",
    "rerun": "aj.backfill() again on the finished folder (writes nothing)",
    "extend": "aj.backfill() with end one day later on the finished folder (writes 1)",
}


def features() -> list[Any]:
    """Three nursery tables, keyed by customer: one latest lookup, three trailing windows."""
    import asof_join as aj

    customer = aj.Entity("customer", keys=["customer_id"])
    plant = aj.Entity("plant", keys=["plant_id"])
    profiles = aj.EventTable(
        "profiles", time="updated_at", known_at="loaded_at", entities=[customer]
    )
    orders = aj.EventTable("orders", time="ordered_at", entities=[customer, plant])
    views = aj.EventTable("views", time="viewed_at", entities=[customer, plant])
    return [
        aj.Latest(profiles, ["tier", "region"], max_age="365d"),
        aj.Trailing(orders, "amount", "sum", over="30d", entity=customer, name="spend_30d"),
        aj.Trailing(orders, None, "count", over="365d", entity=customer, name="orders_365d"),
        aj.Trailing(views, None, "count", over="7d", entity=customer, name="views_7d"),
    ]


def datagen(orders: int, seed: int) -> Path:
    """The nursery demo tables as Parquet (8 orders per customer: orders / 8 entities)."""
    folder = DATA / f"orders_{orders}_seed_{seed}"
    if all((folder / f"{t}.parquet").exists() for t in TABLES):
        return folder
    import pyarrow.parquet as pq

    from asof_join.demo import make_demo_data

    folder.mkdir(parents=True, exist_ok=True)
    tables = make_demo_data(orders, seed)
    for name in TABLES:
        pq.write_table(tables[name], folder / f"{name}.parquet")
    return folder


# --- one method in a child process ---------------------------------------------------------------


def child(method: str, folder: Path, days: int, out: Path) -> dict[str, Any]:
    import duckdb

    import asof_join as aj

    base = resource.getrusage(resource.RUSAGE_SELF).ru_maxrss * 1024
    data = {t: str(folder / f"{t}.parquet") for t in TABLES if t != "customers"}
    end = START + dt.timedelta(days=days - 1)
    started = time.perf_counter()
    extra: dict[str, Any] = {}
    if method == "build":
        spine = out.parent / "spine.parquet"
        t0 = time.perf_counter()
        duckdb.sql(
            f"COPY (SELECT c.customer_id, d.as_of FROM read_parquet('{folder}/customers.parquet')"
            f" AS c CROSS JOIN (SELECT TIMESTAMP '{START}' + to_days(CAST(i AS INTEGER)) AS as_of "
            f"FROM range({days}) AS r(i)) AS d ORDER BY d.as_of, c.customer_id) "
            f"TO '{spine}' (FORMAT parquet)"
        )
        extra["spine_seconds"] = time.perf_counter() - t0
        customer = aj.Entity("customer", keys=["customer_id"])
        labels = aj.EventTable("spine", time="as_of", entities=[customer])
        spec = aj.TrainingSetSpec(labels=labels, features=features())
        # the setting backfill() uses too: without it DuckDB plans the latest feature's ASOF
        # join as a nested loop once the label CTE is shared (see asof_join.backfill._connect)
        con = duckdb.connect()
        con.execute("SET asof_loop_join_threshold = 0")
        aj.build(spec, data={**data, "spine": str(spine)}, connection=con).write_parquet(out)
    else:
        chunk = {"backfill_30": 30, "backfill_90": 90}.get(method)
        if method == "extend":
            end += dt.timedelta(days=1)
        result = aj.backfill(
            features(),
            data=data,
            start=START,
            end=end,
            out=out,
            population=str(folder / "customers.parquet"),
            chunk=chunk,
            progress=False,
        )
        extra["partitions"] = len(result.written)
        extra["rows"] = result.rows
    seconds = time.perf_counter() - started
    peak = resource.getrusage(resource.RUSAGE_SELF).ru_maxrss * 1024
    return {"method": method, "seconds": seconds, "peak_rss": peak, "base_rss": base, **extra}


def run_child(method: str, folder: Path, days: int, out: Path, timeout: float) -> dict[str, Any]:
    if method == "extend":  # a copy of the finished default run
        shutil.rmtree(out, ignore_errors=True)
        shutil.copytree(WORK / "backfill", out)
    elif out.exists() and method != "rerun":
        shutil.rmtree(out) if out.is_dir() else out.unlink()
    argv = [sys.executable, __file__, "--child", method, "--folder", str(folder)]
    argv += ["--days", str(days), "--out", str(out)]
    proc = subprocess.run(argv, capture_output=True, text=True, timeout=timeout, check=False)
    for line in proc.stdout.splitlines():
        if line.startswith(RESULT_MARKER):
            return dict(json.loads(line[len(RESULT_MARKER) :]))
    msg = f"{method} failed (exit {proc.returncode}):\n{proc.stderr[-3000:]}"
    raise SystemExit(msg)


# --- checks ------------------------------------------------------------------------------------


def compare(build_file: Path, folder: Path) -> dict[str, int]:
    """Rows only on one side, and differing values per feature (floats to 1e-9 relative)."""
    import duckdb

    con = duckdb.connect()
    con.sql(f"CREATE VIEW a AS SELECT * FROM read_parquet('{build_file}')")
    con.sql(
        f"CREATE VIEW b AS SELECT * REPLACE (CAST(as_of AS TIMESTAMP) AS as_of) "
        f"FROM read_parquet('{folder}/*/*.parquet', hive_partitioning = true)"
    )
    diffs = []
    for name in FEATURE_NAMES:
        if name == "spend_30d":
            diffs.append(
                f"count(*) FILTER (WHERE a.{name} IS DISTINCT FROM b.{name} AND NOT "
                f"abs(a.{name} - b.{name}) <= 1e-9 * greatest(1, abs(a.{name}))) AS {name}"
            )
        else:
            diffs.append(f"count(*) FILTER (WHERE a.{name} IS DISTINCT FROM b.{name}) AS {name}")
    row = con.sql(
        "SELECT count(*) FILTER (WHERE a.customer_id IS NULL) AS only_backfill, "
        "count(*) FILTER (WHERE b.customer_id IS NULL) AS only_build, count(*) AS rows, "
        + ", ".join(diffs)
        + " FROM a FULL JOIN b USING (customer_id, as_of)"
    )
    return dict(zip(row.columns, row.fetchall()[0], strict=True))


# --- report ------------------------------------------------------------------------------------


def table(results: dict[str, dict[str, Any]], entities: int, days: int) -> str:
    lines = [
        f"{entities:,} entities x {days} daily snapshots = {entities * days:,} rows; three "
        "tables (profiles: latest with known_at; orders: trailing sum 30d and count 365d; "
        "views: trailing count 7d).",
        "",
        "| method | wall time | peak RSS | partitions |",
        "|---|---:|---:|---:|",
    ]
    for key, r in results.items():
        parts = r.get("partitions", 1)
        lines.append(
            f"| {METHODS[key]} | {r['seconds']:.1f} s | {r['peak_rss'] / MIB:,.0f} MiB | {parts} |"
        )
    spine = results.get("build", {}).get("spine_seconds")
    if spine is not None:
        lines += ["", f"The build() time includes writing the spine ({spine:.1f} s)."]
    return "\n".join(lines)


def main() -> int:
    parser = argparse.ArgumentParser(description=__doc__)
    parser.add_argument("--entities", default="100k", help="customers (default 100k)")
    parser.add_argument("--days", type=int, default=90)
    parser.add_argument("--seed", type=int, default=0)
    parser.add_argument("--only", help="comma-separated methods: " + ", ".join(METHODS))
    parser.add_argument("--timeout", type=float, default=3600)
    parser.add_argument("--out", help="write the results as JSON here")
    parser.add_argument("--child", help=argparse.SUPPRESS)
    parser.add_argument("--folder", help=argparse.SUPPRESS)
    args = parser.parse_args()
    if args.child:
        result = child(args.child, Path(args.folder), args.days, Path(args.out))
        print(RESULT_MARKER + json.dumps(result))
        return 0

    match = re.fullmatch(r"(\d+)([kM]?)", args.entities)
    if match is None:
        msg = f"--entities takes e.g. 100k or 2M, got {args.entities!r}"
        raise SystemExit(msg)
    entities = int(match.group(1)) * {"": 1, "k": 1_000, "M": 1_000_000}[match.group(2)]
    folder = datagen(entities * 8, args.seed)
    methods = args.only.split(",") if args.only else list(METHODS)
    WORK.mkdir(parents=True, exist_ok=True)
    results: dict[str, dict[str, Any]] = {}
    for key in methods:
        if key in ("rerun", "extend") and not (WORK / "backfill" / "_manifest.json").exists():
            msg = f"{key} needs the folder of a finished 'backfill' run: run that method first"
            raise SystemExit(msg)
        out = WORK / {"build": "build.parquet", "rerun": "backfill"}.get(key, key)
        results[key] = run_child(key, folder, args.days, out, args.timeout)
        r = results[key]
        print(f"{key:<12} {r['seconds']:8.1f} s {r['peak_rss'] / MIB:8.0f} MiB peak", flush=True)
    failures = []
    if "build" in results:
        for key in results:
            if key not in ("build", "rerun", "extend"):
                check = compare(WORK / "build.parquet", WORK / key)
                results[key]["check"] = check
                bad = {k: v for k, v in check.items() if k != "rows" and v}
                if bad or check["rows"] != entities * args.days:
                    failures.append(f"{key}: {check}")
    print()
    print(table(results, entities, args.days))
    if args.out:
        info = {"python": platform.python_version(), "cpus": os.cpu_count()}
        doc = {"entities": entities, "days": args.days, "machine": info, "results": results}
        Path(args.out).write_text(json.dumps(doc, indent=2) + "\n", encoding="utf-8")
    if failures:
        print("\nCHECK FAILED:\n  " + "\n  ".join(failures), file=sys.stderr)
        return 1
    print("\nchecks: every backfill partition equals the build() rows for its day")
    return 0


if __name__ == "__main__":
    sys.exit(main())
