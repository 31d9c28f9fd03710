"""The engine-neutral plan: a short sequence of frozen steps that fixes what build() means.

The plan decides visibility (strict or inclusive), the tie-breaks, ``max_age``, window bounds and
empty-window results; an engine only chooses syntax. Nothing here imports an engine.
"""

from __future__ import annotations

import enum
from dataclasses import dataclass, field

from .durations import to_micros
from .spec import Latest, Trailing, TrainingSetSpec


class TimeKind(str, enum.Enum):
    """How a time column is stored, which decides how it is normalized."""

    NAIVE = "naive"  #: timestamp without zone, any unit
    AWARE = "aware"  #: timestamp with zone: compared as an instant
    DATE = "date"  #: a date is its midnight


@dataclass(frozen=True)
class TimeRef:
    """A time column and how to bring it to the plan's common clock (UTC when any is aware)."""

    column: str
    kind: TimeKind
    #: for naive values in an aware build: the zone they are read in (``timezone=``)
    zone: str | None = None
    #: stored in nanoseconds: truncated (floored) to microseconds, never rounded
    nanos: bool = False


@dataclass(frozen=True)
class NullTimeCheck:
    """Count null times in a table before the build; fail with counts and first positions."""

    table: str
    column: str
    role: str  #: "label time" or "valid time"


@dataclass(frozen=True)
class LabelScan:
    """The label table: every column kept; a 0-based input position and a normalized time."""

    table: str
    time: TimeRef
    columns: tuple[str, ...]
    keys: tuple[str, ...]  #: every label column some feature joins on


@dataclass(frozen=True)
class LatestValue:
    """One output of a latest lookup."""

    column: str
    output: str
    #: null unless t - valid time <= max_age (a trailing ``last`` over w uses w - 1 microsecond)
    max_age_us: int | None
    provenance: bool = False


class Reduction(str, enum.Enum):
    """How a table is reduced to a timeline that one as-of lookup reads correctly."""

    #: known time = valid time + fixed delay, monotone in valid time: per (key, valid time) keep
    #: the last row in input order, and look up on valid time + delay.
    VALID = "valid"
    #: known time from a column: per (key, known time) keep the row with the greatest valid time
    #: (then last in input order); then keep a row only when its valid time is at least the
    #: running maximum of the valid times known strictly before it; look up on known time.
    KNOWN = "known"


@dataclass(frozen=True)
class LatestLookup:
    """Newest visible row per label for one table and one join key (Semantics 2)."""

    step: int
    table: str
    label_keys: tuple[str, ...]
    table_keys: tuple[str, ...]
    valid: TimeRef
    known: TimeRef | None  #: the known_at column, if declared
    delay_us: int
    inclusive: bool  #: visible iff known < t, or known <= t when inclusive
    skip_null_times: bool
    reduction: Reduction
    values: tuple[LatestValue, ...]


@dataclass(frozen=True)
class TrailingValue:
    """One trailing aggregate: its column (None counts rows), agg, window and output name."""

    column: str | None
    agg: str
    over_us: int
    output: str
    integer: bool = False  #: the column holds integers: a sum stays an integer


class Route(str, enum.Enum):
    """How trailing aggregates are computed; both are linear-logarithmic in rows + labels."""

    #: known time = valid time + fixed delay: visible rows in the window are the rows whose valid
    #: time lies in (t - over, t - delay), one contiguous range: a RANGE window frame over labels
    #: and rows sorted together reads every aggregate.
    FRAME = "frame"
    #: known time from a column: a row counts for labels in the interval (known, valid + over)
    #: (or [known, ...) when inclusive). Additive aggregates are prefix sums of enter and exit
    #: events; count_distinct merges each value's intervals first; min and max use a dyadic
    #: decomposition of each interval over the labels' ranks.
    SWEEP = "sweep"


@dataclass(frozen=True)
class TrailingLookup:
    """Aggregates over visible rows with valid time in (t - over, t] for one table and key."""

    step: int
    table: str
    label_keys: tuple[str, ...]
    table_keys: tuple[str, ...]
    valid: TimeRef
    known: TimeRef | None
    delay_us: int
    inclusive: bool
    skip_null_times: bool
    values: tuple[TrailingValue, ...]
    route: Route


Lookup = LatestLookup | TrailingLookup


@dataclass(frozen=True)
class OutputColumn:
    """A feature column of the result: which lookup and which of its outputs."""

    name: str
    step: int
    slot: str  #: "value", "time" or "known_at"
    index: int


@dataclass(frozen=True)
class Plan:
    """Everything an engine needs, in order: checks, the label scan, lookups, the outputs."""

    labels: LabelScan
    checks: tuple[NullTimeCheck, ...]
    lookups: tuple[Lookup, ...]
    outputs: tuple[OutputColumn, ...]
    #: True when any time column is timezone-aware: provenance comes back as UTC instants
    aware: bool
    keep_null_label_times: bool
    fingerprint: str
    tables: tuple[str, ...] = field(default=())


@dataclass(frozen=True)
class TableTimes:
    """What the input checks learned about one table's time columns."""

    valid: TimeRef
    known: TimeRef | None


