"""Ranking benchmark: sample_negatives + build on the positives against build on the rows given."""

from __future__ import annotations

import argparse
import json
import os
import re
import statistics
import subprocess
import sys
import time
from pathlib import Path
from typing import Any

HERE = Path(__file__).resolve().parent
DATA = HERE / ".data"
README = HERE / "README.md"
RESULT_MARKER = "@@RESULT "
START, END = "<!-- ranking-results:start -->", "<!-- ranking-results:end -->"
MIB = 1024 * 1024

METHODS = {
    "sample_uniform": "sample_negatives, uniform (positives -> examples)",
    "sample_popular": "sample_negatives, popular",
    "sample_build": "sample_negatives (uniform) + aj.build on the examples",
    "build_given": "aj.build on the same examples given as a Parquet file",
}


def parse_count(text: str) -> int:
    """'1M' -> 1_000_000, '50k' -> 50_000."""
    match = re.fullmatch(r"(\d+(?:\.\d+)?)([kKmM]?)", text.strip())
    if not match:
        msg = f"not a count: {text!r} (e.g. 50k, 1M)"
        raise argparse.ArgumentTypeError(msg)
    scale = {"": 1, "k": 1_000, "m": 1_000_000}[match.group(2).lower()]
    return int(float(match.group(1)) * scale)


# --- data -----------------------------------------------------------------------------------


def ensure_data(n: int, negatives: int) -> Path:
    """Write the nursery tables for n orders and the sampled examples once; reuse later."""
    import pyarrow.parquet as pq

    from asof_join.demo import make_demo_data

    out = DATA / f"ranking_{n}"
    done = out / "_done.json"
    if done.exists() and json.loads(done.read_text()).get("negatives") == negatives:
        return out
    out.mkdir(parents=True, exist_ok=True)
    tables = make_demo_data(n, seed=0)
    positives = tables["orders"].select(["order_id", "customer_id", "plant_id", "ordered_at"])
    pq.write_table(positives, out / "positives.parquet")
    sizes = {}
    for name in ("prices", "stock", "views", "orders"):
        pq.write_table(tables[name], out / f"{name}.parquet")
        sizes[name] = tables[name].num_rows
    del tables
    examples = _sample(out, negatives, "uniform")
    pq.write_table(examples, out / "examples.parquet")
    done.write_text(
        json.dumps({"negatives": negatives, "examples": examples.num_rows, "sizes": sizes})
    )
    return out


def _sample(directory: Path, negatives: int, sampler: str) -> Any:
    import pyarrow.parquet as pq

    import asof_join as aj

    return aj.sample_negatives(
        pq.read_table(directory / "positives.parquet"),
        pq.read_table(directory / "prices.parquet", columns=["plant_id", "effective_at"]),
        user="customer_id",
        item="plant_id",
        time="ordered_at",
        item_time="effective_at",
        per_positive=negatives,
        sampler=sampler,
        seed=0,
    )


def _spec() -> Any:
    import asof_join as aj

    customer = aj.Entity("customer", keys=["customer_id"])
    plant = aj.Entity("plant", keys=["plant_id"])
    examples = aj.EventTable("examples", time="ordered_at", entities=[customer, plant])
    prices = aj.EventTable("prices", time="effective_at", delay="1h", entities=[plant])
    stock = aj.EventTable("stock", time="counted_at", delay="2h", entities=[plant])
    views = aj.EventTable("views", time="viewed_at", entities=[customer, plant])
    orders = aj.EventTable("orders", time="ordered_at", entities=[customer, plant])
    return aj.TrainingSetSpec(
        labels=examples,
        features=[
            aj.Latest(prices, ["price"]),
            aj.Latest(stock, ["in_stock"]),
            aj.Trailing(views, None, "count", over="7d", name="views_7d"),
            aj.Trailing(orders, None, "count", over="30d", entity=plant, name="plant_orders_30d"),
        ],
    )


# --- one method in a fresh process ----------------------------------------------------------


def _peak_rss() -> int:
    """Peak resident set of this process (VmHWM), in bytes."""
    with open("/proc/self/status") as f:
        for line in f:
            if line.startswith("VmHWM:"):
                return int(line.split()[1]) * 1024
    return 0


