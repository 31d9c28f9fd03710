"""Leakage audit: checks a training set made by any tool against its spec; returns an AuditReport.

Rules and their severities (ids are part of the interface, see ``Rule``):

=========================  ========  ==========================================================
rule                       severity  fires when
=========================  ========  ==========================================================
``future_row``             error     a supplied row's valid time is at or after the label time
                                     (after it, for a table declared ``inclusive=True``)
``not_yet_known``          error     the supplied row was valid before the label time but its
                                     known time is at or after it (after it when inclusive)
``value_mismatch``         error     the value differs from the point-in-time value and equals
                                     the value of a row not yet visible at the label time
                                     (``cause="later_row"``; for trailing features: equals the
                                     aggregate that counts rows not yet visible,
                                     ``cause="not_yet_visible_rows"``): leakage
``value_mismatch``         warning   the value differs and no later row explains it
                                     (``cause="unknown"``)
``stale_value``            warning   the supplied row is older than the feature's ``max_age``
                                     (the point-in-time value is null): train/serve skew
``label_proxy``            error     one feature separates a binary label almost perfectly
``split_overlap``          error     a later split's rows start at or before an earlier
                                     split's last label time plus the gap
``ambiguous_source_rows``  warning   source rows share key, valid and known time but differ in
                                     value: the build keeps the last in input order
``known_before_valid``     warning   a source row's known time is before its valid time (the
                                     known time is then taken as the valid time)
=========================  ========  ==========================================================
"""

from __future__ import annotations

import datetime as dt
import os
from collections.abc import Mapping, Sequence
from dataclasses import dataclass, field
from pathlib import Path
from typing import TYPE_CHECKING, Any

import numpy as np
import pyarrow as pa

from .audit_labels import LabelChecks
from .audit_report import (
    _RULE_ORDER,
    ABS_TOLERANCE,
    AGE_BINS,
    PROXY_AUC,
    PROXY_EQUAL_SHARE,
    PROXY_MIN_CLASS_ROWS,
    REL_TOLERANCE,
    RULE_SEVERITY,
    AgeHistogram,
    AuditReport,
    Cause,
    Finding,
    Rule,
    Severity,
)
from .audit_sources import SourceChecks
from .audit_sql import (
    _AUD,
    _AWARE,
    _POS,
    _bin_sql,
    _bins,
    _canon_sql,
    _describe,
    _duck_types,
    _eq_sql,
    _family,
    _filled,
    _micros_sql,
    _micros_to_py,
    _rows,
    _unbounded,
)
from .durations import format_duration, parse_duration, to_micros
from .engines.sql import Params, quote_ident
from .errors import (
    ColumnNotFoundError,
    InputError,
    SpecError,
    UnknownTableError,
    UnreadableInputError,
)
from .inputs import check_known_tables
from .plan import LatestLookup
from .spec import Latest, TrainingSetSpec

if TYPE_CHECKING:
    import duckdb

    from .build import TrainingSet
    from .plan import Plan, TrailingLookup
    from .spec import Feature

__all__ = [
    "ABS_TOLERANCE",
    "AGE_BINS",
    "PROXY_AUC",
    "PROXY_EQUAL_SHARE",
    "PROXY_MIN_CLASS_ROWS",
    "REL_TOLERANCE",
    "RULE_SEVERITY",
    "AgeHistogram",
    "AuditReport",
    "Cause",
    "Finding",
    "Rule",
    "Severity",
    "audit",
    "read_frame",
]

q = quote_ident

#: Name the label table gets while the audit recomputes (it appears in error messages).
_FRAME = "audited frame"
_RESERVED = "__aj_"