def make_plan(
    spec: TrainingSetSpec,
    times: dict[str, TableTimes],
    label_columns: tuple[str, ...],
    *,
    provenance: bool = False,
    aware: bool = False,
    integer_columns: frozenset[tuple[str, str]] = frozenset(),
) -> Plan:
    """Compile a spec (checked against the inputs) into the neutral plan."""
    labels = spec.labels
    checks: list[NullTimeCheck] = []
    if labels.null_times != "keep":
        checks.append(NullTimeCheck(labels.name, labels.time, "label time"))
    for name, table in spec.tables().items():
        if name != labels.name and table.null_times != "skip" and table.null_times != "keep":
            checks.append(NullTimeCheck(name, table.time, "valid time"))

    lookups: list[Lookup] = []
    outputs: list[OutputColumn] = []
    latest_by_key: dict[tuple[str, tuple[str, ...], tuple[str, ...]], int] = {}
    trailing_by_key: dict[tuple[str, tuple[str, ...], tuple[str, ...]], int] = {}
    label_keys_used: list[str] = []
    pending_latest: dict[int, list[LatestValue]] = {}
    pending_trailing: dict[int, list[TrailingValue]] = {}
    meta: dict[int, tuple[str, tuple[str, ...], tuple[str, ...], str]] = {}

    for feat in spec.features:
        lkeys, tkeys = spec.join_keys(feat)
        for k in lkeys:
            if k not in label_keys_used:
                label_keys_used.append(k)
        group = (feat.table.name, lkeys, tkeys)
        if isinstance(feat, Trailing) and feat.agg == "last":
            # `last` within (t - over, t] is the latest visible row when it is newer than
            # t - over: a latest lookup with max_age = over - 1 microsecond (times are integers
            # in microseconds), sharing the table's timeline with its latest features.
            assert feat.column is not None
            step = _latest_step(latest_by_key, meta, pending_latest, group)
            values = pending_latest[step]
            values.append(
                LatestValue(feat.column, feat.output_names()[0], to_micros(feat.over) - 1)
            )
            outputs.append(OutputColumn(feat.output_names()[0], step, "value", len(values) - 1))
            continue
        if isinstance(feat, Latest):
            step = _latest_step(latest_by_key, meta, pending_latest, group)
            values = pending_latest[step]
            max_age = None if feat.max_age is None else to_micros(feat.max_age)
            for col, out in zip(feat.columns, feat.output_names(), strict=True):
                values.append(LatestValue(col, out, max_age, provenance))
                idx = len(values) - 1
                outputs.append(OutputColumn(out, step, "value", idx))
                if provenance:
                    outputs.append(OutputColumn(f"{out}__time", step, "time", idx))
                    outputs.append(OutputColumn(f"{out}__known_at", step, "known_at", idx))
        else:
            assert isinstance(feat, Trailing)
            if group not in trailing_by_key:
                trailing_by_key[group] = len(meta)
                meta[len(meta)] = (feat.table.name, lkeys, tkeys, "trailing")
                pending_trailing[trailing_by_key[group]] = []
            step = trailing_by_key[group]
            tvalues = pending_trailing[step]
            out = feat.output_names()[0]
            integer = (feat.table.name, feat.column or "") in integer_columns
            tvalues.append(TrailingValue(feat.column, feat.agg, to_micros(feat.over), out, integer))
            outputs.append(OutputColumn(out, step, "value", len(tvalues) - 1))

    tables = spec.tables()
    for step, (name, lkeys, tkeys, kind) in meta.items():
        table = tables[name]
        tt = times[name]
        common = {
            "step": step,
            "table": name,
            "label_keys": lkeys,
            "table_keys": tkeys,
            "valid": tt.valid,
            "known": tt.known,
            "delay_us": to_micros(table.delay),
            "inclusive": table.inclusive,
            "skip_null_times": table.null_times != "error" or name == labels.name,
        }
        if kind == "latest":
            lookups.append(
                LatestLookup(
                    **common,
                    reduction=Reduction.KNOWN if tt.known is not None else Reduction.VALID,
                    values=tuple(pending_latest[step]),
                )
            )
        else:
            lookups.append(
                TrailingLookup(
                    **common,
                    values=tuple(pending_trailing[step]),
                    route=Route.SWEEP if tt.known is not None else Route.FRAME,
                )
            )

    return Plan(
        labels=LabelScan(
            labels.name, times[labels.name].valid, label_columns, tuple(label_keys_used)
        ),
        checks=tuple(checks),
        lookups=tuple(lookups),
        outputs=tuple(outputs),
        aware=aware,
        keep_null_label_times=labels.null_times == "keep",
        fingerprint=spec.fingerprint(),
        tables=tuple(tables),
    )


def _latest_step(
    latest_by_key: dict[tuple[str, tuple[str, ...], tuple[str, ...]], int],
    meta: dict[int, tuple[str, tuple[str, ...], tuple[str, ...], str]],
    pending: dict[int, list[LatestValue]],
    group: tuple[str, tuple[str, ...], tuple[str, ...]],
) -> int:
    """The latest lookup for (table, keys), created on first use."""
    if group not in latest_by_key:
        latest_by_key[group] = len(meta)
        meta[len(meta)] = (*group, "latest")
        pending[latest_by_key[group]] = []
    return latest_by_key[group]
