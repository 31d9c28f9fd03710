"""Core benchmark: aj.build against hand-written DuckDB SQL, pandas, polars and a floor."""

from __future__ import annotations

import argparse
import json
import os
import shutil
import statistics
import subprocess
import sys
import tempfile
import time
from pathlib import Path
from typing import Any

sys.path.insert(0, str(Path(__file__).resolve().parent))

import datagen
import report
from methods import LABEL_COLUMNS, METHODS, RESULT_MARKER

HERE = Path(__file__).resolve().parent
METHODS_SCRIPT = HERE / "methods.py"

SCENARIOS: dict[str, tuple[str, list[str]]] = {
    "a": (
        "one-table plain latest",
        ["a:build", "a:hand_sql", "a:hand_sql_ties", "a:pandas", "a:polars", "a:floor"],
    ),
    "b": (
        "one-table known-time latest",
        ["b:build", "b:hand_sql", "b:hand_sql_range", "b:floor"],
    ),
    "c": (
        "three-table plain latest",
        ["c:build", "c:hand_sql", "c:hand_sql_ties", "c:floor"],
    ),
    "d": ("one-table plain latest, build() under memory_limit", ["d:build", "d:build_parquet"]),
}

MIB = 1024 * 1024


def _select(only: str | None, skip: str | None) -> list[str]:
    """Method keys to run, in scenario order. Items are scenario letters or method keys."""

    def expand(spec: str) -> set[str]:
        out: set[str] = set()
        for item in (s.strip() for s in spec.split(",")):
            if not item:
                continue
            if item in SCENARIOS:
                out.update(SCENARIOS[item][1])
            elif item in METHODS:
                out.add(item)
            else:
                msg = f"unknown scenario or method {item!r}; known: {sorted(METHODS)}"
                raise SystemExit(msg)
        return out

    chosen = expand(only) if only else set(METHODS)
    chosen -= expand(skip) if skip else set()
    return [k for s in SCENARIOS.values() for k in s[1] if k in chosen]


def _warm(paths: list[str]) -> None:
    """Read the inputs once so every method starts from the page cache."""
    for p in paths:
        with open(p, "rb") as f:
            while f.read(16 * MIB):
                pass


def _run_child(params: dict[str, Any], timeout: float | None) -> dict[str, Any]:
    cmd = [sys.executable, str(METHODS_SCRIPT), json.dumps(params)]
    try:
        proc = subprocess.run(cmd, capture_output=True, text=True, timeout=timeout)
    except subprocess.TimeoutExpired:
        return {"error": f"timed out after {timeout} s"}
    for line in reversed(proc.stdout.splitlines()):
        if line.startswith(RESULT_MARKER):
            rep: dict[str, Any] = json.loads(line[len(RESULT_MARKER) :])
            return rep
    tail = (proc.stderr or proc.stdout)[-2000:]
    return {"error": f"child exited with code {proc.returncode} and no result:\n{tail}"}


def _median(values: list[float]) -> float | None:
    return statistics.median(values) if values else None


def _machine() -> dict[str, Any]:
    from importlib import metadata

    import psutil

    cpu = ""
    try:
        for line in Path("/proc/cpuinfo").read_text().splitlines():
            if line.startswith("model name"):
                cpu = line.split(":", 1)[1].strip()
                break
    except OSError:
        pass
    versions: dict[str, str] = {"python": sys.version.split()[0]}
    for pkg in ("asof_join", "duckdb", "pandas", "polars", "pyarrow", "numpy"):
        try:
            versions[pkg] = metadata.version(pkg)
        except metadata.PackageNotFoundError:
            versions[pkg] = "not installed"
    return {
        "nproc": len(os.sched_getaffinity(0)),
        "cpu": cpu,
        "ram_gib": round(psutil.virtual_memory().total / 1024**3, 1),
        "platform": sys.platform,
        "versions": versions,
    }


def _load_values(path: Path, columns: tuple[str, ...]) -> dict[str, Any]:
    """label_id and feature columns as numpy float/int arrays; nulls and NaN both become NaN."""
    import numpy as np
    import pyarrow.parquet as pq

    t = pq.read_table(path)
    out: dict[str, Any] = {"label_id": t.column("label_id").to_numpy()}
    for c in columns:
        if c in t.column_names:
            out[c] = t.column(c).cast("float64").to_numpy().astype(np.float64, copy=False)
    return out


def _compare(ref: dict[str, Any], got: dict[str, Any], columns: tuple[str, ...]) -> dict[str, int]:
    import numpy as np

    mism: dict[str, int] = {}
    for c in columns:
        if c not in got:
            mism[c] = len(ref[c])
            continue
        a, b = ref[c], got[c]
        if len(a) != len(b):
            mism[c] = abs(len(a) - len(b)) + min(len(a), len(b))
            continue
        same = (a == b) | (np.isnan(a) & np.isnan(b))
        mism[c] = int((~same).sum())
    return mism