def audit(
    frame: object,
    spec: TrainingSetSpec,
    data: Mapping[str, object] | None = None,
    label: str | None = None,
    split: str | None = None,
    *,
    gap: str | dt.timedelta = "0s",
    split_names: Sequence[str] = ("train", "valid", "test"),
    recompute: bool = False,
    max_examples: int = 5,
    memory_limit: str | None = None,
    threads: int | None = None,
) -> AuditReport:
    """Audit a training set for leakage against its spec; findings are returned, never raised.

    The frame may come from any tool: it must hold the label table's columns and every feature
    column named as the spec names it. A latest feature whose ``<name>__time`` and
    ``<name>__known_at`` columns are present (``build(..., provenance=True)``) is checked from
    them alone: ``future_row``, ``not_yet_known``, ``stale_value``; no source data is needed.
    Every other feature is checked by recomputation: the frame's label columns are bound as the
    label table, the point-in-time values are rebuilt from ``data`` and compared (floats with
    ``|a - b| <= max(1e-12, 1e-9 * max(|a|, |b|))``; null equals null; NaN counts as null). A
    differing value that equals a row of the same key not yet visible at the label time is a
    ``value_mismatch`` error with cause ``later_row``; one older than ``max_age`` is a
    ``stale_value``; anything else is a ``value_mismatch`` warning of unknown cause. The
    comparison and the later-row search run in DuckDB. The source rules
    (``ambiguous_source_rows``, ``known_before_valid``) run over every bound table.

    ``label_proxy`` (with ``label=``, a column with two distinct values) fires for a feature
    whose ROC AUC against the label (``sklearn.metrics.roc_auc_score``; numeric and boolean
    features) is >= 0.99 or <= 0.01, or that equals the label on >= 99% of the labelled rows;
    each class needs at least 10 rows with a feature value. Without scikit-learn the AUC measure
    is skipped with a note. ``split_overlap`` (a ``split`` column, or ``split=`` naming one;
    rows named ``"gap"`` are ignored) fires for rows of a later split at or before an earlier
    split's last label time plus ``gap``; splits are ordered as in ``split_names``, others by
    their first label time.

    Args:
        frame: pandas, polars or pyarrow frame, DuckDB relation, or a Parquet/CSV path.
        spec: the spec the set claims to follow.
        data: table name -> frame or path, as for ``build()``; tables' ``path:`` fill the rest.
        label: the binary label column, for ``label_proxy``.
        split: the split column, for ``split_overlap`` (default: ``"split"`` when present).
        gap: the gap each earlier split must keep before a later one (default none).
        split_names: the order of the splits.
        recompute: also recompute features that have provenance columns.
        max_examples: examples kept per finding.
        memory_limit: DuckDB memory limit for the recomputation, e.g. ``"2GB"``.
        threads: DuckDB threads.

    Returns:
        An AuditReport: ``ok``, ``findings``, ``to_frame()``, ``to_json()``, ``str()``, HTML.

    Raises:
        SpecError: ``spec`` is not a TrainingSetSpec, or an argument is malformed.
        InputError: the frame lacks a column the spec needs, a feature must be recomputed but
            its table has no data, or the data does not fit the spec (as in ``build()``).

    Example:
        >>> import pandas as pd, asof_join as aj
        >>> customer = aj.Entity("customer", keys=["customer_id"])
        >>> orders = aj.EventTable("orders", time="at", entities=[customer])
        >>> tiers = aj.EventTable("tiers", time="at", entities=[customer])
        >>> spec = aj.TrainingSetSpec(labels=orders, features=[aj.Latest(tiers, ["tier"])])
        >>> t = pd.DataFrame({"customer_id": [1, 1], "tier": ["seed", "bloom"],
        ...                   "at": pd.to_datetime(["2024-01-01", "2024-01-05"])})
        >>> train = pd.DataFrame({"customer_id": [1, 1], "tier": ["seed", "bloom"],
        ...                       "at": pd.to_datetime(["2024-01-02", "2024-01-05"])})
        >>> report = aj.audit(train, spec, data={"tiers": t})
        >>> report.ok, [(f.rule.value, f.positions) for f in report.findings]
        (False, [('value_mismatch', [1])])
    """
    if not isinstance(spec, TrainingSetSpec):
        msg = f"audit() needs a TrainingSetSpec (or aj.load_spec(path)), got {type(spec).__name__}"
        raise SpecError(msg)
    try:
        gap_us = to_micros(parse_duration(gap, what="gap"))
    except ValueError as exc:
        raise SpecError(str(exc)) from None
    if isinstance(split_names, str):
        msg = f"split_names must be a sequence of names, got the string {split_names!r}"
        raise SpecError(msg)
    table = read_frame(frame)
    auditor = _Auditor(
        spec,
        table,
        data,
        label=label,
        split=split,
        gap_us=gap_us,
        split_names=tuple(str(n) for n in split_names),
        recompute=recompute,
        max_examples=max(0, int(max_examples)),
        memory_limit=memory_limit,
        threads=threads,
    )
    return auditor.run()


def read_frame(frame: object) -> pa.Table:
    """A training set as a pyarrow Table: pandas, polars, pyarrow, DuckDB, or a file path."""
    if isinstance(frame, (str, os.PathLike)):
        return _read_path(os.fspath(frame))
    if isinstance(frame, pa.Table):
        return frame
    if isinstance(frame, pa.RecordBatchReader):
        return frame.read_all()
    module = type(frame).__module__.split(".")[0]
    name = type(frame).__name__
    if module == "pandas" and name == "DataFrame":
        return pa.Table.from_pandas(frame, preserve_index=False)
    if module == "polars" and name in ("DataFrame", "LazyFrame"):
        polars_frame: Any = frame
        if name == "LazyFrame":
            polars_frame = polars_frame.collect()
        table: pa.Table = polars_frame.to_arrow()
        return table
    if module in ("duckdb", "_duckdb") and hasattr(frame, "to_arrow_table"):
        relation: Any = frame
        result: pa.Table = relation.to_arrow_table()
        return result
    msg = (
        f"the audited frame is a {type(frame).__module__}.{name}; pass a pandas, polars or "
        "pyarrow frame, a DuckDB relation, or a Parquet/CSV path"
    )
    raise InputError(msg)


def _read_path(path: str) -> pa.Table:
    import duckdb

    if not Path(path).is_file():
        msg = f"cannot read the training set {path!r}: no such file; check the path"
        raise UnreadableInputError(msg, value=path)
    is_csv = path.lower().endswith((".csv", ".tsv", ".txt", ".csv.gz", ".tsv.gz"))
    from .engines.duckdb import connect

    con = connect()
    try:
        rel = con.read_csv(path) if is_csv else con.read_parquet(path)
        table: pa.Table = rel.to_arrow_table()
    except duckdb.Error as exc:
        first = str(exc).splitlines()[0]
        kind = "CSV" if is_csv else "Parquet"
        msg = f"cannot read the training set {path!r} as {kind}: {first}; check the file"
        raise UnreadableInputError(msg, value=path) from None
    finally:
        con.close()
    return table


