"""Renders an AuditReport as plain text (terminals, CI logs) and as self-contained HTML."""

from __future__ import annotations

import datetime as dt
import html
from typing import TYPE_CHECKING, Any

if TYPE_CHECKING:
    from .audit_report import AgeHistogram, AuditReport, Finding

__all__ = ["render_html", "render_text"]

_CELL = 28  # widest cell in a text example table


def _fmt(value: Any) -> str:
    """One cell as short text: null, ISO-like times, full float repr, clipped strings."""
    if value is None:
        return "null"
    if isinstance(value, dt.datetime):
        text = value.isoformat(sep=" ")
    elif isinstance(value, dict):
        text = ", ".join(f"{k}={_fmt(v)}" for k, v in value.items())
    else:
        text = str(value)
    return text if len(text) <= _CELL else text[: _CELL - 3] + "..."


def _example_table(finding: Finding) -> tuple[list[str], list[list[str]]]:
    """Examples as a header and rows: the key's columns spread out, other fields as they come."""
    header: list[str] = []
    rows: list[dict[str, str]] = []
    for ex in finding.examples:
        flat: dict[str, str] = {}
        for name, value in ex.items():
            if name == "key" and isinstance(value, dict):
                for k, v in value.items():
                    flat[str(k)] = _fmt(v)
            else:
                flat[name] = _fmt(value)
        for name in flat:
            if name not in header:
                header.append(name)
        rows.append(flat)
    return header, [[r.get(h, "") for h in header] for r in rows]


def _where(finding: Finding) -> str:
    """What a finding is about: the feature, the source table, or the pair of splits."""
    if finding.feature is not None:
        return finding.feature
    if finding.table is not None:
        return f"table {finding.table}"
    later, earlier = finding.details.get("later"), finding.details.get("earlier")
    if later is not None and earlier is not None:
        return f"split {later} after {earlier}"
    return "-"


def _summary(report: AuditReport) -> str:
    errors, warnings = report.count("error"), report.count("warning")
    status = "OK" if report.ok else "FAIL"
    if not report.findings:
        found = "no findings"
    else:
        found = f"{errors} error{'s' * (errors != 1)}, {warnings} warning{'s' * (warnings != 1)}"
    return f"{status}: {found} in {report.rows:,} rows (spec {report.fingerprint})"


def _checked_lines(report: AuditReport) -> list[str]:
    by_how: dict[str, list[str]] = {}
    for feature, how in report.checked.items():
        by_how.setdefault(how, []).append(feature)
    return [
        f"{'not checked' if how == 'not checked' else 'checked by ' + how}: {', '.join(names)}"
        for how, names in by_how.items()
    ]


def render_text(report: AuditReport) -> str:
    """Plain ASCII text: a status line, one block per finding with an example table, notes."""
    lines = [f"asof-join audit: {_summary(report)}"]
    lines += [f"  {line}" for line in _checked_lines(report)]
    for finding in report.findings:
        lines.append("")
        where = _where(finding)
        cause = f" [{finding.cause.value}]" if finding.cause is not None else ""
        lines.append(
            f"{finding.severity.value.upper():<8}{finding.rule.value}{cause}  {where}  "
            f"rows={finding.rows:,}"
        )
        lines.append(f"  {finding.message}")
        header, rows = _example_table(finding)
        if rows:
            widths = [max(len(h), *(len(r[i]) for r in rows)) for i, h in enumerate(header)]
            cells = (h.ljust(w) for h, w in zip(header, widths, strict=True))
            lines.append("  " + "  ".join(cells).rstrip())
            for row in rows:
                cells = (c.ljust(w) for c, w in zip(row, widths, strict=True))
                lines.append("  " + "  ".join(cells).rstrip())
            more = len(finding.positions) - len(rows)
            if more > 0:
                lines.append(f"  ... and {more:,} more")
    if report.notes:
        lines.append("")
        lines += [f"note: {n}" for n in report.notes]
    return "\n".join(lines)


# --- HTML -------------------------------------------------------------------------------------

_STYLE = """
.aj-audit{font-family:system-ui,-apple-system,Segoe UI,sans-serif;font-size:13px;color:#222}
.aj-audit h3{margin:4px 0;font-size:15px}
.aj-audit table{border-collapse:collapse;margin:4px 0}
.aj-audit th,.aj-audit td{border:1px solid #ddd;padding:2px 6px;text-align:left;
vertical-align:top}
.aj-audit th{background:#f4f4f4}
.aj-audit .sev{font-weight:600;border-radius:3px;padding:0 4px;color:#fff}
.aj-audit .error{background:#c0392b}.aj-audit .warning{background:#d68910}
.aj-audit .ok{color:#1e8449}.aj-audit .fail{color:#c0392b}
.aj-audit figure{display:inline-block;margin:4px 12px 4px 0}
.aj-audit figcaption{font-size:12px}
.aj-audit .muted{color:#777}
"""


def _e(value: object) -> str:
    return html.escape(str(value), quote=True)


