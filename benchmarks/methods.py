"""Benchmarked methods; run as a script, executes one method in a fresh process and reports."""

from __future__ import annotations

import json
import resource
import sys
import time
import traceback
from collections.abc import Callable
from dataclasses import dataclass
from pathlib import Path
from typing import Any

RESULT_MARKER = "@@RESULT "

LABEL_COLUMNS = ("label_id", "customer_id", "plant_id", "event_at", "amount")


@dataclass(frozen=True)
class Method:
    """One way of computing a scenario's training set."""

    key: str
    title: str
    values: tuple[str, ...]  # feature columns the output must carry after the label columns
    role: str  # "build", "hand", "other" or "floor"
    run: Callable[[dict[str, Any]], Any]  # params -> result (kept alive until peak is read)
    extract: Callable[[Any, dict[str, Any]], Any]  # (result, params) -> pyarrow.Table to check


def _lit(path: str) -> str:
    """A DuckDB string literal."""
    return "'" + path.replace("'", "''") + "'"


# --------------------------------------------------------------------------------------------
# aj.build


def _spec(kind: str) -> Any:
    import asof_join as aj

    customer = aj.Entity("customer", keys=["customer_id"])
    plant = aj.Entity("plant", keys=["plant_id"])
    labels = aj.EventTable("labels", time="event_at", entities=[customer, plant])
    if kind == "known":
        profiles = aj.EventTable(
            "profiles", time="updated_at", known_at="loaded_at", entities=[customer]
        )
    else:
        profiles = aj.EventTable("profiles", time="updated_at", entities=[customer])
    features = [aj.Latest(profiles, ["score"])]
    if kind == "three":
        prices = aj.EventTable("prices", time="effective_at", entities=[plant])
        stats = aj.EventTable("stats", time="computed_at", entities=[customer])
        features += [aj.Latest(prices, ["price"]), aj.Latest(stats, ["orders_90d"])]
    return aj.TrainingSetSpec(labels=labels, features=features)


def _build_data(params: dict[str, Any], kind: str) -> dict[str, str]:
    paths = params["paths"]
    names = ["labels", "profiles"] + (["prices", "stats"] if kind == "three" else [])
    return {name: paths[name] for name in names}


def _build_kwargs(params: dict[str, Any]) -> dict[str, Any]:
    kwargs: dict[str, Any] = {}
    if params.get("memory_limit"):
        kwargs["memory_limit"] = params["memory_limit"]
    if params.get("temp_dir"):
        kwargs["temp_dir"] = params["temp_dir"]
    return kwargs


def _build_arrow(kind: str) -> Callable[[dict[str, Any]], Any]:
    def run(params: dict[str, Any]) -> Any:
        import asof_join as aj

        ts = aj.build(_spec(kind), data=_build_data(params, kind), **_build_kwargs(params))
        return ts.to_arrow()

    return run


def _build_parquet(kind: str) -> Callable[[dict[str, Any]], Any]:
    def run(params: dict[str, Any]) -> Any:
        import asof_join as aj

        ts = aj.build(_spec(kind), data=_build_data(params, kind), **_build_kwargs(params))
        ts.write_parquet(params["out_file"])
        return params["out_file"]

    return run


def _import_build() -> None:
    import asof_join  # noqa: F401


# --------------------------------------------------------------------------------------------
# Hand-written DuckDB SQL


def _duck(params: dict[str, Any]) -> Any:
    import duckdb

    con = duckdb.connect()
    con.execute("SET enable_progress_bar = false")
    if params.get("memory_limit"):
        con.execute(f"SET memory_limit = {_lit(params['memory_limit'])}")
    return con


def _labels_scan(params: dict[str, Any]) -> str:
    # file_row_number is the row's position in the Parquet file: the label input order.
    return f"read_parquet({_lit(params['paths']['labels'])}, file_row_number = true)"


def _scan(params: dict[str, Any], name: str) -> str:
    return f"read_parquet({_lit(params['paths'][name])})"


def hand_sql_plain(params: dict[str, Any]) -> str:
    """One plain as-of join, label order kept."""
    return f"""
SELECT l.* EXCLUDE (file_row_number), r.score
FROM {_labels_scan(params)} AS l
ASOF LEFT JOIN {_scan(params, "profiles")} AS r
  ON l.customer_id = r.customer_id AND l.event_at > r.updated_at
ORDER BY l.file_row_number
"""