def _verify(
    results: dict[str, dict[str, Any]],
    dumps: dict[str, Path],
    label_ids: Any,
    label_types: list[str],
    failures: list[str],
    notes: list[str],
) -> None:
    """Row count, label order, column names and feature values of every method against a ref."""
    import numpy as np

    loaded: dict[str, dict[str, Any]] = {}

    def load(key: str) -> dict[str, Any]:
        if key not in loaded:
            loaded[key] = _load_values(dumps[key], METHODS[key].values)
        return loaded[key]

    for letter, (_, keys) in SCENARIOS.items():
        loaded.clear()  # one scenario's outputs in memory at a time
        ref_candidates = [k for k in keys if METHODS[k].role == "hand"]
        if letter == "d":
            ref_candidates = ["a:hand_sql", "a:build"]
        ref_candidates += [k for k in keys if METHODS[k].role == "build"]
        ref_key = next((k for k in ref_candidates if k in dumps), None)
        for key in keys:
            res = results.get(key)
            if res is None or res.get("error") or key not in dumps:
                continue
            m = METHODS[key]
            check: dict[str, Any] = {"reference": ref_key}
            problems: list[str] = []
            if res.get("rows") != len(label_ids):
                problems.append(f"{res.get('rows')} rows, expected {len(label_ids)}")
            expected_cols = [*LABEL_COLUMNS, *m.values]
            if res.get("columns") != expected_cols:
                problems.append(f"columns {res.get('columns')}, expected {expected_cols}")
            got = load(key)
            if len(got["label_id"]) == len(label_ids):
                wrong_order = int((got["label_id"] != label_ids).sum())
            else:
                wrong_order = len(label_ids)
            check["label_order_mismatches"] = wrong_order
            if wrong_order:
                problems.append(f"{wrong_order} rows out of label input order")
            types = res.get("types", [])[: len(LABEL_COLUMNS)]
            if types != label_types:
                msg = f"{key}: label column types {types}, input has {label_types}"
                if m.role == "build":
                    problems.append(msg)
                else:
                    notes.append(msg)
            if ref_key is not None and ref_key != key:
                mism = _compare(load(ref_key), got, m.values)
                check["value_mismatches"] = mism
                if any(mism.values()):
                    problems.append(f"value mismatches vs {ref_key}: {mism}")
            nulls = {c: int(np.isnan(got[c]).sum()) for c in m.values if c in got}
            check["nulls"] = nulls
            check["ok"] = not problems
            check["problems"] = problems
            res["check"] = check
            failures.extend(f"{key}: {p}" for p in problems)