def run_child(method: str, directory: Path, negatives: int) -> dict[str, Any]:
    """Run one method; report seconds, phases, peak memory and a checksum of the output."""
    import pyarrow.compute as pc

    import asof_join as aj

    tables = {n: str(directory / f"{n}.parquet") for n in ("prices", "stock", "views", "orders")}
    phases: dict[str, float] = {}
    t0 = time.perf_counter()
    if method in ("sample_uniform", "sample_popular"):
        result = _sample(directory, negatives, method.removeprefix("sample_"))
        phases["sample"] = time.perf_counter() - t0
    elif method == "sample_build":
        examples = _sample(directory, negatives, "uniform")
        phases["sample"] = time.perf_counter() - t0
        result = aj.build(_spec(), data={**tables, "examples": examples}).to_arrow()
        phases["build"] = time.perf_counter() - t0 - phases["sample"]
    elif method == "build_given":
        data = {**tables, "examples": str(directory / "examples.parquet")}
        result = aj.build(_spec(), data=data).to_arrow()
    else:
        msg = f"unknown method {method!r}"
        raise SystemExit(msg)
    seconds = time.perf_counter() - t0
    peak = _peak_rss()
    checksum = {
        c: float(pc.sum(result.column(c)).as_py() or 0)
        for c in ("label", "price", "in_stock", "views_7d", "plant_orders_30d")
        if c in result.column_names
    }
    return {
        "seconds": seconds,
        "phases": phases,
        "peak_rss": peak,
        "rows": result.num_rows,
        "checksum": checksum,
    }


def _spawn(method: str, directory: Path, negatives: int, timeout: float) -> dict[str, Any]:
    cmd = [sys.executable, __file__, "--child", method, str(directory), str(negatives)]
    proc = subprocess.run(cmd, capture_output=True, text=True, timeout=timeout, check=False)
    for line in reversed(proc.stdout.splitlines()):
        if line.startswith(RESULT_MARKER):
            report: dict[str, Any] = json.loads(line[len(RESULT_MARKER) :])
            return report
    return {"error": (proc.stderr or proc.stdout)[-2000:]}


# --- report ---------------------------------------------------------------------------------


def _fmt_count(n: int) -> str:
    return f"{n / 1e6:g}M" if n >= 1_000_000 else f"{n / 1e3:g}k"


def render(result: dict[str, Any]) -> str:
    """The results section (Markdown)."""
    meta = result["meta"]
    lines = [
        f"Measured {meta['date']}: {_fmt_count(meta['positives'])} positives x "
        f"{meta['negatives']} negatives = {meta['examples']:,} examples; median of "
        f"{meta['repeat']} run(s), each in a fresh process; {meta['nproc']} cores, "
        f"{meta['ram_gib']} GiB RAM; DuckDB {meta['duckdb']}. Feature tables: "
        + ", ".join(f"{name} {rows:,} rows" for name, rows in meta["sizes"].items())
        + ".",
        "",
        "| method | wall time (s), median (range) | of which sampling (s) | peak memory (MiB) "
        "| rows out |",
        "|---|---:|---:|---:|---:|",
    ]
    for key, row in result["methods"].items():
        sample = row.get("sample")
        runs = row.get("runs", [])
        spread = f" ({min(runs):.0f}-{max(runs):.0f})" if len(runs) > 1 else ""
        lines.append(
            f"| {METHODS[key]} | {row['seconds']:.1f}{spread} | "
            f"{'' if sample is None else f'{sample:.1f}'} | {row['peak_rss'] / MIB:,.0f} | "
            f"{row['rows']:,} |"
        )
    lows = [meta["load"]] + [
        row["load"] for row in result["methods"].values() if row.get("load") is not None
    ]
    lines += [
        "",
        f"The machine was shared: the 1-minute load average ranged {min(x[0] for x in lows)}-"
        f"{max(x[1] for x in lows)} during these runs (2 cores), so times vary between runs.",
    ]
    if "sample_build" in result["methods"] and "build_given" in result["methods"]:
        a, b = result["methods"]["sample_build"], result["methods"]["build_given"]
        lines += [
            "",
            f"Sampling and building from the positives took {a['seconds'] / b['seconds']:.2f}x "
            f"the time of building on the examples given directly (which excludes making "
            f"them); peak memory {a['peak_rss'] / b['peak_rss']:.2f}x. Both outputs carry the "
            "same feature sums.",
        ]
    return "\n".join(lines)


def write_readme(text: str) -> None:
    """Replace the text between the ranking markers of benchmarks/README.md."""
    readme = README.read_text(encoding="utf-8")
    if START not in readme:
        msg = f"{README} has no {START} marker"
        raise SystemExit(msg)
    head, rest = readme.split(START, 1)
    _, tail = rest.split(END, 1)
    README.write_text(f"{head}{START}\n{text}\n{END}{tail}", encoding="utf-8")