def hand_sql_three(params: dict[str, Any]) -> str:
    """Three chained plain as-of joins in one statement, label order kept."""
    return f"""
SELECT l.* EXCLUDE (file_row_number), p.score, q.price, s.orders_90d
FROM {_labels_scan(params)} AS l
ASOF LEFT JOIN {_scan(params, "profiles")} AS p
  ON l.customer_id = p.customer_id AND l.event_at > p.updated_at
ASOF LEFT JOIN {_scan(params, "prices")} AS q
  ON l.plant_id = q.plant_id AND l.event_at > q.effective_at
ASOF LEFT JOIN {_scan(params, "stats")} AS s
  ON l.customer_id = s.customer_id AND l.event_at > s.computed_at
ORDER BY l.file_row_number
"""


def _last_tied(params: dict[str, Any], name: str, key: str, time: str, value: str) -> str:
    """A feature table with ties on (key, time) resolved as the contract does: last in file."""
    path = _lit(params["paths"][name])
    return f"""(
  SELECT {key}, {time}, {value} FROM read_parquet({path}, file_row_number = true)
  QUALIFY row_number() OVER (PARTITION BY {key}, {time} ORDER BY file_row_number DESC) = 1
)"""


def hand_sql_plain_ties(params: dict[str, Any]) -> str:
    """(a)'s hand SQL plus the contract's tie-break, written the way a person would."""
    return f"""
SELECT l.* EXCLUDE (file_row_number), r.score
FROM {_labels_scan(params)} AS l
ASOF LEFT JOIN {_last_tied(params, "profiles", "customer_id", "updated_at", "score")} AS r
  ON l.customer_id = r.customer_id AND l.event_at > r.updated_at
ORDER BY l.file_row_number
"""


def hand_sql_three_ties(params: dict[str, Any]) -> str:
    """(c)'s hand SQL plus the contract's tie-break on each table."""
    profiles = _last_tied(params, "profiles", "customer_id", "updated_at", "score")
    prices = _last_tied(params, "prices", "plant_id", "effective_at", "price")
    stats = _last_tied(params, "stats", "customer_id", "computed_at", "orders_90d")
    return f"""
SELECT l.* EXCLUDE (file_row_number), p.score, q.price, s.orders_90d
FROM {_labels_scan(params)} AS l
ASOF LEFT JOIN {profiles} AS p
  ON l.customer_id = p.customer_id AND l.event_at > p.updated_at
ASOF LEFT JOIN {prices} AS q
  ON l.plant_id = q.plant_id AND l.event_at > q.effective_at
ASOF LEFT JOIN {stats} AS s
  ON l.customer_id = s.customer_id AND l.event_at > s.computed_at
ORDER BY l.file_row_number
"""


def hand_sql_timeline(params: dict[str, Any]) -> str:
    """Known-time latest: a known-time timeline, then one as-of join on known time.

    Per key, order rows by known time k = greatest(loaded_at, updated_at) and keep a row when
    its valid time is at least the greatest valid time among rows known before it (after
    collapsing rows with equal key and k to the newest); the kept row with the greatest k < t
    is then the visible row with the greatest valid time.
    """
    return f"""
WITH r AS (
  SELECT customer_id, updated_at, greatest(loaded_at, updated_at) AS k, score,
         file_row_number AS rn
  FROM read_parquet({_lit(params["paths"]["profiles"])}, file_row_number = true)
), collapsed AS (
  SELECT * FROM r
  QUALIFY row_number() OVER (PARTITION BY customer_id, k ORDER BY updated_at DESC, rn DESC) = 1
), marked AS (
  SELECT *, max(updated_at) OVER (
      PARTITION BY customer_id ORDER BY k ROWS BETWEEN UNBOUNDED PRECEDING AND 1 PRECEDING
  ) AS prev_max
  FROM collapsed
), timeline AS (
  SELECT customer_id, k, score FROM marked WHERE prev_max IS NULL OR updated_at >= prev_max
)
SELECT l.* EXCLUDE (file_row_number), t.score
FROM {_labels_scan(params)} AS l
ASOF LEFT JOIN timeline AS t ON l.customer_id = t.customer_id AND l.event_at > t.k
ORDER BY l.file_row_number
"""


def hand_sql_range(params: dict[str, Any]) -> str:
    """Known-time latest the direct way: join every visible row, keep the newest per label."""
    return f"""
WITH l AS (SELECT * FROM {_labels_scan(params)}),
r AS (
  SELECT customer_id, updated_at, greatest(loaded_at, updated_at) AS k, score,
         file_row_number AS rn
  FROM read_parquet({_lit(params["paths"]["profiles"])}, file_row_number = true)
), best AS (
  SELECT l.file_row_number AS pos, r.score
  FROM l JOIN r ON l.customer_id = r.customer_id AND r.k < l.event_at
  QUALIFY row_number() OVER (
      PARTITION BY l.file_row_number ORDER BY r.updated_at DESC, r.k DESC, r.rn DESC
  ) = 1
)
SELECT l.* EXCLUDE (file_row_number), best.score
FROM l LEFT JOIN best ON best.pos = l.file_row_number
ORDER BY l.file_row_number
"""


