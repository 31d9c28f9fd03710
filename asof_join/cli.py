"""The asof-join command line: a thin shell over the public API; exit 0 ok, 1 findings, 2 errors."""

from __future__ import annotations

import argparse
import json
import os
import sys
import tempfile
import time
from collections.abc import Sequence
from contextlib import ExitStack
from importlib import resources
from pathlib import Path
from typing import TYPE_CHECKING

import asof_join as aj

if TYPE_CHECKING:
    import pyarrow as pa

    from asof_join import TrainingSetSpec
    from asof_join.demo import NaiveLeak

#: Exit codes. 1 is for audit findings at or above --fail-on.
EXIT_OK, EXIT_FINDINGS, EXIT_ERROR = 0, 1, 2
EXIT_BROKEN_PIPE = 128 + 13  # what a shell reports for a process ended by SIGPIPE
_OUTPUT_WRITERS = {".parquet": "write_parquet", ".csv": "write_csv"}


class UsageError(Exception):
    """A mistake on the command line itself (a malformed option); exits 2 like any error."""


def main(argv: list[str] | None = None) -> int:
    """Run ``asof-join`` with ``argv`` (default: ``sys.argv[1:]``); returns the exit code."""
    args = _parser().parse_args(argv)
    try:
        code: int = args.run(args)
    except BrokenPipeError:
        # The reader went away (`asof-join schema | head`): stop quietly, as a shell would on
        # SIGPIPE; point stdout at devnull so the flush at exit does not fail again.
        os.dup2(os.open(os.devnull, os.O_WRONLY), sys.stdout.fileno())
        return EXIT_BROKEN_PIPE
    except (aj.AsofJoinError, UsageError, OSError) as err:
        print(f"asof-join: error: {_one_line(err)}", file=sys.stderr)
        return EXIT_ERROR
    return code


