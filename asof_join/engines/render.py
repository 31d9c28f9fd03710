"""Renders a plan to SQL: one method per plan step, dialect quirks as class flags and hooks."""

from __future__ import annotations

from collections.abc import Callable, Collection, Mapping, Sequence

from ..plan import (
    LatestLookup,
    Lookup,
    Plan,
    Reduction,
    Route,
    TimeKind,
    TimeRef,
    TrailingLookup,
)
from .sql import Params, literal, quote_ident

#: the column of a positioned relation holding each row's 0-based input position
POSITION = "__aj_pos"


def _join(parts: Sequence[str], sep: str = ", ") -> str:
    return sep.join(parts)


class Names:
    """Internal names (``__aj_*``) quoted in the renderer's dialect: ``n.row``, ``n("v", 0)``."""

    def __init__(self, quote: Callable[[str], str]) -> None:
        self._quote = quote

    def __getattr__(self, suffix: str) -> str:
        if suffix.startswith("_"):
            raise AttributeError(suffix)
        return self._quote("__aj_" + suffix)

    def __call__(self, *parts: object) -> str:
        return self._quote("__aj_" + "".join(str(p) for p in parts))


class SqlRenderer:
    """Base SQL renderer; dialects subclass it and override flags and small hooks."""

    #: the dialect has a native as-of join (else the union-and-window formulation is used)
    SUPPORTS_ASOF_JOIN: bool = True
    #: the dialect has QUALIFY (else a subquery filters)
    SUPPORTS_QUALIFY: bool = True
    #: the dialect zips two ordered inputs row by row (POSITIONAL JOIN): label columns then skip
    #: the joins and the final sort
    SUPPORTS_POSITIONAL_JOIN: bool = True
    #: the dialect has 128-bit integers with shifts: trailing counts share one packed sum
    PACKS_COUNTS: bool = True
    #: placeholder prefix of bound parameters
    PARAM_MARKER: str = "$"

    def __init__(
        self,
        plan: Plan,
        sources: Mapping[str, str],
        positioned: Mapping[str, str] | None = None,
        row_counts: Mapping[str, int] | None = None,
        narrow_keys: Collection[tuple[int, int]] = (),
    ) -> None:
        self.plan = plan
        self.sources = sources  # table name -> relation name the engine registered
        # table name -> a relation of the same rows with a POSITION column (0-based input
        # position), when the engine can give one cheaply; others number rows in the query
        self.positioned = dict(positioned or {})
        # table name -> its number of rows, where the engine knows it without a scan
        self.row_counts = dict(row_counts or {})
        # (step, key index) of lookups whose key the engine found to fit a 32-bit INTEGER
        self.narrow_keys = set(narrow_keys)
        # a frame trailing lookup whose result replaces the label relation (see render)
        self.driving_step: int | None = None
        self.params = Params(marker=self.PARAM_MARKER, quote=self.literal)
        self.ctes: list[tuple[str, str]] = []
        self.n = Names(self.q)

    @classmethod
    def for_expressions(cls, params: Params) -> SqlRenderer:
        """A renderer for single expressions outside any plan (e.g. the audit's time columns),
        binding values into ``params``; its plan-level methods must not be called."""
        renderer = cls.__new__(cls)
        renderer.sources = {}
        renderer.positioned = {}
        renderer.row_counts = {}
        renderer.narrow_keys = set()
        renderer.driving_step = None
        renderer.params = params
        renderer.ctes = []
        renderer.n = Names(renderer.q)
        return renderer

    # -- hooks a dialect overrides --------------------------------------------------------

    def q(self, name: str) -> str:
        """An identifier, always quoted (DuckDB: double quotes, doubled inside)."""
        return quote_ident(name)

    def literal(self, value: str) -> str:
        """A string literal, for the few places that take no parameter."""
        return literal(value)

    def utc_from_aware(self, expr: str) -> str:
        """A timezone-aware value as a naive UTC timestamp."""
        return f"timezone('UTC', {expr})"

    def utc_from_local(self, expr: str, zone_param: str) -> str:
        """A naive value read in a zone, as a naive UTC timestamp."""
        return f"timezone('UTC', timezone({zone_param}, {expr}))"

    def aware_from_utc(self, expr: str) -> str:
        """A naive UTC timestamp as a timezone-aware instant (for provenance output)."""
        return f"timezone('UTC', {expr})"

    def naive_from_utc(self, expr: str) -> str:
        """A plan time as a naive timestamp (provenance output when no input is aware)."""
        return expr

    def to_timestamp(self, expr: str) -> str:
        return f"CAST({expr} AS TIMESTAMP)"

    def floor_nanos(self, expr: str) -> str:
        """A nanosecond timestamp floored to a microsecond TIMESTAMP (UTC when aware)."""
        ns = f"epoch_ns({expr})"
        return f"make_timestamp(({ns} - (({ns} % 1000) + 1000) % 1000) // 1000)"

    def micros(self, value: int) -> str:
        """A duration of `value` microseconds, as a bound parameter."""
        return f"to_microseconds(CAST({self.params.add(value)} AS BIGINT))"

    def time_plus(self, expr: str, value: int) -> str:
        """A timestamp `value` microseconds later."""
        return f"{expr} + {self.micros(value)}"

    def time_minus(self, expr: str, value: int) -> str:
        """A timestamp `value` microseconds earlier."""
        return f"{expr} - {self.micros(value)}"

    def epoch_us(self, expr: str) -> str:
        """A timestamp as BIGINT microseconds since the epoch."""
        return f"epoch_us({expr})"

    def input_position(self, table: str) -> str:
        """0-based position of a row of `table` in its input order.

        Read from the POSITION column when the engine bound one (a Parquet file's row number,
        or a column added to an in-memory frame); otherwise numbered in the query, which DuckDB
        does in a single-threaded pass over the table.
        """
        if table in self.positioned:
            return self.q(POSITION)
        return "(row_number() OVER () - 1)"

    def key_column(
        self, lookup: Lookup, index: int, column: str, *, label: bool, alias: str = ""
    ) -> str:
        """A lookup's key column (of relation `alias` when given), as INTEGER where the engine
        found the table's values to fit (``narrow_keys``); the label side with TRY_CAST (out
        of range: null, which matches no row, as the uncast value would not)."""
        ref = f"{alias}.{self.q(column)}" if alias else self.q(column)
        if (lookup.step, index) not in self.narrow_keys:
            return ref
        return f"{'TRY_CAST' if label else 'CAST'}({ref} AS INTEGER)"

    def _small(self, table: str) -> bool:
        """The engine knows `table` holds fewer than 2^31 rows: any count of them fits 32 bits."""
        rows = self.row_counts.get(table)
        return rows is not None and rows < 1 << 31

    def row_type(self) -> str:
        """SQL type of a label's row number: INTEGER when the labels are known to number fewer
        than 2^31 (4 bytes less to carry through every sort), else BIGINT."""
        return "INTEGER" if self._small(self.plan.labels.table) else "BIGINT"

    def lane_bits(self, table: str) -> int:
        """Width of one lane of a packed count over `table`'s rows (see trailing_sql._Lanes).

        A count over a table's rows never exceeds its row count, so a table known to hold
        fewer than 2^31 rows packs two counts into one BIGINT (32-bit lanes), which DuckDB
        sums faster than the 128-bit pair of 64-bit lanes used otherwise.
        """
        return 32 if self._small(table) else 64

    def last_non_null(self, expr: str) -> str:
        """The window function taking the last non-null value of the frame."""
        return f"last({expr} IGNORE NULLS)"

    def struct_pack(self, fields: Sequence[tuple[str, str]]) -> str:
        """A struct of (field name, expression) pairs."""
        return "struct_pack(" + _join([f"{self.q(k)} := {v}" for k, v in fields]) + ")"

    def struct_field(self, expr: str, name: str) -> str:
        """One field of a struct."""
        return f"struct_extract({expr}, {self.literal(name)})"

    def count_distinct_over(self, expr: str, flt: str, window: str) -> str:
        """count(DISTINCT expr) over a named window."""
        return f"count(DISTINCT {expr}){flt} OVER {window}"

    def never(self, expr: str) -> tuple[str, str]:
        """An aggregate's argument and FILTER clause that let no row in (an empty window)."""
        return expr, " FILTER (WHERE false)"

    def shift_left(self, value: str, bits: str) -> str:
        return f"({value} << {bits})"

    def shift_right(self, value: str, bits: str) -> str:
        return f"{value} >> {bits}"

    def unnest_range(self, start: str, stop: str) -> str:
        """One row per integer in [start, stop), as a set-returning select item."""
        return f"unnest(range({start}, {stop}))"

    # -- building blocks --------------------------------------------------------------------

    def source(self, table: str) -> str:
        return self.q(self.sources[table])

    def numbered_source(self, table: str) -> str:
        """The relation to read `table` from where rows need their input position."""
        return self.q(self.positioned.get(table, self.sources[table]))

    def time_expr(self, ref: TimeRef, alias: str | None = None) -> str:
        col = self.q(ref.column) if alias is None else f"{alias}.{self.q(ref.column)}"
        if ref.nanos:
            # an instant (or wall time) in whole microseconds, floored: casts would round
            ts = self.floor_nanos(col)
            if ref.zone is not None:
                return self.utc_from_local(ts, self.params.add(ref.zone))
            return ts
        if ref.kind == TimeKind.AWARE:
            return self.utc_from_aware(col)
        ts = self.to_timestamp(col)
        if ref.zone is not None:
            return self.utc_from_local(ts, self.params.add(ref.zone))
        return ts

    def cte(self, name: str, body: str) -> str:
        self.ctes.append((name, body))
        return self.q(name)

    def qualify(
        self,
        source: str,
        windows: Sequence[str],
        condition: Callable[..., str],
        columns: str = "*",
    ) -> str:
        """`columns` of the rows of `source` for which `condition(*window expressions)` holds."""
        if self.SUPPORTS_QUALIFY:
            return f"SELECT {columns}\n    FROM {source}\n    QUALIFY {condition(*windows)}"
        n = self.n
        named = [n("q", i) for i in range(len(windows))]
        computed = _join([f"{w} AS {name}" for w, name in zip(windows, named, strict=True)])
        return (
            f"SELECT {columns} FROM (SELECT *, {computed}\n    FROM {source}) AS {n.qs}\n"
            f"    WHERE {condition(*named)}"
        )

    # -- steps ------------------------------------------------------------------------------

    def render(self) -> str:
        """The whole query: CTEs for labels and each lookup, then the ordered projection."""
        q, n = self.q, self.n
        labels = self.render_labels()
        if self.SUPPORTS_POSITIONAL_JOIN:
            # one row per label, in no particular order, with the label relation's columns:
            # a frame trailing result can stand in for the labels, saving one join on position
            self.driving_step = next(
                (
                    lk.step
                    for lk in self.plan.lookups
                    if isinstance(lk, TrailingLookup) and lk.route == Route.FRAME
                ),
                None,
            )
        joins: list[str] = []
        exprs: dict[str, str] = {}
        for lookup in self.plan.lookups:
            method: Callable[[Lookup, str], tuple[str, dict[tuple[str, int], str]]] | None = (
                getattr(self, f"render_{type(lookup).__name__}", None)
            )
            if method is None:  # a plan step this dialect cannot render: never guessed
                from ..errors import UnsupportedByEngineError

                msg = (
                    f"{type(self).__name__} cannot render plan step {type(lookup).__name__} "
                    f"(table {lookup.table!r}); use engine='duckdb' or add render_"
                    f"{type(lookup).__name__} to the renderer"
                )
                raise UnsupportedByEngineError(msg)
            join, columns = method(lookup, "l")
            if lookup.step == self.driving_step:
                labels = join  # the lookup's result, carrying the label columns
            else:
                joins.append(join)
            for out in self.plan.outputs:
                if out.step == lookup.step:
                    exprs[out.name] = columns[(out.slot, out.index)]
        # declared output order
        projections = [f"{exprs[out.name]} AS {q(out.name)}" for out in self.plan.outputs]
        if self.SUPPORTS_POSITIONAL_JOIN:
            # narrow rows (position, features) go through the joins and the final sort; the
            # label columns are read once more, in input order, and zipped on by position
            select = _join([f"l.{n.row}", *projections], ",\n       ")
            body = "\n".join([f"SELECT {select}\nFROM {labels} AS l", *joins])
            feats = self.cte("__aj_features", body + f"\nORDER BY l.{n.row}")
            outs = [f"f.{q(out.name)}" for out in self.plan.outputs]
            cols = [f"s.{q(c)}" for c in self.plan.labels.columns] + outs
            final = (
                f"SELECT {_join(cols, ', ')}\n"
                f"FROM {self.source(self.plan.labels.table)} AS s POSITIONAL JOIN {feats} AS f"
            )
            return f"WITH {self._with_sql()}\n{final}"
        label_cols = [f"l.{q(c)}" for c in self.plan.labels.columns]
        select = _join(label_cols + projections, ",\n       ")
        body = f"SELECT {select}\nFROM {labels} AS l\n" + "\n".join(joins)
        return f"WITH {self._with_sql()}\n{body}\nORDER BY l.{n.row}"

    def _with_sql(self) -> str:
        return _join([f"{self.q(name)} AS (\n    {b}\n)" for name, b in self.ctes], ",\n")

    def label_columns(self) -> list[str]:
        """The label relation's columns besides the position (quoted): keys and time."""
        return [*(self.q(c) for c in self.plan.labels.keys), self.n.t]

    def render_labels(self) -> str:
        lab = self.plan.labels
        n = self.n
        if self.SUPPORTS_POSITIONAL_JOIN:
            picked = "".join(f"{self.q(c)}, " for c in lab.keys)
        else:
            picked = "*, "
        position = self.input_position(lab.table)
        if self.row_type() != "BIGINT":
            position = f"CAST({position} AS {self.row_type()})"
        body = (
            f"SELECT {position} AS {n.row}, "
            f"{picked}{self.time_expr(lab.time)} AS {n.t}\n"
            f"    FROM {self.numbered_source(lab.table)}"
        )
        return self.cte("__aj_labels", body)

    def rows_cte(self, lookup: Lookup, value_columns: Sequence[str | None]) -> str:
        """Normalized rows of a table: keys, valid time s, known time k, input order, values."""
        q, n = self.q, self.n
        s = self.time_expr(lookup.valid)
        if lookup.known is not None:
            k = f"greatest({self.time_expr(lookup.known)}, {s})"
        elif lookup.delay_us:
            k = self.time_plus(s, lookup.delay_us)
        else:
            k = s
        keys = [
            f"{self.key_column(lookup, i, c, label=False)} AS {n('k', i)}"
            for i, c in enumerate(lookup.table_keys)
        ]
        vals = [
            f"{q(c) if c is not None else 'NULL'} AS {n('v', i)}"
            for i, c in enumerate(value_columns)
        ]
        where = [f"{q(c)} IS NOT NULL" for c in lookup.table_keys]
        where.append(f"{q(lookup.valid.column)} IS NOT NULL")
        if lookup.known is not None:
            where.append(f"{q(lookup.known.column)} IS NOT NULL")
        body = (
            f"SELECT {_join(keys)}, {s} AS {n.s}, {k} AS {n.kt}, "
            f"{self.input_position(lookup.table)} AS {n.ord}"
            + (", " + _join(vals) if vals else "")
            + f"\n    FROM {self.numbered_source(lookup.table)}\n"
            f"    WHERE {_join(where, ' AND ')}"
        )
        return self.cte(f"__aj_rows{lookup.step}", body)

    def timeline_cte(self, lookup: LatestLookup, rows: str) -> str:
        """One row per lookup time such that the newest one before t is the answer at t."""
        n = self.n
        keys = [n("k", i) for i in range(len(lookup.table_keys))]
        vals = [n("v", i) for i in range(len(lookup.values))]
        if lookup.reduction == Reduction.VALID:
            # ties on (key, valid time): the last row in input order wins. One sort by (key,
            # valid time, input order) keeps each row the next one does not tie with; the
            # as-of join then reads that order (cheaper than a hash aggregate on 10M groups)
            at = n.s
            if lookup.delay_us:
                at = self.time_plus(n.s, lookup.delay_us)
            nxt = f"lead({n.s}) OVER (PARTITION BY {_join(keys)} ORDER BY {n.s}, {n.ord})"
            body = self.qualify(
                rows,
                [nxt],
                lambda following: f"{following} IS DISTINCT FROM {n.s}",
                columns=f"{_join(keys)}, {n.s}, {at} AS {n.at}" + "".join(", " + v for v in vals),
            )
            return self.cte(f"__aj_line{lookup.step}", body)
        # known-time column: in one sort by (key, known time, valid time, input order), keep
        # the newest row of each known-time batch (the next row is in another batch) when its
        # valid time is at least the greatest valid time of every row before it. Rows before
        # it in its own batch have no greater valid time, so that is the running max over the
        # batches known strictly earlier.
        order = f"PARTITION BY {_join(keys)} ORDER BY {n.kt}, {n.s}, {n.ord}"
        nxt = f"lead({n.kt}) OVER ({order})"
        running = f"max({n.s}) OVER ({order} ROWS BETWEEN UNBOUNDED PRECEDING AND 1 PRECEDING)"
        body = self.qualify(
            rows,
            [nxt, running],
            lambda following, before: (
                f"{following} IS DISTINCT FROM {n.kt} AND {n.s} >= coalesce({before}, {n.s})"
            ),
            columns=f"{_join(keys)}, {n.kt} AS {n.at}, {n.s}" + "".join(", " + v for v in vals),
        )
        return self.cte(f"__aj_line{lookup.step}", body)

    def latest_by_window(self, lookup: LatestLookup, line: str) -> str:
        """The latest lookup without an as-of join: labels and timeline rows in one window.

        Per key, label rows (at t) and timeline rows (at their lookup time) are sorted together
        and each label takes the payload of the last timeline row before it. At equal times a
        label sorts before the row when visibility is strict (k < t) and after it when inclusive
        (k <= t). Lookup times are unique per key in a timeline, so the order is total. The
        payload is a struct: a null value in the chosen row stays null. Labels with a null key
        or time take no part and get nulls from the outer join.
        """
        q, n = self.q, self.n
        keys = [n("k", i) for i in range(len(lookup.table_keys))]
        names = ["__aj_s", "__aj_at", *(f"__aj_v{i}" for i in range(len(lookup.values)))]
        label_kind, row_kind = (1, 0) if lookup.inclusive else (0, 1)
        payload = self.struct_pack([(name, q(name)) for name in names])
        label_keys = [
            f"{self.key_column(lookup, i, c, label=True)} AS {n('k', i)}"
            for i, c in enumerate(lookup.label_keys)
        ]
        present = [f"{q(c)} IS NOT NULL" for c in lookup.label_keys] + [f"{n.t} IS NOT NULL"]
        union = self.cte(
            f"__aj_lu{lookup.step}",
            f"SELECT {_join(keys)}, {n.at} AS {n.p}, {row_kind} AS {n.kind}, "
            f"CAST(NULL AS {self.row_type()}) AS {n.row}, {payload} AS {n.pay}\n    FROM {line}\n"
            f"    UNION ALL\n    SELECT {_join(label_keys)}, {n.t}, {label_kind}, {n.row}, NULL\n"
            f"    FROM {n.labels}\n    WHERE {_join(present, ' AND ')}",
        )
        window = (
            f"PARTITION BY {_join(keys)} ORDER BY {n.p}, {n.kind} "
            "ROWS BETWEEN UNBOUNDED PRECEDING AND CURRENT ROW"
        )
        fields = [f"{self.struct_field(n.pay, name)} AS {q(name)}" for name in names]
        body = (
            f"SELECT {n.row}, {_join(fields)}\n"
            f"    FROM (SELECT {n.row}, {self.last_non_null(n.pay)} OVER ({window}) AS {n.pay}\n"
            f"    FROM {union}) AS {n.picked}\n    WHERE {n.row} IS NOT NULL"
        )
        return self.cte(f"__aj_lw{lookup.step}", body)

    def render_LatestLookup(
        self, lookup: LatestLookup, label: str
    ) -> tuple[str, dict[tuple[str, int], str]]:
        n = self.n
        rows = self.rows_cte(lookup, [v.column for v in lookup.values])
        line = self.timeline_cte(lookup, rows)
        alias = f"f{lookup.step}"
        if self.SUPPORTS_ASOF_JOIN:
            on = [
                f"{self.key_column(lookup, i, lc, label=True, alias=label)} = {alias}.{n('k', i)}"
                for i, lc in enumerate(lookup.label_keys)
            ]
            op = ">=" if lookup.inclusive else ">"
            on.append(f"{label}.{n.t} {op} {alias}.{n.at}")
            join = f"ASOF LEFT JOIN {line} AS {alias} ON {_join(on, ' AND ')}"
        else:
            picked = self.latest_by_window(lookup, line)
            join = f"LEFT JOIN {picked} AS {alias} ON {alias}.{n.row} = {label}.{n.row}"
        columns: dict[tuple[str, int], str] = {}
        for i, v in enumerate(lookup.values):
            val = f"{alias}.{n('v', i)}"
            s = f"{alias}.{n.s}"
            at = f"{alias}.{n.at}"
            if v.max_age_us is not None:
                fresh = f"{s} >= {self.time_minus(f'{label}.{n.t}', v.max_age_us)}"
                val, s, at = (f"CASE WHEN {fresh} THEN {x} END" for x in (val, s, at))
            if self.plan.aware and v.provenance:
                s, at = self.aware_from_utc(s), self.aware_from_utc(at)
            elif v.provenance:
                s, at = self.naive_from_utc(s), self.naive_from_utc(at)
            columns[("value", i)] = val
            columns[("time", i)] = s
            columns[("known_at", i)] = at
        return join, columns

    def render_TrailingLookup(
        self, lookup: TrailingLookup, label: str
    ) -> tuple[str, dict[tuple[str, int], str]]:
        from .trailing_sql import render_trailing

        return render_trailing(self, lookup, label)
