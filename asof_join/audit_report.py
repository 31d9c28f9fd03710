"""The audit's public result types: rules, severities, findings and the report.

The checks that produce them live in ``audit.py``; rendering to text and HTML in
``audit_render.py``.
"""

from __future__ import annotations

import dataclasses
import datetime as dt
import decimal
import enum
import json
import math
from dataclasses import dataclass, field
from typing import TYPE_CHECKING, Any

import numpy as np

from .durations import format_duration

if TYPE_CHECKING:
    import pandas as pd

#: Floats are equal when ``|a - b| <= max(ABS_TOLERANCE, REL_TOLERANCE * max(|a|, |b|))``.
REL_TOLERANCE = 1e-9
ABS_TOLERANCE = 1e-12
#: label_proxy: ROC AUC at or above this (or at or below 1 - this) for a numeric feature ...
PROXY_AUC = 0.99
#: ... or the feature equals the label on at least this share of the labelled rows ...
PROXY_EQUAL_SHARE = 0.99
#: ... measured only when each label class has at least this many rows with a feature value.
PROXY_MIN_CLASS_ROWS = 10

_DAY_US = 86_400_000_000
#: Chart bins of the supplying row's age at label time (t - valid time): (label, upper bound in
#: microseconds, inclusive). The first bin holds rows from the label's instant or later.
AGE_BINS: tuple[tuple[str, int | None], ...] = (
    ("<=0", 0),
    ("1m", 60_000_000),
    ("10m", 600_000_000),
    ("1h", 3_600_000_000),
    ("6h", 21_600_000_000),
    ("1d", _DAY_US),
    ("7d", 7 * _DAY_US),
    ("30d", 30 * _DAY_US),
    ("90d", 90 * _DAY_US),
    ("1y", 365 * _DAY_US),
    (">1y", None),
)
_EDGES = np.array([b for _, b in AGE_BINS if b is not None], dtype=np.int64)


class Severity(str, enum.Enum):
    """How bad a finding is. ``AuditReport.ok`` is False when any finding is an error."""

    ERROR = "error"  #: leakage, or a set that cannot be trusted
    WARNING = "warning"  #: a defect that is not proven leakage

    @property
    def rank(self) -> int:
        """2 for error, 1 for warning: a finding reaches a level when its rank is at least it."""
        return 2 if self is Severity.ERROR else 1


class Rule(str, enum.Enum):
    """The audit's rule ids (the values are part of the interface)."""

    FUTURE_ROW = "future_row"
    NOT_YET_KNOWN = "not_yet_known"
    VALUE_MISMATCH = "value_mismatch"
    STALE_VALUE = "stale_value"
    LABEL_PROXY = "label_proxy"
    SPLIT_OVERLAP = "split_overlap"
    AMBIGUOUS_SOURCE_ROWS = "ambiguous_source_rows"
    KNOWN_BEFORE_VALID = "known_before_valid"


class Cause(str, enum.Enum):
    """Why a ``value_mismatch`` happened, when the audit can tell."""

    #: equals the value of a source row of the same key not yet visible at the label time
    LATER_ROW = "later_row"
    #: (trailing) equals the aggregate over the window that also counts rows not yet visible
    NOT_YET_VISIBLE_ROWS = "not_yet_visible_rows"
    #: no later row or leaky window explains the value
    UNKNOWN = "unknown"


#: Each rule's severity; ``value_mismatch`` is an error only with a leak cause, else a warning.
RULE_SEVERITY: dict[Rule, Severity] = {
    Rule.FUTURE_ROW: Severity.ERROR,
    Rule.NOT_YET_KNOWN: Severity.ERROR,
    Rule.VALUE_MISMATCH: Severity.ERROR,
    Rule.STALE_VALUE: Severity.WARNING,
    Rule.LABEL_PROXY: Severity.ERROR,
    Rule.SPLIT_OVERLAP: Severity.ERROR,
    Rule.AMBIGUOUS_SOURCE_ROWS: Severity.WARNING,
    Rule.KNOWN_BEFORE_VALID: Severity.WARNING,
}
_RULE_ORDER = {rule: i for i, rule in enumerate(Rule)}