def main(argv: list[str] | None = None) -> int:
    argv = sys.argv[1:] if argv is None else argv
    if argv and argv[0] == "--child":
        method, directory, negatives = argv[1], Path(argv[2]), int(argv[3])
        report = run_child(method, directory, negatives)
        sys.stdout.write(RESULT_MARKER + json.dumps(report) + "\n")
        return 0
    parser = argparse.ArgumentParser(description=__doc__)
    parser.add_argument("--positives", type=parse_count, default=parse_count("1M"))
    parser.add_argument("--negatives", type=int, default=10)
    parser.add_argument("--repeat", type=int, default=1)
    parser.add_argument("--only", default=",".join(METHODS), help="comma-separated methods")
    parser.add_argument("--timeout", type=float, default=3600.0)
    parser.add_argument("--out", type=Path, help="write the results as JSON")
    parser.add_argument("--readme", action="store_true", help="write the results section")
    parser.add_argument(
        "--merge",
        type=Path,
        nargs="*",
        default=[],
        help="earlier result JSON files (same sizes) whose other methods join this report",
    )
    args = parser.parse_args(argv)
    chosen = [m for m in args.only.split(",") if m]
    unknown = [m for m in chosen if m not in METHODS]
    if unknown:
        parser.error(f"unknown methods {unknown}; known: {list(METHODS)}")

    t0 = time.perf_counter()
    directory = ensure_data(args.positives, args.negatives)
    print(f"data ready in {time.perf_counter() - t0:.1f}s: {directory}", flush=True)
    runs: dict[str, list[dict[str, Any]]] = {m: [] for m in chosen}
    loads = [os.getloadavg()[0]]
    for _ in range(args.repeat):
        for method in chosen:  # round robin
            report = _spawn(method, directory, args.negatives, args.timeout)
            if "error" in report:
                print(f"{method} failed:\n{report['error']}", file=sys.stderr)
                return 1
            print(
                f"{method}: {report['seconds']:.2f}s {report['phases']} "
                f"peak {report['peak_rss'] / MIB:,.0f} MiB, {report['rows']:,} rows",
                flush=True,
            )
            runs[method].append(report)
            loads.append(os.getloadavg()[0])

    summary: dict[str, Any] = {}
    for method, reports in runs.items():
        summary[method] = {
            "seconds": statistics.median(r["seconds"] for r in reports),
            "peak_rss": statistics.median(r["peak_rss"] for r in reports),
            "rows": reports[0]["rows"],
            "checksum": reports[0]["checksum"],
            "runs": [r["seconds"] for r in reports],
        }
        if "sample" in reports[0]["phases"]:
            summary[method]["sample"] = statistics.median(r["phases"]["sample"] for r in reports)
    if "sample_build" in summary and "build_given" in summary:
        a, b = summary["sample_build"]["checksum"], summary["build_given"]["checksum"]
        if a != b:
            print(f"outputs differ: {a} vs {b}", file=sys.stderr)
            return 1

    import duckdb
    import psutil

    done = json.loads((directory / "_done.json").read_text())
    result = {
        "meta": {
            "date": time.strftime("%Y-%m-%d"),
            "positives": args.positives,
            "negatives": args.negatives,
            "examples": done["examples"],
            "sizes": done["sizes"],
            "repeat": args.repeat,
            "nproc": len(os.sched_getaffinity(0)),
            "ram_gib": round(psutil.virtual_memory().total / 1024**3, 1),
            "duckdb": duckdb.__version__,
            "load": [round(min(loads), 1), round(max(loads), 1)],
        },
        "methods": summary,
    }
    for path in args.merge:
        earlier = json.loads(path.read_text())
        same = all(earlier["meta"][k] == result["meta"][k] for k in ("positives", "negatives"))
        if not same:
            print(f"{path}: other sizes, not merged", file=sys.stderr)
            return 1
        merged = {**earlier["methods"], **summary}
        for key in earlier["methods"]:
            if key not in summary:
                merged[key] = {**earlier["methods"][key], "load": earlier["meta"].get("load")}
        result["methods"] = {m: merged[m] for m in METHODS if m in merged}
        result["meta"]["merged"] = [*result["meta"].get("merged", []), earlier["meta"]["date"]]
    text = render(result)
    print(text)
    if args.out:
        args.out.parent.mkdir(parents=True, exist_ok=True)
        args.out.write_text(json.dumps(result, indent=2))
    if args.readme:
        write_readme(text)
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
