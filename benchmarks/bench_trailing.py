"""Trailing-window benchmark: aj.build against a DuckDB range join and polars, 7 and 30 days."""

from __future__ import annotations

import argparse
import datetime as dt
import json
import shutil
import subprocess
import sys
import tempfile
import time
from collections.abc import Callable
from dataclasses import dataclass
from pathlib import Path
from typing import Any

sys.path.insert(0, str(Path(__file__).resolve().parent))

# Only stdlib modules load here: this file is also the child process that runs one method, and
# its imports would count towards that method's memory. numpy, pyarrow and the benchmark
# helpers that need them (datagen, bench_core) are imported inside the parent's functions.
from methods import RESULT_MARKER, _lit, _peak_rss, _rss

HERE = Path(__file__).resolve().parent
README = HERE / "README.md"
SECTION = "# Trailing windows"
START = "<!-- trailing-results:start -->"
END = "<!-- trailing-results:end -->"
MIB = 1024 * 1024
US_PER_DAY = 86_400_000_000

# Bump when the generated data changes, so stale caches are rebuilt instead of reused.
GEN_VERSION = 1
VIEWS_PER_CUSTOMER = 200  # per ~13 months: about 4 views in 7 days, 16 in 30 days
LATE_LOAD_FRACTION = 0.10  # views loaded 1 to 10 days after they happened
EARLY_LOAD_FRACTION = 0.005  # loaded_at before viewed_at (clock skew): known time = valid time
SAME_INSTANT_FRACTION = 0.005  # views sharing customer and instant with another view
TIE_FRACTION = 0.01  # labels per edge kind stamped exactly on an edge of some view's interval

LABEL_COLUMNS = ("label_id", "customer_id", "event_at")
VALUES = ("n_views", "amount_sum", "amount_mean")
EXACT = ("n_views",)  # compared exactly; the others within RTOL
RTOL = 1e-9

METHOD_TITLES = {
    "build": "aj.build → to_arrow()",
    "range_join": "DuckDB range join + GROUP BY",
    "polars": "polars",
}
SHORT = {"build": "build()", "range_join": "range join", "polars": "polars"}
VARIANTS = {
    "fixed": "fixed delay (no known_at)",
    "known": "known_at column",
}


# --------------------------------------------------------------------------------------------
# Data


@dataclass(frozen=True)
class TrailingData:
    """Paths of one generated trailing-window dataset."""

    labels: Path
    views: Path
    n_labels: int
    n_views: int
    n_customers: int
    seed: int

    def paths(self) -> dict[str, str]:
        """Table name to Parquet path, as `aj.build(data=...)` takes it."""
        return {"labels": str(self.labels), "views": str(self.views)}


def _views_table(n_views: int, n_cust: int, seed: int) -> Any:
    import datagen
    import numpy as np
    import pyarrow as pa

    rng = np.random.default_rng([seed, n_views, n_cust, 3])
    cust = rng.integers(0, n_cust, size=n_views, dtype=np.int64)
    viewed = rng.integers(
        datagen.FEATURE_START_US, datagen.FEATURE_START_US + datagen.FEATURE_SPAN_US, size=n_views
    ).astype(np.int64)
    # A few views share their customer and instant with another view: a window takes all.
    k = int(SAME_INSTANT_FRACTION * n_views)
    dst, src = rng.integers(0, n_views, size=k), rng.integers(0, n_views, size=k)
    cust[dst], viewed[dst] = cust[src], viewed[src]
    lag = rng.exponential(datagen.US_PER_HOUR, size=n_views).astype(np.int64)
    late = rng.random(n_views) < LATE_LOAD_FRACTION
    lag[late] = rng.integers(US_PER_DAY, 10 * US_PER_DAY, size=int(late.sum()), dtype=np.int64)
    early = rng.random(n_views) < EARLY_LOAD_FRACTION
    lag[early] = -datagen.US_PER_HOUR
    return pa.table(
        {
            "customer_id": cust,
            "viewed_at": datagen._ts(viewed),
            "loaded_at": datagen._ts(viewed + lag),
            "amount": datagen._values(rng, rng.lognormal(3.0, 1.0, size=n_views)),
        }
    )