# --- internals --------------------------------------------------------------------------------


@dataclass
class _Output:
    """One feature column of the audited frame and how it is checked."""

    name: str
    feature: Feature
    index: int  #: position among the feature's outputs
    provenance: bool  #: the frame has <name>__time and <name>__known_at
    recompute: bool = False
    slot: int = -1  #: index of its expected columns (__aj_e<slot>) when recomputed

    @property
    def table(self) -> str:
        return self.feature.table.name

    @property
    def is_latest(self) -> bool:
        return isinstance(self.feature, Latest)

    @property
    def max_age_us(self) -> int | None:
        if isinstance(self.feature, Latest) and self.feature.max_age is not None:
            return to_micros(self.feature.max_age)
        return None


@dataclass
class _Checked:
    """Per output: rows each rule flagged and the chart, gathered while rules run."""

    clean: np.ndarray = field(default_factory=lambda: np.zeros(len(AGE_BINS), dtype=np.int64))
    flagged: np.ndarray = field(default_factory=lambda: np.zeros(len(AGE_BINS), dtype=np.int64))
    unplaced: int = 0
    charted: bool = False


class _Auditor(SourceChecks, LabelChecks):
    """Runs the rules over one frame in one DuckDB connection."""

    def __init__(
        self,
        spec: TrainingSetSpec,
        table: pa.Table,
        data: Mapping[str, object] | None,
        *,
        label: str | None,
        split: str | None,
        gap_us: int,
        split_names: tuple[str, ...],
        recompute: bool,
        max_examples: int,
        memory_limit: str | None,
        threads: int | None,
    ) -> None:

        self.spec = spec
        self.table = table
        self.data = dict(data or {})
        self.label = label
        self.split = split
        self.gap_us = gap_us
        self.split_names = split_names
        self.force_recompute = recompute
        self.max_examples = max_examples
        self.memory_limit = memory_limit
        self.threads = threads
        from .engines.duckdb import connect

        self.con: duckdb.DuckDBPyConnection = connect()
        self.findings: list[Finding] = []
        self.notes: list[str] = []
        self.outputs: list[_Output] = []
        self.checks: dict[str, _Checked] = {}
        self.plan: Plan | None = None
        self.train: TrainingSet | None = None
        self.sources: dict[str, str] = {}
        self.bound: dict[str, object] = {}
        self.label_columns: list[str] = []
        self.frame_name = _FRAME
        self.types: dict[str, str] = {}
        self.source_types: dict[str, dict[str, str]] = {}
        self.label_zone: str | None = None
        self._keep: list[object] = []
        self._auc: Any = None  #: sklearn's roc_auc_score once imported; False when missing

    # -- driver ----------------------------------------------------------------------------

    def run(self) -> AuditReport:
        try:
            self._resolve_columns()
            self._bind_sources()
            self._register()
            for out in self.outputs:
                self.checks[out.name] = _Checked()
                if out.provenance:
                    self._check_provenance(out)
            self._check_recomputed()
            self._check_sources()
            self._check_label_proxy()
            self._check_splits()
        finally:
            self.con.close()
        return self._report()

    def _report(self) -> AuditReport:
        checked: dict[str, str] = {}
        for out in self.outputs:
            pairs = (("provenance", out.provenance), ("recomputation", out.recompute))
            how = [m for m, on in pairs if on]
            checked[out.name] = " and ".join(how) if how else "not checked"
        unchecked = [n for n, how in checked.items() if how == "not checked"]
        if unchecked:
            self.notes.append(
                f"not checked (no provenance columns and no data for their tables): "
                f"{', '.join(unchecked)}; pass data= to recompute them"
            )
        charts = {
            name: AgeHistogram(
                name, tuple(int(x) for x in c.clean), tuple(int(x) for x in c.flagged), c.unplaced
            )
            for name, c in self.checks.items()
            if c.charted
        }
        findings = sorted(
            self.findings,
            key=lambda f: (-f.severity.rank, _RULE_ORDER[f.rule], f.feature or "", f.table or ""),
        )
        return AuditReport(
            findings=findings,
            rows=self.table.num_rows,
            checked=checked,
            notes=self.notes,
            charts=charts,
            fingerprint=self.spec.fingerprint(),
            label=self.label,
            split=self.split,
        )

    # -- columns and bindings --------------------------------------------------------------

    def _resolve_columns(self) -> None:
        names = list(self.table.column_names)
        reserved = [c for c in names if c.startswith(_RESERVED)]
        if reserved:
            msg = (
                f"the audited frame has column(s) {reserved} starting with {_RESERVED!r}, a "
                "prefix the audit reserves; rename them"
            )
            raise InputError(msg)
        present = set(names)
        provenance_columns: set[str] = set()
        for feat in self.spec.features:
            for index, name in enumerate(feat.output_names()):
                if name not in present:
                    raise ColumnNotFoundError.missing(
                        _FRAME,
                        name,
                        f"output of {_describe(feat)}",
                        names,
                        "Name the frame's feature columns as the spec names them, or fix the spec.",
                    )
                extra = (f"{name}__time", f"{name}__known_at")
                has = isinstance(feat, Latest) and all(c in present for c in extra)
                if isinstance(feat, Latest):
                    # never label columns, even alone: the recomputation outputs these names
                    provenance_columns.update(c for c in extra if c in present)
                self.outputs.append(_Output(name, feat, index, has))
        outputs = {o.name for o in self.outputs}
        self.label_columns = [c for c in names if c not in outputs and c not in provenance_columns]
        labels = self.spec.labels
        needed = {labels.time: "label time"}
        for feat in self.spec.features:
            for col in self.spec.join_keys(feat)[0]:
                needed.setdefault(col, f"join key for table {feat.table.name!r}")
        for col, role in needed.items():
            if col not in self.label_columns:
                raise ColumnNotFoundError.missing(
                    _FRAME,
                    col,
                    role,
                    names,
                    f"The frame must hold the label table {labels.name!r}'s columns.",
                )
        if self.label is not None and self.label not in self.label_columns:
            raise ColumnNotFoundError.missing(
                _FRAME, self.label, "label= column", self.label_columns, "Fix label=."
            )
        if self.split is None and "split" in self.label_columns:
            self.split = "split"
        if self.split is not None and self.split not in names:
            raise ColumnNotFoundError.missing(
                _FRAME, self.split, "split= column", names, "Fix split=."
            )

    def _bind_sources(self) -> None:
        spec = self.spec
        tables = spec.tables()
        check_known_tables(spec, self.data)
        label_name = spec.labels.name
        feature_tables = list(dict.fromkeys(f.table.name for f in spec.features))
        if label_name in self.data and label_name not in feature_tables:
            self.notes.append(
                f"data[{label_name!r}] was not read: the audited frame's rows are the labels"
            )
        # only the label time and join keys go into the rebuild: the other label columns would
        # be carried through it and materialized again for nothing
        needed = [self.spec.labels.time]
        for feat in self.spec.features:
            needed += [c for c in self.spec.join_keys(feat)[0] if c not in needed]
        label_data = self.table.select(needed)
        for name in feature_tables:
            # The label table read by a feature needs its own data: the audited frame may hold
            # a subset of it (one split), which would change trailing aggregates.
            source = self.data.get(name, tables[name].path)
            if source is not None:
                self.bound[name] = source

        any_provenance = any(o.provenance for o in self.outputs)
        missing: list[_Output] = []
        for out in self.outputs:
            wants = self.force_recompute or not out.provenance
            if not wants:
                continue
            if out.table in self.bound:
                out.recompute = True
            elif not any_provenance:
                missing.append(out)
        if missing:
            out = missing[0]
            why = (
                "has no provenance columns in the audited frame"
                if out.is_latest
                else "is a trailing aggregate"
            )
            msg = (
                f"feature {out.name!r} {why}, so it is checked by recomputation, which needs "
                f"table {out.table!r}: pass data={{{out.table!r}: frame_or_path}} to audit() "
                "or set path: on the table in the spec"
                + (", or build the set with provenance=True" if out.is_latest else "")
            )
            raise UnknownTableError(msg, table=out.table)
        for i, out in enumerate(o for o in self.outputs if o.recompute):
            out.slot = i

        features = [_unbounded(f) for f in spec.features if f.table.name in self.bound]
        if not features:
            return
        while self.frame_name in tables:
            self.frame_name = f"{self.frame_name} (audit)"
        from .build import build

        audit_spec = TrainingSetSpec(
            labels=spec.labels.model_copy(update={"name": self.frame_name, "path": None}),
            features=tuple(features),
            timezone=spec.timezone,
        )
        self._keep.append(label_data)
        self.train = build(
            audit_spec,
            data={**self.bound, self.frame_name: label_data},
            provenance=True,
            memory_limit=self.memory_limit,
            threads=self.threads,
            connection=self.con,
        )
        self.plan = self.train.plan
        sources = getattr(self.train.engine, "sources", None)
        assert isinstance(sources, dict), "the DuckDB engine exposes its registered sources"
        self.sources = dict(sources)

    def _register(self) -> None:
        n = self.table.num_rows
        aud = self.table.append_column(_POS, pa.array(np.arange(n, dtype=np.int64)))
        recomputed = [o for o in self.outputs if o.recompute]
        if recomputed:
            assert self.train is not None
            expected = self.train.to_arrow()
            for out in recomputed:
                aud = aud.append_column(f"__aj_e{out.slot}", expected.column(out.name))
                if out.is_latest:
                    aud = aud.append_column(
                        f"__aj_es{out.slot}", expected.column(f"{out.name}__time")
                    )
                    aud = aud.append_column(
                        f"__aj_ek{out.slot}", expected.column(f"{out.name}__known_at")
                    )
        self._keep.append(aud)
        self.con.register(_AUD, aud)
        self.types = _duck_types(self.con, q(_AUD))
        for name, view in self.sources.items():
            self.source_types[name] = _duck_types(self.con, q(view))
        # The label time zone: the plan's when there is one, else read off the frame's types.
        if self.plan is not None:
            self.label_zone = self.plan.labels.time.zone
            return
        time_cols = [self.spec.labels.time] + [
            f"{o.name}{s}" for o in self.outputs if o.provenance for s in ("__time", "__known_at")
        ]
        aware = any(self.types[c] in _AWARE for c in time_cols)
        if aware and self.types[self.spec.labels.time] not in _AWARE:
            self.label_zone = self.spec.timezone or "UTC"
            if self.spec.timezone is None:
                self.notes.append(
                    f"label time {self.spec.labels.time!r} is naive but provenance times are "
                    "timezone-aware and the spec sets no timezone=: label times read as UTC"
                )

    # -- SQL helpers -----------------------------------------------------------------------

    def _us(self, column: str, types: Mapping[str, str], p: Params, zone: str | None) -> str:
        """Epoch microseconds of a time column (aware: the instant; naive: read in zone)."""
        return _micros_sql(types[column], column, p, zone)

    def _t(self, p: Params) -> str:
        return self._us(self.spec.labels.time, self.types, p, self.label_zone)

    def _eq(self, a: str, b: str, type_a: str, type_b: str) -> str:
        return _eq_sql(a, b, _family(type_a), _family(type_b))

    def _fetch(self, sql: str, p: Params) -> pa.Table:
        table: pa.Table = self.con.sql(sql, params=dict(p.values)).to_arrow_table()
        return table

    def _scalar_rows(self, sql: str, p: Params) -> list[tuple[Any, ...]]:
        return self.con.execute(sql, dict(p.values)).fetchall()

    def _examples(
        self, out: _Output | None, positions: np.ndarray, extra: dict[str, list[Any]]
    ) -> list[dict[str, Any]]:
        """A few offending rows: position, label key, label time, supplied value, extras."""
        k = min(self.max_examples, len(positions))
        if k == 0:
            return []
        take = pa.array(positions[:k].astype(np.int64))
        keys: list[str] = []
        if out is not None:
            keys = list(self.spec.join_keys(out.feature)[0])
        time = self.spec.labels.time
        cols = [*keys, time] + ([out.name] if out is not None else [])
        rows = self.table.select(list(dict.fromkeys(cols))).take(take).to_pylist()
        examples: list[dict[str, Any]] = []
        for j, row in enumerate(rows):
            ex: dict[str, Any] = {"position": int(positions[j])}
            if keys:
                ex["key"] = {c: row[c] for c in keys}
            ex["label_time"] = row[time]
            if out is not None:
                ex["supplied"] = row[out.name]
            for name, values in extra.items():
                ex[name] = values[j]
            examples.append(ex)
        return examples

    def _add(
        self,
        rule: Rule,
        out: _Output | None,
        positions: np.ndarray,
        message: str,
        examples: list[dict[str, Any]],
        *,
        severity: Severity | None = None,
        table: str | None = None,
        cause: Cause | None = None,
        details: dict[str, Any] | None = None,
        rows: int | None = None,
    ) -> None:
        self.findings.append(
            Finding(
                rule=rule,
                severity=severity or RULE_SEVERITY[rule],
                feature=None if out is None else out.name,
                rows=len(positions) if rows is None else rows,
                positions=np.asarray(positions, dtype=np.int64).tolist(),
                examples=examples,
                message=message,
                table=table if table is not None else (None if out is None else out.table),
                cause=cause,
                details=details or {},
            )
        )

    def _share(self, n: int) -> str:
        total = self.table.num_rows
        return f"{_rows(n)} ({n / total:.2%})" if total else _rows(n)

    # -- provenance rules ------------------------------------------------------------------

    def _check_provenance(self, out: _Output) -> None:
        """future_row, not_yet_known and stale_value from <name>__time and <name>__known_at."""
        p = Params()
        t = self._t(p)
        s = self._us(f"{out.name}__time", self.types, p, None)
        k0 = self._us(f"{out.name}__known_at", self.types, p, None)
        inclusive = out.feature.table.inclusive
        cmp = ">" if inclusive else ">="
        max_age = out.max_age_us
        stale = "FALSE" if max_age is None else f"s < t - CAST({p.add(max_age)} AS BIGINT)"
        base = f"""
            WITH x AS (
                SELECT {q(_POS)} AS pos, {t} AS t, {s} AS s, greatest({k0}, {s}) AS k
                FROM {q(_AUD)}
            ), c AS (
                SELECT pos, t, s, k,
                       CASE WHEN t IS NULL OR s IS NULL THEN 0
                            WHEN s {cmp} t THEN 1
                            WHEN k {cmp} t THEN 2
                            WHEN {stale} THEN 3
                            ELSE 0 END AS cls
                FROM x
            )
        """
        found = self._fetch(
            base + "SELECT pos, cls, s, k, t - s AS age FROM c WHERE cls > 0 ORDER BY pos", p
        )
        cls = found.column("cls").to_numpy()
        pos = found.column("pos").to_numpy()
        chart = self.checks[out.name]
        np.add.at(chart.flagged, _bins(found.column("age").to_numpy()), 1)
        rows = self._scalar_rows(
            base + f"SELECT {_bin_sql('t - s')} AS b, count(*) FROM c "
            "WHERE cls = 0 AND t IS NOT NULL AND s IS NOT NULL GROUP BY b",
            p,
        )
        for b, n in rows:
            chart.clean[int(b)] += int(n)
        chart.charted = True
        missing_time = self._scalar_rows(
            f"SELECT count(*) FROM {q(_AUD)} WHERE {q(out.name)} IS NOT NULL AND "
            f"{q(out.name + '__time')} IS NULL",
            Params(),
        )[0][0]
        if missing_time:
            self.notes.append(
                f"{missing_time:,} rows of {out.name!r} have a value but no {out.name}__time; "
                "the provenance rules could not check them"
            )
        table = out.table
        times = {
            "row_time": _micros_to_py(found.column("s")),
            "row_known_at": _micros_to_py(found.column("k")),
        }
        when = "after" if inclusive else "at or after"
        for code, rule, text in (
            (1, Rule.FUTURE_ROW, f"came from a row of {table!r} valid {when} the label time"),
            (
                2,
                Rule.NOT_YET_KNOWN,
                f"came from a row of {table!r} valid before the label time but not known "
                f"until {when} it",
            ),
            (
                3,
                Rule.STALE_VALUE,
                f"came from a row of {table!r} older than max_age "
                f"{format_duration(dt.timedelta(microseconds=max_age or 0))} at the label "
                "time (the point-in-time value is null)",
            ),
        ):
            mask = cls == code
            if not mask.any():
                continue
            hit = pos[mask]
            extra = {
                name: [v for v, m in zip(vals, mask, strict=True) if m]
                for name, vals in times.items()
            }
            self._add(
                rule,
                out,
                hit,
                f"{self._share(len(hit))} of {out.name!r}: the value {text}",
                self._examples(out, hit, extra),
            )

    # -- recomputation ---------------------------------------------------------------------

    def _check_recomputed(self) -> None:
        trailing_mismatches: dict[str, np.ndarray] = {}
        for out in self.outputs:
            if not out.recompute:
                continue
            if out.is_latest:
                self._check_latest_values(out)
            else:
                pos = self._trailing_mismatches(out)
                if len(pos):
                    trailing_mismatches[out.name] = pos
        if trailing_mismatches:
            self._classify_trailing(trailing_mismatches)

    def _check_latest_values(self, out: _Output) -> None:
        """Compare with the point-in-time value; search mismatches among later source rows."""
        assert self.plan is not None
        lookup, value = self._lookup_of(out.name)
        i = out.slot
        p = Params()
        t = self._t(p)
        es = self._us(f"__aj_es{i}", self.types, p, None)
        ek = self._us(f"__aj_ek{i}", self.types, p, None)
        label_keys = lookup.label_keys
        keys = ", ".join(f'{q(c)} AS "__aj_k{j}"' for j, c in enumerate(label_keys))
        f_type, e_type = self.types[out.name], self.types[f"__aj_e{i}"]
        max_age = out.max_age_us
        if max_age is None:
            pit = "e"
            fresh = "TRUE"
            stale = "FALSE"
        else:
            ma = f"CAST({p.add(max_age)} AS BIGINT)"
            fresh = f"es >= t - {ma}"
            pit = f"CASE WHEN es IS NOT NULL AND {fresh} THEN e END"
            stale = f"(es IS NOT NULL AND es < t - {ma} AND {self._eq('f', 'e', f_type, e_type)})"
        self.con.execute(
            f"""
            CREATE OR REPLACE TEMP TABLE "__aj_mis" AS
            WITH x AS (
                SELECT {q(_POS)} AS pos, {t} AS t, {es} AS es, {ek} AS ek, {q(out.name)} AS f,
                       {q(f"__aj_e{i}")} AS e, {keys}
                FROM {q(_AUD)}
            ), y AS (SELECT *, {pit} AS pit FROM x)
            SELECT *, {stale} AS stale FROM y WHERE NOT {self._eq("f", "pit", f_type, e_type)}
            """,
            dict(p.values),
        )
        # Clean rows go to the chart by the age of the row that supplied them.
        chart = self.checks[out.name]
        cp = Params()
        c_t, c_es = self._t(cp), self._us(f"__aj_es{i}", self.types, cp, None)
        c_fresh = "TRUE" if max_age is None else f"es >= t - CAST({cp.add(max_age)} AS BIGINT)"
        c_pit = "e" if max_age is None else f"CASE WHEN es IS NOT NULL AND {c_fresh} THEN e END"
        clean_rows = self._scalar_rows(
            f"""
            SELECT {_bin_sql("t - es")} AS b, count(*) FROM (
                SELECT *, {c_pit} AS pit FROM (
                    SELECT {c_t} AS t, {c_es} AS es, {q(out.name)} AS f,
                           {q(f"__aj_e{i}")} AS e FROM {q(_AUD)}
                )
            ) WHERE t IS NOT NULL AND es IS NOT NULL AND {c_fresh}
                AND {self._eq("f", "pit", f_type, e_type)}
            GROUP BY b
            """,
            cp,
        )
        for b, n in clean_rows:
            chart.clean[int(b)] += int(n)
        chart.charted = True

        # Later rows: same key, not visible at the label time, value equal to the supplied one.
        rp = Params()
        rows_sql = self._rows_sql(lookup, [value.column], rp)
        v_type = self.source_types[lookup.table][value.column]
        on = " AND ".join(f'm."__aj_k{j}" = r."__aj_k{j}"' for j in range(len(label_keys)))
        later = "r.k > m.t" if lookup.inclusive else "r.k >= m.t"
        fam_f, fam_v = _family(f_type), _family(v_type)
        # An ASOF join finds, per mismatch, the first row of its key with an equal value that
        # became known at or after the label time: (n + m) log, however many rows share a key.
        self.con.execute(
            f"""
            CREATE OR REPLACE TEMP TABLE "__aj_leak" AS
            SELECT m.pos, r.s AS ls, r.k AS lk
            FROM (SELECT *, {_canon_sql("f", fam_f, fam_v)} AS cv FROM "__aj_mis") AS m
            ASOF JOIN (SELECT *, {_canon_sql("v0", fam_v, fam_f)} AS cv FROM ({rows_sql})) AS r
                ON {on} AND m.cv IS NOT DISTINCT FROM r.cv AND {later}
            WHERE {self._eq("m.f", "r.v0", f_type, v_type)}
            """,
            dict(rp.values),
        )
        found = self._fetch(
            'SELECT m.pos, m.stale, m.t, m.es, m.ek, l.ls, l.lk, m.pit FROM "__aj_mis" AS m '
            'LEFT JOIN "__aj_leak" AS l ON m.pos = l.pos ORDER BY m.pos',
            Params(),
        )
        self.con.execute('DROP TABLE "__aj_mis"; DROP TABLE "__aj_leak"')
        if found.num_rows == 0:
            return
        pos = found.column("pos").to_numpy()
        stale_fit = found.column("stale").to_numpy(zero_copy_only=False).astype(bool)
        later_fit = found.column("ls").is_valid().to_numpy(zero_copy_only=False)
        # A value may equal both the row older than max_age and a later row. Such rows follow
        # the feature's unambiguous ones: stale when some rows are stale only and none is a
        # leak only (a pipeline that ignores max_age); else leaks, the safe side for a gate.
        both = stale_fit & later_fit
        as_stale = bool((stale_fit & ~later_fit).any()) and not bool((later_fit & ~stale_fit).any())
        stale = stale_fit & (~later_fit | as_stale)
        leak = later_fit & ~stale
        unknown = ~stale & ~leak
        t_us = found.column("t").to_numpy(zero_copy_only=False)
        age = np.where(
            stale,
            t_us - _filled(found.column("es")),
            t_us - _filled(found.column("ls")),
        )
        placed = stale | leak
        np.add.at(chart.flagged, _bins(age[placed]), 1)
        chart.unplaced += int(unknown.sum())

        pit = found.column("pit").to_pylist()
        es_py = _micros_to_py(found.column("es"))
        ek_py = _micros_to_py(found.column("ek"))
        ls_py = _micros_to_py(found.column("ls"))
        lk_py = _micros_to_py(found.column("lk"))
        table = out.table

        def pick(mask: np.ndarray, **cols: list[Any]) -> dict[str, list[Any]]:
            return {
                name: [v for v, m in zip(vals, mask, strict=True) if m]
                for name, vals in cols.items()
            }

        if leak.any():
            hit = pos[leak]
            self._add(
                Rule.VALUE_MISMATCH,
                out,
                hit,
                f"{self._share(len(hit))} of {out.name!r}: the value differs from the "
                f"point-in-time value and equals that of a row of {table!r} not yet visible at "
                "the label time (leakage)",
                self._examples(
                    out,
                    hit,
                    pick(leak, point_in_time=pit, later_row_time=ls_py, later_row_known_at=lk_py),
                ),
                cause=Cause.LATER_ROW,
                details={"also_older_than_max_age": int((both & leak).sum())},
            )
        if stale.any():
            hit = pos[stale]
            ma_text = format_duration(dt.timedelta(microseconds=max_age or 0))
            self._add(
                Rule.STALE_VALUE,
                out,
                hit,
                f"{self._share(len(hit))} of {out.name!r}: the value is that of a row of {table!r} "
                f"older than max_age {ma_text} at the label time (the point-in-time value is "
                "null)",
                self._examples(
                    out, hit, pick(stale, point_in_time=pit, row_time=es_py, row_known_at=ek_py)
                ),
            )
        if unknown.any():
            hit = pos[unknown]
            self._add(
                Rule.VALUE_MISMATCH,
                out,
                hit,
                f"{self._share(len(hit))} of {out.name!r}: the value differs from the "
                f"point-in-time value and matches no row of {table!r} that was not yet visible "
                "(cause unknown: another source, a transformation or a bug)",
                self._examples(out, hit, pick(unknown, point_in_time=pit)),
                severity=Severity.WARNING,
                cause=Cause.UNKNOWN,
            )

    def _trailing_mismatches(self, out: _Output) -> np.ndarray:
        i = out.slot
        f_type, e_type = self.types[out.name], self.types[f"__aj_e{i}"]
        found = self._fetch(
            f"SELECT {q(_POS)} AS pos FROM {q(_AUD)} "
            f"WHERE NOT {self._eq(q(out.name), q(f'__aj_e{i}'), f_type, e_type)} ORDER BY pos",
            Params(),
        )
        pos: np.ndarray = found.column("pos").to_numpy()
        return pos

    def _classify_trailing(self, mismatches: dict[str, np.ndarray]) -> None:
        """Rebuild mismatching trailing features counting rows not yet visible; compare again."""
        from .build import build

        by_name = {o.name: o for o in self.outputs}
        features = []
        for name in mismatches:
            feat = by_name[name].feature
            leaky = feat.table.model_copy(
                update={"known_at": None, "delay": dt.timedelta(0), "inclusive": True}
            )
            features.append(feat.model_copy(update={"table": leaky}))
        spec = TrainingSetSpec(
            labels=self.spec.labels.model_copy(update={"name": self.frame_name, "path": None}),
            features=tuple(features),
            timezone=self.spec.timezone,
        )
        tables = {f.table.name for f in features}
        variant = build(
            spec,
            data={
                **{n: s for n, s in self.bound.items() if n in tables},
                self.frame_name: self.table.select(self.label_columns),
            },
            memory_limit=self.memory_limit,
            threads=self.threads,
        ).to_arrow()
        for name, pos in mismatches.items():
            out = by_name[name]
            i = out.slot
            leaky_values = variant.column(name).take(pa.array(pos))
            small = pa.table({"pos": pa.array(pos), "v": leaky_values})
            self.con.register("__aj_var", small)
            v_type = _duck_types(self.con, '"__aj_var"')["v"]
            is_leak = self._eq(f"a.{q(name)}", "v.v", self.types[out.name], v_type)
            found = self._fetch(
                f"""
                SELECT a.{q(_POS)} AS pos, {is_leak} AS leak,
                       a.{q(f"__aj_e{i}")} AS pit, v.v AS leaky
                FROM {q(_AUD)} AS a JOIN "__aj_var" AS v ON a.{q(_POS)} = v.pos ORDER BY pos
                """,
                Params(),
            )
            self.con.unregister("__aj_var")
            leak = found.column("leak").to_numpy(zero_copy_only=False).astype(bool)
            pos_all = found.column("pos").to_numpy()
            pit = found.column("pit").to_pylist()
            leaky_py = found.column("leaky").to_pylist()
            for mask, cause in ((leak, Cause.NOT_YET_VISIBLE_ROWS), (~leak, Cause.UNKNOWN)):
                if not mask.any():
                    continue
                hit = pos_all[mask]
                kept = [v for v, m in zip(pit, mask, strict=True) if m]
                extra: dict[str, list[Any]] = {"point_in_time": kept}
                if cause is Cause.NOT_YET_VISIBLE_ROWS:
                    extra["with_not_yet_visible_rows"] = [
                        v for v, m in zip(leaky_py, mask, strict=True) if m
                    ]
                    text = (
                        "differs from the point-in-time aggregate and equals the aggregate that "
                        f"also counts rows of {out.table!r} not yet visible at the label time "
                        "(known later, or stamped at the label time): leakage"
                    )
                else:
                    text = (
                        "differs from the point-in-time aggregate (cause unknown: another "
                        "window, source or bug)"
                    )
                self._add(
                    Rule.VALUE_MISMATCH,
                    out,
                    hit,
                    f"{self._share(len(hit))} of {name!r}: the value {text}",
                    self._examples(out, hit, extra),
                    severity=Severity.WARNING if cause is Cause.UNKNOWN else Severity.ERROR,
                    cause=cause,
                )

    def _lookup_of(self, output: str) -> tuple[LatestLookup, Any]:
        """The plan's latest lookup and value that produce an output column."""
        assert self.plan is not None
        steps = {lk.step: lk for lk in self.plan.lookups}
        for col in self.plan.outputs:
            if col.name == output and col.slot == "value":
                lookup = steps[col.step]
                return lookup, lookup.values[col.index]  # type: ignore[return-value]
        msg = f"internal: no plan output {output!r}"  # pragma: no cover - plan covers outputs
        raise AssertionError(msg)  # pragma: no cover

    def _rows_sql(
        self,
        lookup: LatestLookup | TrailingLookup,
        columns: Sequence[str],
        p: Params,
        *,
        positions: bool = False,
    ) -> str:
        """A table's rows as the engine sees them: keys, s, k (epoch micros), values v0..., and
        with ``positions`` their 0-based input position ``src_pos`` (a costlier scan)."""
        types = self.source_types[lookup.table]
        view = q(self.sources[lookup.table])
        s = self._us(lookup.valid.column, types, p, lookup.valid.zone)
        if lookup.known is not None:
            k = f"greatest({self._us(lookup.known.column, types, p, lookup.known.zone)}, {s})"
        elif lookup.delay_us:
            k = f"{s} + CAST({p.add(lookup.delay_us)} AS BIGINT)"
        else:
            k = s
        keys = [f'{q(c)} AS "__aj_k{j}"' for j, c in enumerate(lookup.table_keys)]
        vals = [f'{q(c)} AS "v{j}"' for j, c in enumerate(columns)]
        where = [f"{q(c)} IS NOT NULL" for c in lookup.table_keys]
        where.append(f"{q(lookup.valid.column)} IS NOT NULL")
        if lookup.known is not None:
            where.append(f"{q(lookup.known.column)} IS NOT NULL")
        source = (
            f"(SELECT row_number() OVER () - 1 AS src_pos, * FROM {view})" if positions else view
        )
        return (
            f"SELECT {'src_pos, ' if positions else ''}{', '.join(keys)}, {s} AS s, {k} AS k"
            + "".join(", " + v for v in vals)
            + f" FROM {source} WHERE {' AND '.join(where)}"
        )

    # -- source rules ----------------------------------------------------------------------