def _parser() -> argparse.ArgumentParser:
    parser = argparse.ArgumentParser(
        prog="asof-join",
        description="Point-in-time correct training sets from a declarative spec.",
    )
    sub = parser.add_subparsers(dest="command", required=True, metavar="COMMAND")

    build = sub.add_parser("build", help="build a training set from a spec file")
    build.add_argument("spec", metavar="SPEC", help="YAML or JSON spec file")
    build.add_argument(
        "-o", "--output", required=True, metavar="OUT", help="output file: .parquet or .csv"
    )
    _add_data_option(build)
    build.add_argument("--provenance", action="store_true", help="add <name>__time/__known_at")
    build.add_argument("--memory-limit", metavar="SIZE", help="DuckDB memory limit, e.g. 2GB")
    build.add_argument("--temp-dir", metavar="DIR", help="where DuckDB spills when out of memory")
    build.add_argument("--threads", type=int, metavar="N", help="DuckDB threads")
    build.set_defaults(run=_build)

    sql = sub.add_parser(
        "sql",
        help="print the SQL a spec compiles to (reads the schemas and checks the time columns "
        "for nulls; runs no join)",
    )
    sql.add_argument("spec", metavar="SPEC", help="YAML or JSON spec file")
    sql.add_argument("--engine", choices=["duckdb", "spark"], default="duckdb")
    _add_data_option(sql)
    sql.set_defaults(run=_sql)

    audit = sub.add_parser(
        "audit",
        help="audit a training set for leakage (exit 1 when findings reach --fail-on)",
        description="Check a training set made by any tool against its spec: from its "
        "provenance columns when present, else by recomputing from the spec's tables. Exit 0 "
        "clean, 1 findings at or above --fail-on, 2 the audit could not run.",
    )
    audit.add_argument("train", metavar="TRAIN", help="the training set: Parquet or CSV file")
    audit.add_argument("--spec", required=True, metavar="SPEC", help="YAML or JSON spec file")
    audit.add_argument("--json", metavar="FILE", help="also write the report as JSON to FILE")
    audit.add_argument(
        "--fail-on",
        choices=["error", "warning"],
        default="error",
        help="lowest severity that exits 1 (default: error)",
    )
    _add_data_option(audit)
    audit.add_argument("--label", metavar="COLUMN", help="binary label column (label_proxy)")
    audit.add_argument(
        "--split", metavar="COLUMN", help="split column (default: 'split' when present)"
    )
    audit.add_argument(
        "--gap", default="0s", metavar="DURATION", help="gap between splits, e.g. 1d (default 0s)"
    )
    audit.add_argument(
        "--recompute", action="store_true", help="recompute features that have provenance too"
    )
    audit.add_argument("--memory-limit", metavar="SIZE", help="DuckDB memory limit, e.g. 2GB")
    audit.add_argument("--threads", type=int, metavar="N", help="DuckDB threads")
    audit.set_defaults(run=_audit)

    backfill = sub.add_parser(
        "backfill",
        help="write the features as of each time on a grid, as hive partitions",
        description="Write DIR/as_of=<T>/part-0.parquet for each T from --start to --end "
        "(inclusive) every --every, one row per entity key, and DIR/_manifest.json. "
        "Finished partitions are skipped; a killed run can simply be started again.",
    )
    backfill.add_argument("spec", metavar="SPEC", help="YAML or JSON spec file (its features)")
    backfill.add_argument("--start", required=True, metavar="TIME", help="first snapshot time")
    backfill.add_argument("--end", required=True, metavar="TIME", help="last snapshot time")
    backfill.add_argument("--every", default="1d", metavar="DURATION", help="step (default 1d)")
    backfill.add_argument("-o", "--output", required=True, metavar="DIR", help="output folder")
    backfill.add_argument(
        "--population", metavar="FILE", help="Parquet/CSV of the keys to write at every time"
    )
    backfill.add_argument(
        "--overwrite", action="store_true", help="replace a folder written for another spec"
    )
    _add_data_option(backfill)
    backfill.add_argument("--chunk", type=int, metavar="N", help="snapshot times per query")
    backfill.add_argument("--wait", action="store_true", help="wait for a run on the same DIR")
    backfill.add_argument(
        "--progress",
        action=argparse.BooleanOptionalAction,
        default=None,
        help="progress bar (default: when stderr is a terminal)",
    )
    backfill.add_argument("--memory-limit", metavar="SIZE", help="DuckDB memory limit, e.g. 2GB")
    backfill.add_argument("--temp-dir", metavar="DIR", help="where DuckDB spills")
    backfill.add_argument("--threads", type=int, metavar="N", help="DuckDB threads")
    backfill.set_defaults(run=_backfill)

    schema = sub.add_parser("schema", help="print the JSON Schema of the spec file format")
    schema.set_defaults(run=_schema)

    demo = sub.add_parser("demo", help="build a training set from invented nursery data")
    demo.add_argument("dir", nargs="?", metavar="DIR", help="keep data and train.parquet here")
    demo.add_argument("--orders", type=int, default=200_000, metavar="N", help="default 200000")
    demo.add_argument("--seed", type=int, default=0)
    demo.set_defaults(run=_demo)
    return parser


def _add_data_option(parser: argparse.ArgumentParser) -> None:
    parser.add_argument(
        "--data",
        action="append",
        default=[],
        metavar="NAME=PATH",
        help="bind table NAME to a Parquet/CSV path or glob (overrides its path: in the spec)",
    )


# --- subcommands -----------------------------------------------------------------------------


def _build(args: argparse.Namespace) -> int:
    out = Path(args.output)
    writer = _OUTPUT_WRITERS.get(out.suffix.lower())
    if writer is None:
        msg = f"cannot tell the format of {str(out)!r}: name the output *.parquet or *.csv"
        raise UsageError(msg)
    spec = aj.load_spec(args.spec)
    started = time.perf_counter()
    train = aj.build(
        spec,
        data=_bindings(spec, args.data),
        provenance=args.provenance,
        memory_limit=args.memory_limit,
        temp_dir=args.temp_dir,
        threads=args.threads,
    )
    getattr(train, writer)(out)
    elapsed = time.perf_counter() - started
    print(f"wrote {len(train):,} rows x {len(train.columns)} columns to {out} in {elapsed:.1f}s")
    return EXIT_OK