def _label_table(
    n_labels: int, n_cust: int, seed: int, views: Path, tie_offsets: tuple[int, ...]
) -> Any:
    import datagen
    import numpy as np
    import pyarrow as pa
    import pyarrow.parquet as pq

    rng = np.random.default_rng([seed, n_labels, n_cust, 4])
    # Ids at or above n_cust have no views: their windows are empty.
    unknown = datagen.UNKNOWN_CUSTOMER_FRACTION
    cust = rng.integers(0, int(n_cust * (1 + unknown)), size=n_labels).astype(np.int64)
    event = rng.integers(
        datagen.LABEL_START_US, datagen.LABEL_START_US + datagen.LABEL_SPAN_US, size=n_labels
    ).astype(np.int64)

    v = pq.read_table(views, columns=["customer_id", "viewed_at", "loaded_at"])
    vk = v.column("customer_id").to_numpy()
    vs = v.column("viewed_at").cast(pa.int64()).to_numpy()
    vl = np.maximum(v.column("loaded_at").cast(pa.int64()).to_numpy(), vs)
    del v
    free = np.ones(n_labels, dtype=bool)
    # Labels stamped at a view's known time, and at its valid time + each offset (0, the delay,
    # each window): every edge of "visible" and of "in the window" is hit exactly.
    for times in [vl] + [vs + off for off in tie_offsets]:
        in_range = times < datagen.LABEL_START_US + datagen.LABEL_SPAN_US
        datagen._copy_ties(rng, TIE_FRACTION, free, cust, event, vk[in_range], times[in_range])

    return pa.table(
        {
            # label_id is the label's position in generation order; the file is shuffled below.
            "label_id": np.arange(n_labels, dtype=np.int64),
            "customer_id": cust,
            "event_at": datagen._ts(event),
        }
    ).take(rng.permutation(n_labels))