def _hand(make_sql: Callable[[dict[str, Any]], str]) -> Callable[[dict[str, Any]], Any]:
    def run(params: dict[str, Any]) -> Any:
        return _duck(params).sql(make_sql(params)).to_arrow_table()

    return run


def _import_duckdb() -> None:
    import duckdb  # noqa: F401
    import pyarrow  # noqa: F401


# --------------------------------------------------------------------------------------------
# Floor: DuckDB reading and sorting the inputs alone, into DuckDB temp tables.

FLOOR_INPUTS: dict[str, list[tuple[str, str, str]]] = {
    # scenario -> (table, columns read, sort keys)
    "plain": [
        ("labels", "*", "customer_id, event_at"),
        ("profiles", "customer_id, updated_at, score", "customer_id, updated_at"),
    ],
    "known": [
        ("labels", "*", "customer_id, event_at"),
        (
            "profiles",
            "customer_id, updated_at, loaded_at, score",
            "customer_id, greatest(loaded_at, updated_at)",
        ),
    ],
    "three": [
        ("labels", "*", "customer_id, event_at"),
        ("profiles", "customer_id, updated_at, score", "customer_id, updated_at"),
        ("prices", "plant_id, effective_at, price", "plant_id, effective_at"),
        ("stats", "customer_id, computed_at, orders_90d", "customer_id, computed_at"),
    ],
}


def _floor(kind: str) -> Callable[[dict[str, Any]], Any]:
    def run(params: dict[str, Any]) -> Any:
        con = _duck(params)
        for i, (name, cols, order) in enumerate(FLOOR_INPUTS[kind]):
            con.execute(
                f"CREATE TEMP TABLE t{i} AS SELECT {cols} FROM {_scan(params, name)} "
                f"ORDER BY {order}"
            )
        return con

    return run


# --------------------------------------------------------------------------------------------
# pandas and polars


def pandas_plain(params: dict[str, Any]) -> Any:
    """pandas.merge_asof: needs both sides sorted on time; strict via allow_exact_matches."""
    import numpy as np
    import pandas as pd

    labels = pd.read_parquet(params["paths"]["labels"])
    rows = pd.read_parquet(
        params["paths"]["profiles"], columns=["customer_id", "updated_at", "score"]
    )
    labels["_pos"] = np.arange(len(labels))
    out = pd.merge_asof(
        labels.sort_values("event_at", kind="stable"),
        rows.sort_values("updated_at", kind="stable"),
        left_on="event_at",
        right_on="updated_at",
        by="customer_id",
        direction="backward",
        allow_exact_matches=False,  # strict: s < t
    )
    return out.sort_values("_pos").drop(columns=["_pos", "updated_at"]).reset_index(drop=True)


def polars_plain(params: dict[str, Any]) -> Any:
    """polars join_asof (lazy): inclusive by default, made strict by allow_exact_matches=False."""
    import polars as pl

    labels = pl.scan_parquet(params["paths"]["labels"]).with_row_index("_pos")
    rows = pl.scan_parquet(params["paths"]["profiles"]).select("customer_id", "updated_at", "score")
    out = labels.sort("event_at").join_asof(
        rows.sort("updated_at"),
        left_on="event_at",
        right_on="updated_at",
        by="customer_id",
        strategy="backward",
        allow_exact_matches=False,  # strict: s < t
        check_sortedness=False,  # both sides are sorted on time above; with by= it cannot check
    )
    return out.sort("_pos").select(*LABEL_COLUMNS, "score").collect()


def _import_pandas() -> None:
    import numpy  # noqa: F401
    import pandas  # noqa: F401
    import pyarrow  # noqa: F401


def _import_polars() -> None:
    import polars  # noqa: F401


# --------------------------------------------------------------------------------------------
# Turning each method's result into a pyarrow table of label_id + feature values.


def _extract_arrow(result: Any, params: dict[str, Any]) -> Any:
    return result


def _extract_parquet(result: Any, params: dict[str, Any]) -> Any:
    import pyarrow.parquet as pq

    return pq.read_table(result)


def _extract_pandas(result: Any, params: dict[str, Any]) -> Any:
    import pyarrow as pa

    return pa.Table.from_pandas(result, preserve_index=False)


def _extract_polars(result: Any, params: dict[str, Any]) -> Any:
    return result.to_arrow()


def _extract_none(result: Any, params: dict[str, Any]) -> Any:
    return None


PLAIN = ("score",)
THREE = ("score", "price", "orders_90d")