def run(args: argparse.Namespace) -> dict[str, Any]:
    """Run the selected scenarios; returns the JSON-able result document."""
    import pyarrow.parquet as pq

    n_rows = args.rows or args.labels
    ds = datagen.ensure_dataset(args.labels, n_rows, seed=args.seed, cache_dir=args.cache_dir)
    keys = _select(args.only, args.skip)
    if any(k.startswith("d:") for k in keys) and not args.memory_limit and "a:build" not in keys:
        keys.insert(0, "a:build")  # (d)'s limit is a third of (a)'s build() peak
        print("note: running a:build to measure the peak that sets (d)'s memory_limit")

    work = Path(tempfile.mkdtemp(prefix="bench_core_", dir=args.cache_dir))
    dumps: dict[str, Path] = {}
    results: dict[str, dict[str, Any]] = {}
    failures: list[str] = []
    notes: list[str] = []
    memory_limit: str | None = args.memory_limit
    base_params: dict[str, Any] = {"paths": ds.paths()}
    _warm(list(ds.paths().values()))

    try:
        for letter, (title, scen_keys) in SCENARIOS.items():
            todo = [k for k in scen_keys if k in keys]
            if not todo:
                continue
            params = dict(base_params)
            if letter == "d":
                if memory_limit is None:
                    peak = results.get("a:build", {}).get("median_peak_mib")
                    if not peak:
                        failures.append("d: no build() peak from (a) to set memory_limit")
                        continue
                    memory_limit = f"{max(1, int(peak * MIB / 3 / 1e6))}MB"
                params["memory_limit"] = memory_limit
                params["temp_dir"] = str(work / "spill")
            limit = f", memory_limit={memory_limit}" if letter == "d" else ""
            print(f"\n== ({letter}) {title}{limit}", flush=True)
            runs: dict[str, list[dict[str, Any]]] = {k: [] for k in todo}
            for rep in range(args.repeat):
                for key in todo:  # round-robin, so background noise spreads over methods
                    p = dict(params, method=key)
                    if rep == 0 and METHODS[key].role != "floor":
                        p["dump"] = str(work / f"{key.replace(':', '_')}.parquet")
                    p["out_file"] = str(work / f"out_{key.replace(':', '_')}.parquet")
                    if "temp_dir" in p:
                        Path(p["temp_dir"]).mkdir(parents=True, exist_ok=True)
                    r = _run_child(p, args.timeout)
                    Path(p["out_file"]).unlink(missing_ok=True)
                    shutil.rmtree(work / "spill", ignore_errors=True)
                    if r.get("error"):
                        print(f"  {key:20s} run {rep + 1}: FAILED: {r['error']}", flush=True)
                        if r.get("traceback") and args.verbose:
                            print(r["traceback"])
                    else:
                        print(
                            f"  {key:20s} run {rep + 1}: {r['seconds']:8.3f} s "
                            f"{r['peak_rss'] / MIB:8.0f} MiB peak",
                            flush=True,
                        )
                        if "dump" in p:
                            dumps[key] = Path(p["dump"])
                    runs[key].append(r)
            for key in todo:
                ok = [r for r in runs[key] if not r.get("error")]
                err = next((r["error"] for r in runs[key] if r.get("error")), None)
                first = ok[0] if ok else {}
                results[key] = {
                    "key": key,
                    "scenario": letter,
                    "title": METHODS[key].title,
                    "role": METHODS[key].role,
                    "runs": [
                        {k: r.get(k) for k in ("seconds", "peak_rss", "base_rss", "error")}
                        for r in runs[key]
                    ],
                    "median_s": _median([r["seconds"] for r in ok]),
                    "median_peak_mib": _median([r["peak_rss"] / MIB for r in ok]),
                    "base_mib": _median([r["base_rss"] / MIB for r in ok]),
                    "rows": first.get("rows"),
                    "columns": first.get("columns"),
                    "types": first.get("types"),
                    "error": err,
                }
                if err:
                    failures.append(f"{key}: {err.splitlines()[0]}")

        label_file = pq.read_table(ds.labels, columns=list(LABEL_COLUMNS))
        label_ids = label_file.column("label_id").to_numpy()
        label_types = [str(t) for t in label_file.schema.types]
        _verify(results, dumps, label_ids, label_types, failures, notes)
    finally:
        if not args.keep_work:
            shutil.rmtree(work, ignore_errors=True)

    return {
        "benchmark": "core",
        "created": time.strftime("%Y-%m-%dT%H:%M:%S%z"),
        "labels": args.labels,
        "rows": n_rows,
        "seed": args.seed,
        "repeat": args.repeat,
        "memory_limit_d": memory_limit,
        "output": "every method materializes its result in memory: aj.build(...).to_arrow(), "
        "DuckDB .to_arrow_table(), a pandas or polars DataFrame; (d) also times write_parquet()",
        "machine": _machine(),
        "scenarios": {k: v[0] for k, v in SCENARIOS.items()},
        "methods": results,
        "failures": failures,
        "notes": notes,
        "ok": not failures,
    }


def main(argv: list[str] | None = None) -> int:
    """Command line entry point."""
    parser = argparse.ArgumentParser(description=__doc__)
    parser.add_argument(
        "--labels",
        type=datagen.parse_count,
        default=100_000,
        help="label rows: 100k, 1M, 10M (default 100k)",
    )
    parser.add_argument(
        "--rows",
        type=datagen.parse_count,
        default=None,
        help="rows per feature table (default: same as --labels)",
    )
    parser.add_argument("--repeat", type=int, default=3, help="fresh processes per method")
    parser.add_argument(
        "--only",
        default=None,
        help="comma list of scenarios (a,b,c,d) and/or methods (e.g. a:build)",
    )
    parser.add_argument("--skip", default=None, help="comma list of scenarios/methods to skip")
    parser.add_argument("--out", type=Path, default=None, help="write the results JSON here")
    parser.add_argument(
        "--readme",
        action="store_true",
        help="on success, update the results section of benchmarks/README.md",
    )
    parser.add_argument(
        "--memory-limit",
        default=None,
        help="(d)'s memory_limit, e.g. 1GB (default: a third of (a)'s peak)",
    )
    parser.add_argument("--seed", type=int, default=0)
    parser.add_argument("--cache-dir", type=Path, default=datagen.DEFAULT_CACHE)
    parser.add_argument("--timeout", type=float, default=None, help="seconds per child run")
    parser.add_argument("--keep-work", action="store_true", help="keep output dumps")
    parser.add_argument("-v", "--verbose", action="store_true", help="print child tracebacks")
    args = parser.parse_args(argv)
    if args.repeat < 1:
        parser.error("--repeat must be at least 1")
    args.cache_dir.mkdir(parents=True, exist_ok=True)

    doc = run(args)
    print()
    print(report.render(doc))
    if args.out:
        args.out.parent.mkdir(parents=True, exist_ok=True)
        args.out.write_text(json.dumps(doc, indent=2) + "\n")
        print(f"results written to {args.out}")
    if not doc["ok"]:
        print("\nFAILED:", file=sys.stderr)
        for f in doc["failures"]:
            print(f"  {f}", file=sys.stderr)
        return 1
    if args.readme:
        report.update_readme(doc)
        print(f"updated {report.README}")
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