def _sql(args: argparse.Namespace) -> int:
    spec = aj.load_spec(args.spec)
    spark = _spark_session() if args.engine == "spark" else None
    # build() is lazy: it reads schemas, checks inputs and counts null times; the joins run
    # only when the result is read, so printing the SQL runs none.
    train = aj.build(spec, data=_bindings(spec, args.data), engine=args.engine, spark=spark)
    print(train.sql)
    return EXIT_OK


def _audit(args: argparse.Namespace) -> int:
    spec = aj.load_spec(args.spec)
    try:
        report = aj.audit(
            args.train,
            spec,
            data=_bindings(spec, args.data),
            label=args.label,
            split=args.split,
            gap=args.gap,
            recompute=args.recompute,
            memory_limit=args.memory_limit,
            threads=args.threads,
        )
    except (aj.AsofJoinError, OSError):
        raise
    except Exception as exc:  # exit 1 means findings: any other failure must not look like one
        msg = f"the audit could not run: {type(exc).__name__}: {exc}"
        raise UsageError(msg) from None
    print(report)
    if args.json is not None:
        Path(args.json).write_text(report.to_json() + "\n", encoding="utf-8")
    return EXIT_FINDINGS if report.fails(args.fail_on) else EXIT_OK


def _backfill(args: argparse.Namespace) -> int:
    spec = aj.load_spec(args.spec)
    result = aj.backfill(
        spec,
        data=_bindings(spec, args.data),
        start=args.start,
        end=args.end,
        every=args.every,
        out=args.output,
        population=args.population,
        overwrite=args.overwrite,
        memory_limit=args.memory_limit,
        temp_dir=args.temp_dir,
        threads=args.threads,
        progress=args.progress,
        chunk=args.chunk,
        wait=args.wait,
    )
    print(result)
    return EXIT_OK


def _schema(args: argparse.Namespace) -> int:
    print(json.dumps(aj.spec_json_schema(), indent=2))
    return EXIT_OK


def _demo(args: argparse.Namespace) -> int:
    import pyarrow.parquet as pq

    from asof_join.demo import naive_leak_count, write_demo_data

    if args.orders < 1:
        msg = f"--orders must be at least 1, got {args.orders}"
        raise UsageError(msg)
    with ExitStack() as stack:
        if args.dir is None:
            folder = Path(stack.enter_context(tempfile.TemporaryDirectory(prefix="asof-join-")))
        else:
            folder = Path(args.dir)
        started = time.perf_counter()
        paths = write_demo_data(folder, args.orders, args.seed)
        made = time.perf_counter() - started
        sizes = {name: pq.read_metadata(path).num_rows for name, path in paths.items()}

        packaged = resources.files("asof_join").joinpath("specs", "nursery.yaml")
        spec = aj.load_spec(stack.enter_context(resources.as_file(packaged)))
        data = {name: str(paths[name]) for name in spec.tables()}
        started = time.perf_counter()
        result = aj.build(spec, data=data)
        train = result.to_arrow()
        built = time.perf_counter() - started
        leaks = naive_leak_count(spec, data, train)
        if args.dir is not None:
            result.write_parquet(folder / "train.parquet")

        started = time.perf_counter()
        report = aj.audit(train, spec, data=data, label="returned")
        audited = time.perf_counter() - started
        print(_demo_summary(spec, sizes, train, leaks, made=made, built=built, seed=args.seed))
        verdict = "ok" if report.ok else "FAILED"
        rules = ", ".join(f"{f.rule.value} x{f.rows}" for f in report.findings) or "no findings"
        print(
            f"\naudit of the built set (recomputed from the sources): {verdict}; {rules}; "
            f"{audited:.1f}s"
        )
        kept = f"{folder} (with train.parquet)" if args.dir is not None else "a temp dir, removed"
        print(f"\nspec: asof_join/specs/nursery.yaml\ndata: {kept}")
    return EXIT_OK


