"""Render core benchmark results as markdown and keep benchmarks/README.md's results current."""

from __future__ import annotations

import argparse
import json
import re
import sys
from pathlib import Path
from typing import Any

README = Path(__file__).resolve().parent / "README.md"
START = "<!-- results:start -->"
END = "<!-- results:end -->"
PENDING = (
    "_Results pending: no full-size run has been recorded yet. Run the commands above with "
    "`--readme` to fill this section._"
)
SCENARIO_ORDER = ("a", "b", "c", "d")


def _fmt_count(n: int) -> str:
    for unit, size in (("M", 1_000_000), ("k", 1_000)):
        if n >= size and n % (size // 10) == 0:
            text = f"{n / size:.1f}".rstrip("0").rstrip(".")
            return f"{text}{unit}"
    return f"{n:,}"


def _ratio(value: float | None, ref: float | None) -> str:
    if value is None or not ref:
        return "–"
    return f"{value / ref:.2f}"


def _num(value: float | None, digits: int) -> str:
    return "–" if value is None else f"{value:.{digits}f}"


def _refs(methods: dict[str, Any], letter: str) -> tuple[float | None, float | None]:
    """Median seconds of the scenario's hand SQL and floor; (d) uses (a)'s."""
    scen = "a" if letter == "d" else letter
    hand = next(
        (m for m in methods.values() if m["scenario"] == scen and m["role"] == "hand"), None
    )
    floor = next(
        (m for m in methods.values() if m["scenario"] == scen and m["role"] == "floor"), None
    )
    return (hand or {}).get("median_s"), (floor or {}).get("median_s")


def _check(m: dict[str, Any]) -> str:
    if m.get("error"):
        return "failed"
    if m["role"] == "floor":
        return "–"
    check = m.get("check")
    if not check:
        return "unchecked"
    if not check.get("ok"):
        mism = sum((check.get("value_mismatches") or {}).values())
        return f"**{mism} mismatches**" if mism else "**wrong**"
    if check.get("reference") in (None, m["key"]):
        return "reference"
    return "equal"


def run_key(doc: dict[str, Any]) -> str:
    """Identifies a run's size, so reruns at one size replace each other in the README."""
    return f"{doc['labels']}x{doc['rows']}"


def render(doc: dict[str, Any], heading_level: int = 3) -> str:
    """Markdown for one result document: heading, machine, table, notes."""
    methods: dict[str, Any] = doc["methods"]
    mach = doc["machine"]
    v = mach["versions"]
    lines = [
        f"{'#' * heading_level} {_fmt_count(doc['labels'])} labels × "
        f"{_fmt_count(doc['rows'])} rows per feature table",
        "",
        f"{doc['created']}; median of {doc['repeat']} fresh processes per method. Machine: "
        f"{mach['nproc']} CPUs ({mach['cpu'] or 'unknown CPU'}), {mach['ram_gib']} GiB RAM, "
        f"{mach['platform']}. Python {v['python']}, asof_join {v['asof_join']}, "
        f"duckdb {v['duckdb']}, pandas {v['pandas']}, polars {v['polars']}, "
        f"pyarrow {v['pyarrow']}, numpy {v['numpy']}.",
        "",
        "| scenario | method | median s | peak MiB | × hand SQL | × floor | result |",
        "|---|---|--:|--:|--:|--:|---|",
    ]
    for letter in SCENARIO_ORDER:
        rows = [m for m in methods.values() if m["scenario"] == letter]
        if not rows:
            continue
        hand, floor = _refs(methods, letter)
        for m in rows:
            lines.append(
                f"| ({letter}) {doc['scenarios'][letter]} | {m['title']} "
                f"| {_num(m['median_s'], 2)} | {_num(m['median_peak_mib'], 0)} "
                f"| {_ratio(m['median_s'], hand)} | {_ratio(m['median_s'], floor)} "
                f"| {_check(m)} |"
            )
    notes = _notes(doc)
    if notes:
        lines += [""] + [f"- {n}" for n in notes]
    return "\n".join(lines)


def _notes(doc: dict[str, Any]) -> list[str]:
    methods: dict[str, Any] = doc["methods"]
    notes: list[str] = []
    a_build = methods.get("a:build", {})
    b_build = methods.get("b:build", {})
    if a_build.get("median_s") and b_build.get("median_s"):
        notes.append(
            "(b) vs (a): build() with `known_at` takes "
            f"{b_build['median_s'] / a_build['median_s']:.2f}× the time and "
            f"{b_build['median_peak_mib'] / a_build['median_peak_mib']:.2f}× the peak memory "
            "of plain build()."
        )
    if any(m["scenario"] == "d" for m in methods.values()):
        peak = a_build.get("median_peak_mib")
        notes.append(
            f"(d): `memory_limit={doc['memory_limit_d']}`"
            + (f", a third of (a)'s unconstrained build() peak of {peak:.0f} MiB" if peak else "")
            + "; DuckDB's limit covers its own buffers, not the Arrow result held by Python. "
            "Ratios are against (a)'s hand SQL and floor."
        )
    notes.append(
        "Times cover reading the Parquet inputs, joining, restoring label input order and "
        "materializing the result in memory (Arrow for build() and DuckDB, a DataFrame for "
        "pandas and polars); interpreter start and imports are excluded."
    )
    notes.append(
        "Peak MiB is the process's maximum resident set (`VmHWM` of /proc/self/status, read in "
        "each fresh process right after the method), so it includes the interpreter and the "
        "imported libraries."
    )
    base = {
        m["title"]: m["base_mib"]
        for m in methods.values()
        if m["scenario"] == "a" and m.get("base_mib") is not None
    }
    if base:
        notes.append(
            "Resident set before the method starts (interpreter and imports), in MiB: "
            + ", ".join(f"{t} {b:.0f}" for t, b in base.items())
            + "."
        )
    notes.append(
        "The floor is DuckDB reading the same columns and sorting each input by key and time "
        "into temporary tables, without joining."
    )
    notes.append(
        "Strictness (s < t): DuckDB uses `l.event_at > r.updated_at`; pandas and polars use "
        "`allow_exact_matches=False` (polars is inclusive by default)."
    )
    notes += doc.get("notes", [])
    if doc.get("failures"):
        notes.append("FAILURES: " + "; ".join(doc["failures"]))
    return notes


def update_readme(doc: dict[str, Any], path: Path = README) -> None:
    """Insert or replace this run's size in the README's results section."""
    replace_run(path, run_key(doc), render(doc))


def replace_run(
    path: Path,
    key: str,
    block: str,
    *,
    start: str = START,
    end: str = END,
    tag: str = "run",
    heading: str = "## Results",
) -> None:
    """Insert or replace one run's block (key ``<labels>x<rows>``) between the markers.

    Only the text between ``start`` and ``end`` changes; a README without them gets
    ``heading`` and the markers appended. Blocks are ordered by rows, then labels.
    """
    text = path.read_text()
    if start not in text or end not in text:
        text = text.rstrip("\n") + f"\n\n{heading}\n\n{start}\n{PENDING}\n{end}\n"
    head, rest = text.split(start, 1)
    body, tail = rest.split(end, 1)
    pattern = rf"<!-- {tag}:(\S+) -->\n(.*?)\n<!-- /{tag}:\1 -->"
    runs = dict(re.findall(pattern, body, flags=re.S))
    runs[key] = block

    def order(k: str) -> tuple[int, int]:
        labels, rows = k.split("x")
        return int(rows), int(labels)

    blocks = [
        f"<!-- {tag}:{k} -->\n{runs[k]}\n<!-- /{tag}:{k} -->" for k in sorted(runs, key=order)
    ]
    path.write_text(head + start + "\n" + "\n\n".join(blocks) + "\n" + end + tail)


def main(argv: list[str] | None = None) -> int:
    """Print results JSON files as markdown, or write them into the README with --readme."""
    parser = argparse.ArgumentParser(description=__doc__)
    parser.add_argument("results", nargs="+", type=Path, help="JSON files from bench_core --out")
    parser.add_argument("--readme", action="store_true", help="update benchmarks/README.md")
    args = parser.parse_args(argv)
    status = 0
    for p in args.results:
        doc = json.loads(p.read_text())
        print(render(doc), end="\n\n")
        if args.readme:
            if not doc.get("ok"):
                print(f"{p}: run failed, README not updated", file=sys.stderr)
                status = 1
                continue
            update_readme(doc)
    return status


if __name__ == "__main__":
    raise SystemExit(main())
