"""Spark engine benchmark: the one- and three-table builds on Spark local[N] next to DuckDB.

Local Spark on a laptop is not where Spark wins: one JVM, a few cores, and every stage boundary
is a shuffle through local disk. The numbers show what the Spark engine costs when one machine
would do, not what a cluster does with data that does not fit one.
"""

from __future__ import annotations

import argparse
import json
import platform
import shutil
import sys
import tempfile
import time
from pathlib import Path
from typing import Any

sys.path.insert(0, str(Path(__file__).resolve().parent))

import datagen
from methods import _spec

SCENARIOS = {"one": "plain", "three": "three"}  # name -> methods._spec kind
TITLES = {"one": "one table, plain latest", "three": "three tables, plain latest"}


def _data(ds: datagen.Dataset, scenario: str) -> dict[str, str]:
    paths = ds.paths()
    names = ["labels", "profiles"] + (["prices", "stats"] if scenario == "three" else [])
    return {name: paths[name] for name in names}


def _timed(fn: Any, *args: Any) -> tuple[float, Any]:
    started = time.perf_counter()
    out = fn(*args)
    return time.perf_counter() - started, out


def _duckdb_arrow(spec: Any, data: dict[str, str]) -> Any:
    import asof_join as aj

    return aj.build(spec, data=data).to_arrow()


def _spark_arrow(spec: Any, data: dict[str, str], spark: Any) -> Any:
    import asof_join as aj

    return aj.build(spec, data=data, engine="spark", spark=spark).to_arrow()


def _spark_parquet(spec: Any, data: dict[str, str], spark: Any, out: Path) -> None:
    import asof_join as aj

    aj.build(spec, data=data, engine="spark", spark=spark).write_parquet(out)


def _same(a: Any, b: Any) -> bool:
    """Equal schemas' names and equal values, nulls included, in the same row order."""
    if a.column_names != b.column_names or a.num_rows != b.num_rows:
        return False
    return all(a.column(i).equals(b.column(i).cast(a.column(i).type)) for i in range(a.num_columns))


def _session(master: str, memory: str, partitions: int) -> Any:
    from pyspark.sql import SparkSession

    spark = (
        SparkSession.builder.master(master)
        .appName("asof_join-bench")
        .config("spark.driver.memory", memory)
        .config("spark.sql.shuffle.partitions", str(partitions))
        .config("spark.sql.session.timeZone", "UTC")
        .config("spark.ui.enabled", "false")
        .config("spark.ui.showConsoleProgress", "false")
        .getOrCreate()
    )
    spark.sparkContext.setLogLevel("ERROR")
    return spark


def run(args: argparse.Namespace) -> dict[str, Any]:
    import os

    import duckdb
    import pyspark

    ds = datagen.ensure_dataset(args.labels, args.rows, seed=args.seed, cache_dir=args.cache_dir)
    results: dict[str, Any] = {
        "labels": args.labels,
        "rows": args.rows,
        "master": args.master,
        "repeat": args.repeat,
        "machine": {
            "python": platform.python_version(),
            "cpus": os.cpu_count(),
            "load_avg_start": os.getloadavg()[0],
            "duckdb": duckdb.__version__,
            "pyspark": pyspark.__version__,
        },
        "scenarios": {},
    }
    started, spark = _timed(_session, args.master, args.driver_memory, args.partitions)
    results["spark_session_start_s"] = round(started, 1)
    work = Path(tempfile.mkdtemp(prefix="aj-bench-spark-"))
    try:
        for scenario, kind in SCENARIOS.items():
            spec = _spec(kind)
            data = _data(ds, scenario)
            row: dict[str, Any] = {"title": TITLES[scenario]}
            duck_times, spark_times, write_times = [], [], []
            reference = got = None
            for _ in range(args.repeat):
                t, reference = _timed(_duckdb_arrow, spec, data)
                duck_times.append(t)
            for _ in range(args.repeat):
                t, got = _timed(_spark_arrow, spec, data, spark)
                spark_times.append(t)
            for i in range(args.repeat):
                out = work / f"{scenario}_{i}"
                t, _ = _timed(_spark_parquet, spec, data, spark, out)
                write_times.append(t)
                shutil.rmtree(out, ignore_errors=True)
            row["duckdb_to_arrow_s"] = [round(x, 2) for x in duck_times]
            row["spark_to_arrow_s"] = [round(x, 2) for x in spark_times]
            row["spark_write_parquet_s"] = [round(x, 2) for x in write_times]
            row["same_values"] = bool(
                reference is not None
                and got is not None
                and _same(
                    reference.replace_schema_metadata(None), got.replace_schema_metadata(None)
                )
            )
            results["scenarios"][scenario] = row
            print(json.dumps({scenario: row}), file=sys.stderr)
    finally:
        shutil.rmtree(work, ignore_errors=True)
        spark.stop()
    results["load_avg_end"] = os.getloadavg()[0]
    return results


def markdown(results: dict[str, Any]) -> str:
    """The README table for one run."""
    best = min  # the fastest of the repeats: the least disturbed by other load on the machine
    lines = [
        f"{results['labels']:,} labels, {results['rows']:,} rows per feature table; Spark "
        f"`{results['master']}` (session start {results['spark_session_start_s']} s, not "
        f"counted); best of {results['repeat']} runs, in seconds.",
        "",
        "| scenario | DuckDB `to_arrow()` | Spark `to_arrow()` | Spark `write_parquet()` | "
        "same values |",
        "|---|---:|---:|---:|---|",
    ]
    for row in results["scenarios"].values():
        lines.append(
            f"| {row['title']} | {best(row['duckdb_to_arrow_s']):.1f} | "
            f"{best(row['spark_to_arrow_s']):.1f} | {best(row['spark_write_parquet_s']):.1f} | "
            f"{'yes' if row['same_values'] else 'NO'} |"
        )
    return "\n".join(lines)


def main(argv: list[str] | None = None) -> int:
    """Command line."""
    parser = argparse.ArgumentParser(description=__doc__)
    parser.add_argument("--labels", type=datagen.parse_count, default=1_000_000)
    parser.add_argument("--rows", type=datagen.parse_count, default=None, help="default: labels")
    parser.add_argument("--repeat", type=int, default=2)
    parser.add_argument("--seed", type=int, default=0)
    parser.add_argument("--cache-dir", type=Path, default=datagen.DEFAULT_CACHE)
    parser.add_argument("--master", default="local[2]")
    parser.add_argument("--driver-memory", default="4g")
    parser.add_argument("--partitions", type=int, default=8, help="spark.sql.shuffle.partitions")
    parser.add_argument("--out", type=Path, default=None, help="write the results JSON here")
    args = parser.parse_args(argv)
    args.rows = args.rows or args.labels
    results = run(args)
    if args.out is not None:
        args.out.parent.mkdir(parents=True, exist_ok=True)
        args.out.write_text(json.dumps(results, indent=2))
    print(markdown(results))
    ok = all(row["same_values"] for row in results["scenarios"].values())
    return 0 if ok else 1


if __name__ == "__main__":
    raise SystemExit(main())