def _demo_summary(
    spec: TrainingSetSpec,
    sizes: dict[str, int],
    train: pa.Table,
    leaks: list[NaiveLeak],
    *,
    made: float,
    built: float,
    seed: int,
) -> str:
    """The screenful `asof-join demo` prints (rows, match rates, naive-join leaks, timings)."""
    import pyarrow as pa
    import pyarrow.compute as pc

    rows = train.num_rows
    labels = spec.labels.name
    others = ", ".join(
        f"{name} {n:,}" for name, n in sizes.items() if name in spec.tables() and name != labels
    )
    returned = pc.mean(train.column("returned").cast("int8")).as_py()
    lines = [
        f"asof-join demo: an invented mail-order plant nursery, 2023-2024 (seed {seed})",
        f"  labels  {labels} {sizes[labels]:,}, {returned:.1%} returned; data made in {made:.1f}s",
        f"  tables  {others}",
        f"  built   {rows:,} rows x {train.num_columns} columns in {built:.1f}s",
        "",
        f"  {'feature':<14}{'non-null':>9}{'non-zero':>10}   {'naive join: from the future':>28}"
        f"   {'naive join: differs':>20}",
    ]
    by_name = {leak.feature: leak for leak in leaks}
    for name in spec.output_columns():
        column = train.column(name)
        share = f"{1 - column.null_count / rows:.1%}"
        nonzero = "-"
        if pa.types.is_integer(column.type) or pa.types.is_floating(column.type):
            nonzero = f"{pc.sum(pc.not_equal(column, 0)).as_py() / rows:.1%}"
        leak = by_name.get(name)
        future = differs = "-"
        if leak is not None:
            future = f"{leak.from_future:,} ({leak.from_future / rows:.0%})"
            differs = f"{leak.differs:,} ({leak.differs / rows:.0%})"
        lines.append(f"  {name:<14}{share:>9}{nonzero:>10}   {future:>28}   {differs:>20}")
    total = sum(leak.from_future for leak in leaks)
    lines += [
        "",
        "A join on the key alone (each key's newest row, time ignored) would have filled "
        f"{total:,} of",
        f"the {rows * len(leaks):,} latest-feature values above from rows valid at or after "
        "the order.",
    ]
    return "\n".join(lines)


# --- helpers ---------------------------------------------------------------------------------


def _bindings(spec: TrainingSetSpec, overrides: Sequence[str]) -> dict[str, str]:
    """Each table's ``path:`` from the spec (already absolute), then ``--data`` overrides."""
    data = {name: t.path for name, t in spec.tables().items() if t.path is not None}
    for item in overrides:
        name, sep, path = item.partition("=")
        if not sep or not name or not path:
            msg = f"--data takes NAME=PATH, got {item!r}"
            raise UsageError(msg)
        data[name] = path
    return data


def _spark_session() -> object:
    """The active Spark session, else a local one."""
    try:
        from pyspark.sql import SparkSession
    except ImportError:
        msg = "--engine spark needs pyspark: pip install 'asof_join[spark]'"
        raise UsageError(msg) from None
    session = (
        SparkSession.builder.master("local[1]")
        .appName("asof-join")
        .config("spark.ui.showConsoleProgress", "false")  # keep stderr for our messages
        .getOrCreate()
    )
    session.sparkContext.setLogLevel("ERROR")
    return session


def _one_line(err: BaseException) -> str:
    """An error message on one line: the first line, then the rest joined with '; '."""
    lines = [line.strip().removeprefix("- ") for line in str(err).splitlines() if line.strip()]
    if not lines:
        return type(err).__name__
    head, rest = lines[0], lines[1:]
    return head + (" " + "; ".join(rest) if rest else "")