METHODS: dict[str, Method] = {
    m.key: m
    for m in [
        Method("a:build", "aj.build → to_arrow()", PLAIN, "build",
               _build_arrow("plain"), _extract_arrow),
        Method("a:hand_sql", "hand SQL: DuckDB ASOF LEFT JOIN", PLAIN, "hand",
               _hand(hand_sql_plain), _extract_arrow),
        Method("a:hand_sql_ties", "hand SQL: ASOF + tie-break by file order", PLAIN, "other",
               _hand(hand_sql_plain_ties), _extract_arrow),
        Method("a:pandas", "pandas merge_asof", PLAIN, "other", pandas_plain, _extract_pandas),
        Method("a:polars", "polars join_asof (lazy)", PLAIN, "other", polars_plain,
               _extract_polars),
        Method("a:floor", "floor: DuckDB read + sort inputs", PLAIN, "floor",
               _floor("plain"), _extract_none),
        Method("b:build", "aj.build known_at → to_arrow()", PLAIN, "build",
               _build_arrow("known"), _extract_arrow),
        Method("b:hand_sql", "hand SQL: known-time timeline + ASOF", PLAIN, "hand",
               _hand(hand_sql_timeline), _extract_arrow),
        Method("b:hand_sql_range", "hand SQL: range join + QUALIFY", PLAIN, "other",
               _hand(hand_sql_range), _extract_arrow),
        Method("b:floor", "floor: DuckDB read + sort inputs", PLAIN, "floor",
               _floor("known"), _extract_none),
        Method("c:build", "aj.build, 3 × Latest → to_arrow()", THREE, "build",
               _build_arrow("three"), _extract_arrow),
        Method("c:hand_sql", "hand SQL: 3 chained ASOF LEFT JOINs", THREE, "hand",
               _hand(hand_sql_three), _extract_arrow),
        Method("c:hand_sql_ties", "hand SQL: 3 chained ASOF + tie-break by file order", THREE,
               "other", _hand(hand_sql_three_ties), _extract_arrow),
        Method("c:floor", "floor: DuckDB read + sort inputs", THREE, "floor",
               _floor("three"), _extract_none),
        Method("d:build", "aj.build, memory_limit → to_arrow()", PLAIN, "build",
               _build_arrow("plain"), _extract_arrow),
        Method("d:build_parquet", "aj.build, memory_limit → write_parquet()", PLAIN, "build",
               _build_parquet("plain"), _extract_parquet),
    ]
}  # fmt: skip

IMPORTS: dict[str, Callable[[], None]] = {
    "build": _import_build,
    "hand": _import_duckdb,
    "a:hand_sql_ties": _import_duckdb,
    "c:hand_sql_ties": _import_duckdb,
    "floor": _import_duckdb,
    "a:pandas": _import_pandas,
    "a:polars": _import_polars,
}


def _rss() -> int:
    with open("/proc/self/statm") as f:
        return int(f.read().split()[1]) * resource.getpagesize()


def _peak_rss() -> int:
    """Peak resident set of this process since its exec, in bytes.

    VmHWM belongs to the process's own address space, which exec replaces. getrusage's
    ru_maxrss is not usable here: Linux carries it across fork and exec, so a small child
    would report the (larger) parent's resident set.
    """
    try:
        with open("/proc/self/status") as f:
            for line in f:
                if line.startswith("VmHWM:"):
                    return int(line.split()[1]) * 1024
    except OSError:
        pass
    return resource.getrusage(resource.RUSAGE_SELF).ru_maxrss * 1024


def run_child(params: dict[str, Any]) -> dict[str, Any]:
    """Run one method, timed, then (optionally) dump its label_id and feature values."""
    method = METHODS[params["method"]]
    IMPORTS.get(method.key, IMPORTS.get(method.role, _import_duckdb))()
    base = _rss()
    t0 = time.perf_counter()
    result = method.run(params)
    seconds = time.perf_counter() - t0
    peak = _peak_rss()
    report: dict[str, Any] = {"seconds": seconds, "peak_rss": peak, "base_rss": base}
    table = method.extract(result, params)
    if table is not None:
        report["rows"] = table.num_rows
        report["columns"] = table.column_names
        report["types"] = [str(t) for t in table.schema.types]
        if params.get("dump"):
            import pyarrow.parquet as pq

            keep = [c for c in ("label_id", *method.values) if c in table.column_names]
            pq.write_table(table.select(keep), params["dump"])
    return report


def main() -> int:
    """Child entry point: one JSON argument in, one marked JSON line out."""
    params = json.loads(sys.argv[1])
    try:
        report = run_child(params)
    except Exception as exc:  # reported to the parent, which fails the run
        report = {"error": f"{type(exc).__name__}: {exc}", "traceback": traceback.format_exc()}
    sys.stdout.write(RESULT_MARKER + json.dumps(report) + "\n")
    sys.stdout.flush()
    return 0


if __name__ == "__main__":
    sys.path.insert(0, str(Path(__file__).resolve().parent))
    raise SystemExit(main())
