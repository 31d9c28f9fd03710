"""Renders a plan to SQL: one method per plan step, dialect quirks as class flags and hooks."""

from __future__ import annotations

from collections.abc import Callable, Sequence

from ..plan import (
    LatestLookup,
    Lookup,
    Plan,
    Reduction,
    TimeKind,
    TimeRef,
    TrailingLookup,
)
from .sql import Params, quote_ident

q = quote_ident


def _join(parts: Sequence[str], sep: str = ", ") -> str:
    return sep.join(parts)


class SqlRenderer:
    """Base SQL renderer; dialects subclass it and override flags and small hooks."""

    #: the dialect has a native as-of join (else the union-and-window formulation is used)
    SUPPORTS_ASOF_JOIN: bool = True
    #: the dialect has QUALIFY (else a subquery filters)
    SUPPORTS_QUALIFY: bool = True
    #: the dialect zips two ordered inputs row by row (POSITIONAL JOIN): label columns then skip
    #: the joins and the final sort
    SUPPORTS_POSITIONAL_JOIN: bool = True

    def __init__(self, plan: Plan, sources: dict[str, str]) -> None:
        self.plan = plan
        self.sources = sources  # table name -> relation name the engine registered
        self.params = Params()
        self.ctes: list[tuple[str, str]] = []

    # -- hooks a dialect overrides --------------------------------------------------------

    def utc_from_aware(self, expr: str) -> str:
        """A timezone-aware value as a naive UTC timestamp."""
        return f"timezone('UTC', {expr})"

    def utc_from_local(self, expr: str, zone_param: str) -> str:
        """A naive value read in a zone, as a naive UTC timestamp."""
        return f"timezone('UTC', timezone({zone_param}, {expr}))"

    def aware_from_utc(self, expr: str) -> str:
        """A naive UTC timestamp as a timezone-aware instant (for provenance output)."""
        return f"timezone('UTC', {expr})"

    def to_timestamp(self, expr: str) -> str:
        return f"CAST({expr} AS TIMESTAMP)"

    def micros(self, value: int) -> str:
        """A duration of `value` microseconds, as a bound parameter."""
        return f"to_microseconds(CAST({self.params.add(value)} AS BIGINT))"

    def arg_max(self, value: str, order: str) -> str:
        """The value on the row with the greatest `order`, kept even when it is null."""
        return f"arg_max_null({value}, {order})"

    def valid_then_order(self, valid: str, ordinal: str) -> str:
        """One sortable key for (valid time, input position): microseconds * 2^40 + position."""
        return f"CAST(epoch_us({valid}) AS HUGEINT) * 1099511627776 + {ordinal}"

    def row_number_in_input_order(self) -> str:
        return "row_number() OVER ()"

    # -- building blocks --------------------------------------------------------------------

    def source(self, table: str) -> str:
        return q(self.sources[table])

    def time_expr(self, ref: TimeRef, alias: str | None = None) -> str:
        col = q(ref.column) if alias is None else f"{alias}.{q(ref.column)}"
        if ref.kind == TimeKind.AWARE:
            return self.utc_from_aware(col)
        ts = self.to_timestamp(col)
        if ref.zone is not None:
            return self.utc_from_local(ts, self.params.add(ref.zone))
        return ts

    def cte(self, name: str, body: str) -> str:
        self.ctes.append((name, body))
        return q(name)

    def qualify(self, select: str, condition: str) -> str:
        if self.SUPPORTS_QUALIFY:
            return f"{select}\n    QUALIFY {condition}"
        return f"SELECT * FROM ({select}) WHERE {condition}"

    # -- steps ------------------------------------------------------------------------------

    def render(self) -> str:
        """The whole query: CTEs for labels and each lookup, then the ordered projection."""
        labels = self.render_labels()
        joins: list[str] = []
        exprs: dict[str, str] = {}
        for lookup in self.plan.lookups:
            method: Callable[[Lookup, str], tuple[str, dict[tuple[str, int], str]]] = getattr(
                self, f"render_{type(lookup).__name__}"
            )
            join, columns = method(lookup, "l")
            joins.append(join)
            for out in self.plan.outputs:
                if out.step == lookup.step:
                    exprs[out.name] = columns[(out.slot, out.index)]
        # declared output order
        projections = [f"{exprs[out.name]} AS {q(out.name)}" for out in self.plan.outputs]
        if self.SUPPORTS_POSITIONAL_JOIN:
            # narrow rows (position, features) go through the joins and the final sort; the
            # label columns are read once more, in input order, and zipped on by position
            select = _join(['l."__aj_row"', *projections], ",\n       ")
            body = f"SELECT {select}\nFROM {labels} AS l\n" + "\n".join(joins)
            feats = self.cte("__aj_features", body + '\nORDER BY l."__aj_row"')
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
        return f'WITH {self._with_sql()}\n{body}\nORDER BY l."__aj_row"'

    def _with_sql(self) -> str:
        return _join([f"{q(n)} AS (\n    {b}\n)" for n, b in self.ctes], ",\n")

    def render_labels(self) -> str:
        lab = self.plan.labels
        if self.SUPPORTS_POSITIONAL_JOIN:
            picked = "".join(f"{q(c)}, " for c in lab.keys)
        else:
            picked = "*, "
        body = (
            f'SELECT {self.row_number_in_input_order()} - 1 AS "__aj_row", '
            f'{picked}{self.time_expr(lab.time)} AS "__aj_t"\n    FROM {self.source(lab.table)}'
        )
        return self.cte("__aj_labels", body)

    def rows_cte(self, lookup: Lookup, value_columns: Sequence[str | None]) -> str:
        """Normalized rows of a table: keys, valid time s, known time k, input order, values."""
        s = self.time_expr(lookup.valid)
        if lookup.known is not None:
            k = f"greatest({self.time_expr(lookup.known)}, {s})"
        elif lookup.delay_us:
            k = f"{s} + {self.micros(lookup.delay_us)}"
        else:
            k = s
        keys = [f'{q(c)} AS "__aj_k{i}"' for i, c in enumerate(lookup.table_keys)]
        vals = [
            f'{q(c) if c is not None else "NULL"} AS "__aj_v{i}"'
            for i, c in enumerate(value_columns)
        ]
        where = [f"{q(c)} IS NOT NULL" for c in lookup.table_keys]
        where.append(f"{q(lookup.valid.column)} IS NOT NULL")
        if lookup.known is not None:
            where.append(f"{q(lookup.known.column)} IS NOT NULL")
        body = (
            f'SELECT {_join(keys)}, {s} AS "__aj_s", {k} AS "__aj_kt", '
            f'{self.row_number_in_input_order()} AS "__aj_ord"'
            + (", " + _join(vals) if vals else "")
            + f"\n    FROM {self.source(lookup.table)}\n    WHERE {_join(where, ' AND ')}"
        )
        return self.cte(f"__aj_rows{lookup.step}", body)

    def timeline_cte(self, lookup: LatestLookup, rows: str) -> str:
        """One row per lookup time such that the newest one before t is the answer at t."""
        keys = [f'"__aj_k{i}"' for i in range(len(lookup.table_keys))]
        vals = [f'"__aj_v{i}"' for i in range(len(lookup.values))]
        if lookup.reduction == Reduction.VALID:
            # ties on (key, valid time): the last row in input order wins
            picks = [self.arg_max(v, '"__aj_ord"') + f" AS {v}" for v in vals]
            at = '"__aj_s"'
            if lookup.delay_us:
                at = f'"__aj_s" + {self.micros(lookup.delay_us)}'
            body = (
                f'SELECT {_join(keys)}, "__aj_s", {at} AS "__aj_at"'
                + "".join(", " + p for p in picks)
                + f'\n    FROM {rows} GROUP BY {_join(keys)}, "__aj_s"'
            )
            return self.cte(f"__aj_line{lookup.step}", body)
        # known-time column: collapse each (key, known time) batch to its newest row (greatest
        # valid time, then last in input order), then keep a row when its valid time is at
        # least the running max of valid times known strictly before it
        order = self.valid_then_order('"__aj_s"', '"__aj_ord"')
        picks = [self.arg_max(v, order) + f" AS {v}" for v in ['"__aj_s"', *vals]]
        grouped = self.cte(
            f"__aj_batch{lookup.step}",
            f'SELECT {_join(keys)}, "__aj_kt" AS "__aj_at", {_join(picks)}\n'
            f'    FROM {rows} GROUP BY {_join(keys)}, "__aj_kt"',
        )
        running = (
            f'max("__aj_s") OVER (PARTITION BY {_join(keys)} ORDER BY "__aj_at" '
            "ROWS BETWEEN UNBOUNDED PRECEDING AND 1 PRECEDING)"
        )
        select = f"SELECT *\n    FROM {grouped}"
        cond = f'"__aj_s" >= coalesce({running}, "__aj_s")'
        return self.cte(f"__aj_line{lookup.step}", self.qualify(select, cond))

    def render_LatestLookup(
        self, lookup: LatestLookup, label: str
    ) -> tuple[str, dict[tuple[str, int], str]]:
        rows = self.rows_cte(lookup, [v.column for v in lookup.values])
        line = self.timeline_cte(lookup, rows)
        alias = f"f{lookup.step}"
        on = [f'{label}.{q(lc)} = {alias}."__aj_k{i}"' for i, lc in enumerate(lookup.label_keys)]
        op = ">=" if lookup.inclusive else ">"
        on.append(f'{label}."__aj_t" {op} {alias}."__aj_at"')
        join = f"ASOF LEFT JOIN {line} AS {alias} ON {_join(on, ' AND ')}"
        columns: dict[tuple[str, int], str] = {}
        for i, v in enumerate(lookup.values):
            val = f'{alias}."__aj_v{i}"'
            s = f'{alias}."__aj_s"'
            at = f'{alias}."__aj_at"'
            if v.max_age_us is not None:
                fresh = f'{s} >= {label}."__aj_t" - {self.micros(v.max_age_us)}'
                val, s, at = (f"CASE WHEN {fresh} THEN {x} END" for x in (val, s, at))
            if self.plan.aware and v.provenance:
                s, at = self.aware_from_utc(s), self.aware_from_utc(at)
            columns[("value", i)] = val
            columns[("time", i)] = s
            columns[("known_at", i)] = at
        return join, columns

    def render_TrailingLookup(
        self, lookup: TrailingLookup, label: str
    ) -> tuple[str, dict[tuple[str, int], str]]:
        from .trailing_sql import render_trailing

        return render_trailing(self, lookup, label)