def render_html(report: AuditReport) -> str:
    """A self-contained HTML fragment: summary, findings with examples, one SVG chart per
    feature (age of the supplying row at label time, flagged rows in red). No scripts."""
    status = "ok" if report.ok else "fail"
    parts = [
        f'<div class="aj-audit"><style>{_STYLE}</style>',
        f'<h3>asof_join audit: <span class="{status}">{_e(_summary(report))}</span></h3>',
    ]
    parts += [f'<div class="muted">{_e(line)}</div>' for line in _checked_lines(report)]
    if report.findings:
        parts.append(
            "<table><tr><th>severity</th><th>rule</th><th>feature / table</th><th>rows</th>"
            "<th>what</th></tr>"
        )
        for f in report.findings:
            where = _where(f)
            cause = f" ({f.cause.value})" if f.cause is not None else ""
            header, rows = _example_table(f)
            examples = ""
            if rows:
                head = "".join(f"<th>{_e(h)}</th>" for h in header)
                body = "".join(
                    "<tr>" + "".join(f"<td>{_e(c)}</td>" for c in r) + "</tr>" for r in rows
                )
                examples = (
                    f"<details><summary>{len(rows)} example(s)</summary>"
                    f"<table><tr>{head}</tr>{body}</table></details>"
                )
            parts.append(
                f'<tr><td><span class="sev {_e(f.severity.value)}">{_e(f.severity.value)}'
                f"</span></td><td>{_e(f.rule.value)}{_e(cause)}</td><td>{_e(where)}</td>"
                f"<td>{f.rows:,}</td><td>{_e(f.message)}{examples}</td></tr>"
            )
        parts.append("</table>")
    if report.charts:
        parts.append("<div>")
        parts += [_svg_chart(h) for h in report.charts.values()]
        parts.append("</div>")
    if report.notes:
        parts.append("<ul>" + "".join(f"<li>{_e(n)}</li>" for n in report.notes) + "</ul>")
    parts.append("</div>")
    return "".join(parts)


def _svg_chart(hist: AgeHistogram) -> str:
    """A stacked bar per age bin: clean rows grey-blue, flagged rows red; a tooltip per bar."""
    bar, gap, top, height, bottom, left = 18, 4, 14, 70, 28, 4
    n = len(hist.labels)
    width = left + n * (bar + gap) + 4
    totals = [c + f for c, f in zip(hist.clean, hist.flagged, strict=True)]
    peak = max([*totals, 1])
    items = [
        f'<svg xmlns="http://www.w3.org/2000/svg" width="{width}" height="{top + height + bottom}"'
        f' role="img" aria-label="{_e(hist.feature)}: age of the supplying row at label time">',
        f'<line x1="{left}" y1="{top + height}" x2="{width - 2}" y2="{top + height}" '
        'stroke="#999" stroke-width="1"/>',
    ]
    for i, (label, clean, flagged) in enumerate(
        zip(hist.labels, hist.clean, hist.flagged, strict=True)
    ):
        x = left + i * (bar + gap)
        h_clean = _bar_height(clean, peak, height)
        h_flag = _bar_height(flagged, peak, height)
        y = float(top + height)
        tip = f"age {label}: {clean:,} clean, {flagged:,} flagged"
        items.append(f"<g><title>{_e(tip)}</title>")
        if h_clean:
            y -= h_clean
            items.append(
                f'<rect x="{x}" y="{y:.1f}" width="{bar}" height="{h_clean:.1f}" fill="#7f9cb8"/>'
            )
        if h_flag:
            y -= h_flag
            items.append(
                f'<rect x="{x}" y="{y:.1f}" width="{bar}" height="{h_flag:.1f}" fill="#c0392b"/>'
            )
        if not h_clean and not h_flag:
            items.append(
                f'<rect x="{x}" y="{top}" width="{bar}" height="{height}" fill="transparent"/>'
            )
        items.append("</g>")
        color = "#c0392b" if i == 0 else "#555"
        items.append(
            f'<text x="{x + bar / 2:.1f}" y="{top + height + 11}" font-size="8" '
            f'text-anchor="middle" fill="{color}">{_e(label)}</text>'
        )
    items.append(
        f'<text x="{left}" y="10" font-size="10" fill="#222">{_e(hist.feature)}</text>'
        f'<text x="{width - 4}" y="10" font-size="9" text-anchor="end" fill="#777">'
        f"max {peak:,}</text>"
    )
    items.append("</svg>")
    flagged_total = sum(hist.flagged)
    caption = (
        "age of the supplying row at label time (bins up to 1m ... >1y); "
        f"red: {flagged_total:,} flagged"
    )
    if hist.unplaced:
        caption += f", {hist.unplaced:,} more of unknown source"
    return f"<figure>{''.join(items)}<figcaption>{_e(caption)}</figcaption></figure>"


def _bar_height(count: int, peak: int, height: int) -> float:
    """Linear height, but at least 1.5 px for any non-zero count so single rows stay visible."""
    if count <= 0:
        return 0.0
    return max(1.5, height * count / peak)