def ensure_trailing_data(
    n_labels: int,
    n_views: int,
    *,
    tie_offsets_us: tuple[int, ...],
    seed: int = 0,
    per_customer: int = VIEWS_PER_CUSTOMER,
    cache_dir: Path | None = None,
    force: bool = False,
) -> TrailingData:
    """Generate (or reuse) the views table and a label table with ties on the given offsets."""
    import datagen

    cache = Path(cache_dir or datagen.DEFAULT_CACHE)
    n_cust = max(10, n_views // per_customer)
    vdir = cache / f"trailing_views{n_views}_cust{n_cust}_seed{seed}"
    offsets = sorted(set(tie_offsets_us))
    ldir = vdir / f"labels{n_labels}_ties_{'_'.join(_fmt_window(o) for o in offsets)}"
    views, labels = vdir / "views.parquet", ldir / "labels.parquet"

    vman = {"version": GEN_VERSION, "views": n_views, "customers": n_cust, "seed": seed}
    vman_path = vdir / "manifest.json"
    if force or not datagen._manifest_ok(vman_path, vman) or not views.exists():
        print(f"generating views: {n_views:,} rows, {n_cust:,} customers -> {views}", flush=True)
        vman_path.unlink(missing_ok=True)
        datagen._write(_views_table(n_views, n_cust, seed), views)
        vman_path.write_text(json.dumps(vman))
        force = True  # labels copy times from the views: rebuild them too

    lman = {**vman, "labels": n_labels}
    lman_path = ldir / "manifest.json"
    if force or not datagen._manifest_ok(lman_path, lman) or not labels.exists():
        print(f"generating labels: {n_labels:,} rows -> {labels}", flush=True)
        lman_path.unlink(missing_ok=True)
        datagen._write(_label_table(n_labels, n_cust, seed, views, tuple(offsets)), labels)
        lman_path.write_text(json.dumps(lman))

    return TrailingData(labels, views, n_labels, n_views, n_cust, seed)


# --------------------------------------------------------------------------------------------
# Methods (each runs in a fresh child process)


def build_arrow(params: dict[str, Any]) -> Any:
    """aj.build with count (rows), sum and mean of amount over one window, to Arrow."""
    import asof_join as aj

    customer = aj.Entity("customer", keys=["customer_id"])
    labels = aj.EventTable("labels", time="event_at", entities=[customer])
    if params["variant"] == "known":
        views = aj.EventTable("views", time="viewed_at", known_at="loaded_at", entities=[customer])
    else:
        delay = dt.timedelta(microseconds=params["delay_us"])
        views = aj.EventTable("views", time="viewed_at", delay=delay, entities=[customer])
    over = dt.timedelta(microseconds=params["window_us"])
    spec = aj.TrainingSetSpec(
        labels=labels,
        features=[
            aj.Trailing(views, None, "count", over=over, name="n_views"),
            aj.Trailing(views, "amount", "sum", over=over, name="amount_sum"),
            aj.Trailing(views, "amount", "mean", over=over, name="amount_mean"),
        ],
    )
    return aj.build(spec, data=params["paths"]).to_arrow()


def range_join_sql(params: dict[str, Any]) -> str:
    """Join every view in the window to its label, then GROUP BY the label row.

    Visible: ``viewed_at + delay < event_at`` (fixed delay) or ``greatest(loaded_at,
    viewed_at) < event_at`` (known_at); in the window: ``viewed_at > event_at - w``.
    """
    paths = params["paths"]
    w = int(params["window_us"])
    if params["variant"] == "known":
        visible = "greatest(v.loaded_at, v.viewed_at) < l.event_at"
    else:
        visible = f"v.viewed_at + to_microseconds({int(params['delay_us'])}) < l.event_at"
    prefix = params.get("max_labels")
    where = "" if prefix is None else f"\n  WHERE file_row_number < {int(prefix)}"
    return f"""
WITH l AS (
  SELECT * FROM read_parquet({_lit(paths["labels"])}, file_row_number = true){where}
)
SELECT l.label_id, l.customer_id, l.event_at,
       count(v.viewed_at) AS n_views,
       coalesce(sum(v.amount), 0) AS amount_sum,
       avg(v.amount) AS amount_mean
FROM l LEFT JOIN read_parquet({_lit(paths["views"])}) AS v
  ON v.customer_id = l.customer_id
 AND v.viewed_at > l.event_at - to_microseconds({w})
 AND {visible}
GROUP BY l.file_row_number, l.label_id, l.customer_id, l.event_at
ORDER BY l.file_row_number
"""


def range_join(params: dict[str, Any]) -> Any:
    """The straightforward DuckDB range join, label order kept via file_row_number."""
    import duckdb

    con = duckdb.connect()
    con.execute("SET enable_progress_bar = false")
    return con.sql(range_join_sql(params)).to_arrow_table()


def polars_rolling(params: dict[str, Any]) -> Any:
    """Fixed delay d: rolling sums by time per customer over labels and views together.

    A label at t is placed at t - d with window w - d and ``closed="none"``, so it reads the
    views with t - w < viewed_at < t - d: the open interval makes both the window's far edge
    and strict visibility exclusive. Label rows carry a null amount and a zero row count, so
    they add nothing to any window. Three rolling sums: rows, amounts and non-null amounts.
    """
    import polars as pl

    paths, d, w = params["paths"], int(params["delay_us"]), int(params["window_us"])
    labels = (
        pl.scan_parquet(paths["labels"])
        .with_row_index("_pos")
        .with_columns(
            (pl.col("event_at") - pl.duration(microseconds=d)).alias("_t"),
            pl.lit(None, pl.Float64).alias("amount"),
            pl.lit(0, pl.Int64).alias("_one"),
        )
    )
    views = pl.scan_parquet(paths["views"]).select(
        "customer_id", pl.col("viewed_at").alias("_t"), "amount", pl.lit(1, pl.Int64).alias("_one")
    )

    def roll(x: pl.Expr) -> pl.Expr:
        size = dt.timedelta(microseconds=w - d)
        return x.rolling_sum_by("_t", size, closed="none").over("customer_id").fill_null(0)

    return (
        pl.concat([views, labels], how="diagonal_relaxed")
        .sort("customer_id", "_t")
        .with_columns(
            roll(pl.col("_one")).alias("n_views"),
            roll(pl.col("amount")).alias("_s"),
            roll(pl.col("amount").is_not_null().cast(pl.Int64)).alias("_nn"),
        )
        .filter(pl.col("_pos").is_not_null())
        .sort("_pos")
        .select(*LABEL_COLUMNS, "n_views", *_sum_mean())
        .collect()
    )


def _sum_mean() -> list[Any]:
    """amount_sum and amount_mean from a running sum ``_s`` and non-null count ``_nn``.

    Both polars formulations add values as they enter the window and subtract them as they
    leave, which leaves rounding residue (about 1e-14) where nothing is left: a window without
    a non-null amount sums to exactly 0, as the contract and SQL's coalesce(sum, 0) say.
    """
    import polars as pl

    some = pl.col("_nn") > 0
    return [
        pl.when(some).then(pl.col("_s")).otherwise(0.0).alias("amount_sum"),
        pl.when(some).then(pl.col("_s") / pl.col("_nn")).alias("amount_mean"),
    ]


def polars_sweep(params: dict[str, Any]) -> Any:
    """known_at: each view counts for label times in (a, b), a = max(loaded_at, viewed_at),
    b = viewed_at + w. Enter rows at a (+value), exit rows at b (-value) and labels are sorted
    by customer, time and kind (exit, label, enter at equal times: strict at both edges); a
    running sum per customer at a label row is its window.
    """
    import polars as pl

    paths, w = params["paths"], int(params["window_us"])
    views = (
        pl.scan_parquet(paths["views"])
        .select(
            "customer_id",
            pl.max_horizontal("loaded_at", "viewed_at").dt.epoch("us").alias("_a"),
            (pl.col("viewed_at").dt.epoch("us") + w).alias("_b"),
            pl.col("amount").fill_null(0.0).alias("_x"),
            pl.col("amount").is_not_null().cast(pl.Int64).alias("_nn"),
        )
        .filter(pl.col("_a") < pl.col("_b"))  # an empty interval never counts
    )
    enter = views.select(
        "customer_id",
        pl.col("_a").alias("_p"),
        pl.lit(2).alias("_kind"),
        pl.lit(1).alias("_dn"),
        pl.col("_x").alias("_ds"),
        pl.col("_nn").alias("_dnn"),
    )
    leave = views.select(
        "customer_id",
        pl.col("_b").alias("_p"),
        pl.lit(0).alias("_kind"),
        pl.lit(-1).alias("_dn"),
        (-pl.col("_x")).alias("_ds"),
        (-pl.col("_nn")).alias("_dnn"),
    )
    labels = (
        pl.scan_parquet(paths["labels"])
        .with_row_index("_pos")
        .with_columns(
            pl.col("event_at").dt.epoch("us").alias("_p"),
            pl.lit(1).alias("_kind"),
            pl.lit(0).alias("_dn"),
            pl.lit(0.0).alias("_ds"),
            pl.lit(0).alias("_dnn"),
        )
    )
    run = [pl.col(c).cum_sum().over("customer_id") for c in ("_dn", "_ds", "_dnn")]
    return (
        pl.concat([leave, enter, labels], how="diagonal_relaxed")
        .sort("customer_id", "_p", "_kind")
        .with_columns(run[0].alias("n_views"), run[1].alias("_s"), run[2].alias("_nn"))
        .filter(pl.col("_kind") == 1)
        .sort("_pos")
        .select(*LABEL_COLUMNS, "n_views", *_sum_mean())
        .collect()
    )


def polars_method(params: dict[str, Any]) -> Any:
    """polars: rolling sums for a fixed delay, an enter/exit sweep for known_at."""
    return polars_sweep(params) if params["variant"] == "known" else polars_rolling(params)


METHODS: dict[str, Callable[[dict[str, Any]], Any]] = {
    "build": build_arrow,
    "range_join": range_join,
    "polars": polars_method,
}


def _import(method: str) -> None:
    """Load the method's libraries before the clock starts."""
    if method == "build":
        import asof_join  # noqa: F401
    elif method == "range_join":
        import duckdb  # noqa: F401
        import pyarrow  # noqa: F401
    else:
        import polars  # noqa: F401


def run_child(params: dict[str, Any]) -> dict[str, Any]:
    """Run one method, timed; then dump label_id and the feature values for the check."""
    method = params["method"]
    _import(method)
    base = _rss()
    t0 = time.perf_counter()
    result = METHODS[method](params)
    seconds = time.perf_counter() - t0
    peak = _peak_rss()
    table = result if method != "polars" else result.to_arrow()
    report: dict[str, Any] = {
        "seconds": seconds,
        "peak_rss": peak,
        "base_rss": base,
        "rows": table.num_rows,
        "columns": table.column_names,
        "types": [str(t) for t in table.schema.types],
    }
    if params.get("dump"):
        import pyarrow.parquet as pq

        keep = [c for c in ("label_id", *VALUES) if c in table.column_names]
        pq.write_table(table.select(keep), params["dump"])
    return report


def _child_main(arg: str) -> int:
    import traceback

    try:
        report = run_child(json.loads(arg))
    except Exception as exc:  # reported to the parent, which fails the run
        report = {"error": f"{type(exc).__name__}: {exc}", "traceback": traceback.format_exc()}
    sys.stdout.write(RESULT_MARKER + json.dumps(report) + "\n")
    sys.stdout.flush()
    return 0


def _spawn(params: dict[str, Any], timeout: float | None) -> dict[str, Any]:
    cmd = [sys.executable, str(Path(__file__).resolve()), "--child", json.dumps(params)]
    try:
        proc = subprocess.run(cmd, capture_output=True, text=True, timeout=timeout, check=False)
    except subprocess.TimeoutExpired:
        return {"error": f"timed out after {timeout} s"}
    for line in reversed(proc.stdout.splitlines()):
        if line.startswith(RESULT_MARKER):
            rep: dict[str, Any] = json.loads(line[len(RESULT_MARKER) :])
            return rep
    tail = (proc.stderr or proc.stdout)[-2000:]
    return {"error": f"child exited with code {proc.returncode} and no result:\n{tail}"}


# --------------------------------------------------------------------------------------------
# Checking


def _load(path: Path) -> dict[str, Any]:
    """label_id and value columns as numpy arrays; nulls become NaN."""
    import numpy as np
    import pyarrow.parquet as pq

    t = pq.read_table(path)
    out: dict[str, Any] = {"label_id": t.column("label_id").to_numpy()}
    for c in VALUES:
        if c in t.column_names:
            out[c] = t.column(c).cast("float64").to_numpy(zero_copy_only=False).astype(np.float64)
    return out


def compare(ref: dict[str, Any], got: dict[str, Any], n: int) -> dict[str, int]:
    """Mismatches per value column over the first ``n`` rows: counts exactly, the others within
    a relative tolerance of RTOL; null against null is equal, null against a value is not."""
    import numpy as np

    mism: dict[str, int] = {}
    for c in VALUES:
        if c not in ref or c not in got or len(ref[c]) < n or len(got[c]) < n:
            mism[c] = n
            continue
        a, b = ref[c][:n], got[c][:n]
        both_null = np.isnan(a) & np.isnan(b)
        if c in EXACT:
            same = a == b
        else:
            with np.errstate(invalid="ignore"):
                same = np.abs(a - b) <= RTOL * np.maximum(np.abs(a), np.abs(b))
        mism[c] = int((~(same | both_null)).sum())
    return mism


def _verify(
    case: dict[str, Any], dumps: dict[str, Path], label_ids: Any, label_types: list[str]
) -> list[str]:
    """Rows, label order, columns and types of each method, and its values against a
    reference: build() against the range join, polars against build(). Fills each method's
    "check"; returns the problems found."""
    import numpy as np

    refs = {"build": "range_join", "polars": "build"}
    failures: list[str] = []
    loaded = {m: _load(p) for m, p in dumps.items()}
    for method, res in case["methods"].items():
        if res.get("error") or method not in loaded:
            continue
        got = loaded[method]
        n = res["labels_run"]
        problems: list[str] = []
        if res.get("rows") != n:
            problems.append(f"{res.get('rows')} rows, expected {n}")
        if res.get("columns") != [*LABEL_COLUMNS, *VALUES]:
            problems.append(f"columns {res.get('columns')}, expected {[*LABEL_COLUMNS, *VALUES]}")
        if (res.get("types") or [])[: len(LABEL_COLUMNS)] != label_types:
            problems.append(f"label column types {res.get('types')}, input has {label_types}")
        ids = got["label_id"]
        order = int((ids != label_ids[:n]).sum()) if len(ids) == n else n
        if order:
            problems.append(f"{order} rows out of label input order")
        # A window without a non-null amount (mean null) must sum to exactly 0.
        residue = int((np.isnan(got["amount_mean"]) & (got["amount_sum"] != 0)).sum())
        ref = refs.get(method)
        check: dict[str, Any] = {
            "reference": ref,
            "label_order_mismatches": order,
            "nonzero_empty_sums": residue,
        }
        if ref in loaded and not case["methods"][ref].get("error"):
            common = min(n, case["methods"][ref]["labels_run"])
            mism = compare(loaded[ref], got, common)
            check["compared_rows"] = common
            check["value_mismatches"] = mism
            if any(mism.values()):
                why = (
                    f" ({residue:,} of its {n:,} windows without an amount sum to non-zero)"
                    if residue
                    else ""
                )
                problems.append(f"value mismatches vs {ref} on {common:,} rows: {mism}{why}")
        check["nulls"] = {c: int(np.isnan(got[c]).sum()) for c in VALUES if c in got}
        check["ok"] = not problems
        check["problems"] = problems
        res["check"] = check
        failures += [f"{case['key']} {method}: {p}" for p in problems]
    return failures


# --------------------------------------------------------------------------------------------
# Running


def _fmt_window(us: int) -> str:
    if us == 0:
        return "0"
    for unit, size in (("d", US_PER_DAY), ("h", 3_600_000_000), ("m", 60_000_000)):
        if us % size == 0:
            return f"{us // size}{unit}"
    return f"{us}us"


def _cases(args: argparse.Namespace) -> list[dict[str, Any]]:
    cases = [{"variant": "fixed", "window_us": w} for w in args.windows]
    cases += [{"variant": "known", "window_us": w} for w in args.known_windows]
    for c in cases:
        c["key"] = f"{c['variant']}:{_fmt_window(c['window_us'])}"
    return cases


def run(args: argparse.Namespace) -> dict[str, Any]:
    """Run every case and method; returns the JSON-able result document."""
    import bench_core
    import pyarrow.parquet as pq

    offsets = (0, args.delay_us, *args.windows, *args.known_windows)
    data = ensure_trailing_data(
        args.labels,
        args.views,
        tie_offsets_us=offsets,
        seed=args.seed,
        per_customer=args.views_per_customer,
        cache_dir=args.cache_dir,
    )
    prefix = args.range_join_max_labels
    if prefix is not None and prefix >= args.labels:
        prefix = None
    methods = [m for m in METHODS if m in args.only and m not in args.skip]
    cases = _cases(args)
    failures: list[str] = []
    work = Path(tempfile.mkdtemp(prefix="bench_trailing_", dir=args.cache_dir))
    bench_core._warm(list(data.paths().values()))
    label_file = pq.read_table(data.labels, columns=list(LABEL_COLUMNS))
    label_ids = label_file.column("label_id").to_numpy()
    label_types = [str(t) for t in label_file.schema.types]
    del label_file
    try:
        for case in cases:
            print(
                f"\n== {case['key']}: {VARIANTS[case['variant']]}, window "
                f"{_fmt_window(case['window_us'])}",
                flush=True,
            )
            runs: dict[str, list[dict[str, Any]]] = {m: [] for m in methods}
            dumps: dict[str, Path] = {}
            for rep in range(args.repeat):
                for m in methods:  # round-robin, so background noise spreads over methods
                    p: dict[str, Any] = {
                        "method": m,
                        "variant": case["variant"],
                        "window_us": case["window_us"],
                        "delay_us": args.delay_us,
                        "paths": data.paths(),
                    }
                    if m == "range_join" and prefix is not None:
                        p["max_labels"] = prefix
                    if rep == 0:
                        p["dump"] = str(work / f"{m}.parquet")
                    r = _spawn(p, args.timeout)
                    if r.get("error"):
                        print(f"  {m:12s} run {rep + 1}: FAILED: {r['error']}", flush=True)
                        if r.get("traceback") and args.verbose:
                            print(r["traceback"])
                    else:
                        print(
                            f"  {m:12s} run {rep + 1}: {r['seconds']:8.3f} s "
                            f"{r['peak_rss'] / MIB:8.0f} MiB peak",
                            flush=True,
                        )
                        if "dump" in p:
                            dumps[m] = Path(p["dump"])
                    runs[m].append(r)
            case["methods"] = {}
            for m in methods:
                ok = [r for r in runs[m] if not r.get("error")]
                err = next((r["error"] for r in runs[m] if r.get("error")), None)
                n = prefix if m == "range_join" and prefix is not None else args.labels
                median_s = bench_core._median([r["seconds"] for r in ok])
                case["methods"][m] = {
                    "title": METHOD_TITLES[m],
                    "labels_run": n,
                    "runs": [
                        {k: r.get(k) for k in ("seconds", "peak_rss", "base_rss", "error")}
                        for r in runs[m]
                    ],
                    "median_s": median_s,
                    # a prefix run is scaled to all labels: the join's work is linear in labels
                    "full_s": None if median_s is None else median_s * args.labels / n,
                    "extrapolated": n != args.labels,
                    "median_peak_mib": bench_core._median([r["peak_rss"] / MIB for r in ok]),
                    "base_mib": bench_core._median([r["base_rss"] / MIB for r in ok]),
                    "rows": ok[0].get("rows") if ok else None,
                    "columns": ok[0].get("columns") if ok else None,
                    "types": ok[0].get("types") if ok else None,
                    "error": err,
                }
                if err:
                    failures.append(f"{case['key']} {m}: {err.splitlines()[0]}")
            failures += _verify(case, dumps, label_ids, label_types)
            for f in dumps.values():
                f.unlink(missing_ok=True)
    finally:
        shutil.rmtree(work, ignore_errors=True)

    return {
        "benchmark": "trailing",
        "created": time.strftime("%Y-%m-%dT%H:%M:%S%z"),
        "labels": args.labels,
        "views": args.views,
        "customers": data.n_customers,
        "seed": args.seed,
        "repeat": args.repeat,
        "delay_us": args.delay_us,
        "range_join_labels": prefix or args.labels,
        "aggregates": "count of rows, sum(amount), mean(amount): three Trailing features in "
        "one spec, one window per case",
        "machine": bench_core._machine(),
        "cases": cases,
        "failures": failures,
        "ok": not failures,
    }


# --------------------------------------------------------------------------------------------
# Report


def _num(value: float | None, digits: int) -> str:
    return "–" if value is None else f"{value:.{digits}f}"


def _result(m: dict[str, Any]) -> str:
    if m.get("error"):
        return "**failed**"
    check = m.get("check")
    if not check:
        return "unchecked"
    rows = check.get("compared_rows")
    mism = sum((check.get("value_mismatches") or {}).values())
    versus = "" if rows is None else f" vs {SHORT[check['reference']]} on {rows:,} rows"
    if not check["ok"]:
        return f"**{mism} mismatches{versus}**" if mism else "**wrong**"
    if check["reference"] is None:
        return "reference"
    return "not compared" if rows is None else f"0 mismatches{versus}"


def _seconds(doc: dict[str, Any], case: str, method: str) -> float | None:
    for c in doc["cases"]:
        if c["key"] == case:
            m = c.get("methods", {}).get(method, {})
            return None if m.get("error") else m.get("full_s")
    return None


def _targets(doc: dict[str, Any]) -> list[str]:
    """The issue's two targets, measured; reported, never asserted."""
    lines: list[str] = []
    fixed = [c for c in doc["cases"] if c["variant"] == "fixed"]
    if not fixed:
        return lines
    longest = max(fixed, key=lambda c: c["window_us"])
    shortest = min(fixed, key=lambda c: c["window_us"])
    lw, sw = _fmt_window(longest["window_us"]), _fmt_window(shortest["window_us"])
    build_l = _seconds(doc, longest["key"], "build")
    range_l = _seconds(doc, longest["key"], "range_join")
    if build_l and range_l:
        speedup = range_l / build_l
        lines.append(
            f"Target: build() at least 5× faster than the range join at {lw}: "
            f"{speedup:.1f}× ({'met' if speedup >= 5 else 'missed'})."
        )
    build_s = _seconds(doc, shortest["key"], "build")
    if build_l and build_s and longest is not shortest:
        cost = build_l / build_s
        lines.append(
            f"Target: build() at {lw} costs at most 1.3× build() at {sw}: "
            f"{cost:.2f}× ({'met' if cost <= 1.3 else 'missed'})."
        )
        for m in ("range_join", "polars"):
            a, b = _seconds(doc, longest["key"], m), _seconds(doc, shortest["key"], m)
            if a and b:
                lines.append(
                    f"For comparison, {METHOD_TITLES[m]} at {lw} costs {a / b:.2f}× its {sw} time."
                )
    return lines


def run_key(doc: dict[str, Any]) -> str:
    """Identifies a run's size, so reruns at one size replace each other in the README."""
    return f"{doc['labels']}x{doc['views']}"


def render(doc: dict[str, Any], heading_level: int = 3) -> str:
    """Markdown for one result document: heading, machine, table, targets and notes."""
    import report

    mach, v = doc["machine"], doc["machine"]["versions"]
    fmt = report._fmt_count
    lines = [
        f"{'#' * heading_level} {fmt(doc['labels'])} labels × {fmt(doc['views'])} views",
        "",
        f"{doc['created']}; median of {doc['repeat']} fresh processes per method. Machine: "
        f"{mach['nproc']} CPUs ({mach['cpu'] or 'unknown CPU'}), {mach['ram_gib']} GiB RAM, "
        f"{mach['platform']}. Python {v['python']}, asof_join {v['asof_join']}, "
        f"duckdb {v['duckdb']}, polars {v['polars']}, pyarrow {v['pyarrow']}.",
        "",
        "| case | window | method | median s | peak MiB | × range join | result |",
        "|---|---|---|--:|--:|--:|---|",
    ]
    for case in doc["cases"]:
        ref = _seconds(doc, case["key"], "range_join")
        for m in case.get("methods", {}).values():
            secs = _num(m.get("full_s"), 2)
            peak = _num(m.get("median_peak_mib"), 0)
            if m.get("extrapolated") and m.get("full_s") is not None:
                secs = f"{secs} (extrapolated)"
                peak = f"{peak} (on {fmt(m['labels_run'])} labels)"
            lines.append(
                f"| {VARIANTS[case['variant']]} | {_fmt_window(case['window_us'])} | "
                f"{m['title']} | {secs} | {peak} | {report._ratio(m.get('full_s'), ref)} | "
                f"{_result(m)} |"
            )
    notes = _targets(doc)
    if doc["range_join_labels"] != doc["labels"]:
        notes.append(
            f"The range join ran on the first {doc['range_join_labels']:,} labels of the file "
            f"(a random sample: the file is shuffled) and its time is **extrapolated linearly** "
            f"to {doc['labels']:,} labels (×{doc['labels'] / doc['range_join_labels']:.2f}); its "
            "peak memory is as measured on that prefix. Its values are checked on that prefix."
        )
    notes += [
        f"Views: {doc['views']:,} rows, {doc['customers']:,} customers; the fixed-delay case "
        f"declares `delay={_fmt_window(doc['delay_us'])}`. "
        f"Aggregates: {doc['aggregates']}.",
        "Times cover reading the Parquet inputs, the aggregation, restoring label input order "
        "and materializing the result (Arrow for build() and DuckDB, a DataFrame for polars); "
        "interpreter start and imports are excluded. Peak MiB is the process's maximum resident "
        "set (`VmHWM`), interpreter and libraries included.",
    ]
    if doc.get("failures"):
        notes.append("FAILURES: " + "; ".join(doc["failures"]))
    lines += [""] + [f"- {n}" for n in notes]
    return "\n".join(lines)


def update_readme(doc: dict[str, Any], path: Path = README) -> None:
    """Insert or replace this run's size between the README's trailing-window markers."""
    import report

    report.replace_run(
        path, run_key(doc), render(doc), start=START, end=END, tag="trailing-run", heading=SECTION
    )


# --------------------------------------------------------------------------------------------
# Command line


def _duration_us(text: str) -> int:
    from asof_join.durations import parse_duration

    try:
        d = parse_duration(text)
    except ValueError as exc:
        raise argparse.ArgumentTypeError(str(exc)) from None
    return d // dt.timedelta(microseconds=1)


def main(argv: list[str] | None = None) -> int:
    """Command line entry point."""
    argv = sys.argv[1:] if argv is None else argv
    if argv[:1] == ["--child"]:
        return _child_main(argv[1])
    import datagen

    parser = argparse.ArgumentParser(description=__doc__)
    parser.add_argument("--labels", type=datagen.parse_count, default=100_000)
    parser.add_argument("--views", type=datagen.parse_count, default=200_000)
    parser.add_argument("--repeat", type=int, default=3, help="fresh processes per method")
    parser.add_argument("--windows", type=_duration_us, nargs="+", default=["7d", "30d"])
    parser.add_argument(
        "--known-windows",
        type=_duration_us,
        nargs="*",
        default=None,
        help="windows for the known_at case (default: the longest of --windows)",
    )
    parser.add_argument(
        "--delay",
        type=_duration_us,
        default="1h",
        dest="delay_us",
        help="the fixed-delay table's delay (default 1h)",
    )
    parser.add_argument("--views-per-customer", type=int, default=VIEWS_PER_CUSTOMER)
    parser.add_argument(
        "--range-join-max-labels",
        type=datagen.parse_count,
        default=None,
        help="run the range join on this many labels; extrapolate linearly",
    )
    parser.add_argument("--only", default=",".join(METHODS), help="comma list of methods")
    parser.add_argument("--skip", default="", help="comma list of methods to leave out")
    parser.add_argument("--seed", type=int, default=0)
    parser.add_argument("--cache-dir", type=Path, default=datagen.DEFAULT_CACHE)
    parser.add_argument("--timeout", type=float, default=None, help="seconds per child run")
    parser.add_argument("--out", type=Path, default=None, help="write the results JSON here")
    parser.add_argument(
        "--readme",
        action="store_true",
        help="on success, update the Trailing windows section of the README",
    )
    parser.add_argument(
        "--from-json",
        type=Path,
        default=None,
        help="render a saved results JSON instead of running",
    )
    parser.add_argument("-v", "--verbose", action="store_true", help="print child tracebacks")
    args = parser.parse_args(argv)

    if args.from_json:
        doc = json.loads(args.from_json.read_text())
    else:
        args.windows = [_duration_us(w) if isinstance(w, str) else w for w in args.windows]
        if args.known_windows is None:
            args.known_windows = [max(args.windows)]
        args.only = {m.strip() for m in args.only.split(",") if m.strip()}
        args.skip = {m.strip() for m in args.skip.split(",") if m.strip()}
        unknown = (args.only | args.skip) - set(METHODS)
        if unknown:
            parser.error(f"unknown methods {sorted(unknown)}; known: {list(METHODS)}")
        if args.repeat < 1:
            parser.error("--repeat must be at least 1")
        if any(w <= args.delay_us for w in args.windows):
            parser.error("every window must be longer than --delay")
        args.cache_dir.mkdir(parents=True, exist_ok=True)
        doc = run(args)
    print()
    print(render(doc))
    if args.out and not args.from_json:
        args.out.parent.mkdir(parents=True, exist_ok=True)
        args.out.write_text(json.dumps(doc, indent=2) + "\n")
        print(f"results written to {args.out}")
    if not doc["ok"]:
        print("\nFAILED:", file=sys.stderr)
        for f in doc["failures"]:
            print(f"  {f}", file=sys.stderr)
        return 1
    if args.readme:
        update_readme(doc)
        print(f"updated {README}")
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