@dataclass(frozen=True)
class Finding:
    """One rule's result for one feature (or table, or pair of splits).

    ``rows`` counts the offending rows and ``positions`` lists all of them, 0-based, in the
    audited frame, except: for ``ambiguous_source_rows`` and ``known_before_valid`` they are
    positions in the source table named by ``table``; ``label_proxy`` is a column-level finding
    whose ``rows`` is the number of rows measured and whose ``positions`` is empty.
    ``examples`` holds a few offending rows as dicts (``position``, ``key``, ``label_time``,
    ``supplied``, ``point_in_time``, ``later_row_time``, ... as the rule has them).
    """

    rule: Rule
    severity: Severity
    feature: str | None
    rows: int
    positions: list[int]
    examples: list[dict[str, Any]]
    message: str = ""
    table: str | None = None
    cause: Cause | None = None
    details: dict[str, Any] = field(default_factory=dict)

    def to_dict(self) -> dict[str, Any]:
        """The finding as plain JSON-ready values (enums as their ids)."""
        return {
            "rule": self.rule.value,
            "severity": self.severity.value,
            "feature": self.feature,
            "table": self.table,
            "cause": None if self.cause is None else self.cause.value,
            "rows": self.rows,
            "message": self.message,
            "positions": list(self.positions),
            "examples": _plain(self.examples),
            "details": _plain(self.details),
        }


@dataclass(frozen=True)
class AgeHistogram:
    """Per feature: how old the supplying row was at label time, clean and flagged rows apart."""

    feature: str
    clean: tuple[int, ...]  #: rows per AGE_BINS bin that no rule flagged
    flagged: tuple[int, ...]  #: rows per bin flagged by a rule of this feature
    unplaced: int = 0  #: flagged rows whose supplying row is unknown (value_mismatch, unknown)

    @property
    def labels(self) -> tuple[str, ...]:
        """The bins' labels (AGE_BINS)."""
        return tuple(label for label, _ in AGE_BINS)


@dataclass
class AuditReport:
    """What ``audit()`` found. Never raised: read ``ok`` or ``fails()`` to gate a pipeline."""

    findings: list[Finding]
    rows: int
    #: feature -> how it was checked: "provenance", "recomputation", both, or "not checked"
    checked: dict[str, str]
    notes: list[str]
    charts: dict[str, AgeHistogram]
    fingerprint: str
    label: str | None = None
    split: str | None = None

    @property
    def ok(self) -> bool:
        """False when any finding has severity ``error``."""
        return not self.fails(Severity.ERROR)

    def fails(self, at: Severity | str = Severity.ERROR) -> bool:
        """True when some finding's severity reaches ``at`` ("error" or "warning")."""
        level = Severity(at)
        return any(f.severity.rank >= level.rank for f in self.findings)

    def count(self, severity: Severity | str) -> int:
        """How many findings have exactly this severity."""
        level = Severity(severity)
        return sum(f.severity is level for f in self.findings)

    def to_frame(self) -> pd.DataFrame:
        """One row per finding: rule, severity, feature, table, cause, rows, message, examples."""
        import pandas as pd

        columns = ["rule", "severity", "feature", "table", "cause", "rows", "message", "examples"]
        records = [{c: f.to_dict()[c] for c in columns} for f in self.findings]
        return pd.DataFrame.from_records(records, columns=columns)

    def to_dict(self) -> dict[str, Any]:
        """The report as plain JSON-ready values."""
        return {
            "ok": self.ok,
            "rows": self.rows,
            "fingerprint": self.fingerprint,
            "label": self.label,
            "split": self.split,
            "errors": self.count(Severity.ERROR),
            "warnings": self.count(Severity.WARNING),
            "checked": dict(self.checked),
            "findings": [f.to_dict() for f in self.findings],
            "notes": list(self.notes),
            "charts": {
                name: {
                    "bins": list(h.labels),
                    "clean": list(h.clean),
                    "flagged": list(h.flagged),
                    "unplaced": h.unplaced,
                }
                for name, h in self.charts.items()
            },
        }

    def to_json(self, *, indent: int | None = 2) -> str:
        """The report as JSON text (every position listed; times as ISO 8601)."""
        return json.dumps(self.to_dict(), indent=indent, ensure_ascii=False)

    def __str__(self) -> str:
        from .audit_render import render_text

        return render_text(self)

    def _repr_html_(self) -> str:
        from .audit_render import render_html

        return render_html(self)


def _plain(value: Any) -> Any:
    """JSON-ready: datetimes as ISO text, numpy scalars unwrapped, NaN as null."""
    if isinstance(value, dict):
        return {str(k): _plain(v) for k, v in value.items()}
    if isinstance(value, (list, tuple)):
        return [_plain(v) for v in value]
    if isinstance(value, enum.Enum):
        return value.value
    if isinstance(value, (dt.datetime, dt.date, dt.time)):
        return value.isoformat()
    if isinstance(value, dt.timedelta):
        return format_duration(value)
    if isinstance(value, np.generic):
        return _plain(value.item())
    if isinstance(value, float) and not math.isfinite(value):
        return None if math.isnan(value) else str(value)
    if isinstance(value, decimal.Decimal):
        return str(value)
    if isinstance(value, bytes):
        return value.hex()
    if value is None or isinstance(value, (str, int, float, bool)):
        return value
    if dataclasses.is_dataclass(value) and not isinstance(value, type):
        return _plain(dataclasses.asdict(value))
    return str(value)
