"""Leakage audit, source rules: rows of the feature tables themselves, not the audited frame.

``ambiguous_source_rows`` (rows that tie on key, valid and known time but differ in value) and
``known_before_valid`` (a known time before its valid time). Mixed into the auditor in
``audit.py``, which provides the connection, the bound sources and ``_add``.
"""

from __future__ import annotations

from collections.abc import Sequence
from typing import TYPE_CHECKING, Any

import pyarrow.compute as pc

from .audit_report import Rule
from .audit_sql import _micros_to_py, _params
from .engines.sql import Params, quote_ident
from .plan import LatestLookup

if TYPE_CHECKING:
    import pyarrow as pa

    from .plan import Plan, TrailingLookup

q = quote_ident


class SourceChecks:
    """The source rules; needs the auditor's plan, sources and helpers."""

    plan: Plan | None
    sources: dict[str, str]
    source_types: dict[str, dict[str, str]]
    max_examples: int

    def _check_sources(self) -> None:
        if self.plan is None:
            return
        seen_tables: set[str] = set()
        for lookup in self.plan.lookups:
            if lookup.table not in seen_tables:
                seen_tables.add(lookup.table)
                if lookup.known is not None:
                    self._known_before_valid(lookup)
            if isinstance(lookup, LatestLookup):
                # one check per column: several features may read it (e.g. with other max_age)
                readers: dict[str, list[str]] = {}
                for value in lookup.values:
                    readers.setdefault(value.column, []).append(value.output)
                for column, outputs in readers.items():
                    self._ambiguous(lookup, column, outputs)

    def _known_before_valid(self, lookup: LatestLookup | TrailingLookup) -> None:
        assert lookup.known is not None
        types = self.source_types[lookup.table]
        p = Params()
        s = self._us(lookup.valid.column, types, p, lookup.valid.zone)
        k = self._us(lookup.known.column, types, p, lookup.known.zone)
        view = q(self.sources[lookup.table])
        keys = [q(c) for c in lookup.table_keys]
        # a cheap count first: positions need an ordered scan
        if not self._scalar_rows(f"SELECT count(*) FROM {view} WHERE {k} < {s}", p)[0][0]:
            return
        found = self._fetch(
            f"SELECT src_pos, {', '.join(keys)}, {q(lookup.valid.column)} AS valid_time, "
            f"{q(lookup.known.column)} AS known_at FROM (SELECT row_number() OVER () - 1 AS "
            f"src_pos, * FROM {view}) WHERE {k} < {s} ORDER BY src_pos",
            p,
        )
        if found.num_rows == 0:
            return
        pos = found.column("src_pos").to_numpy()
        examples = self._source_examples(found, lookup.table_keys, ["valid_time", "known_at"])
        self._add(
            Rule.KNOWN_BEFORE_VALID,
            None,
            pos,
            f"{found.num_rows:,} rows of table {lookup.table!r} have {lookup.known.column!r} "
            f"(known time) before {lookup.valid.column!r} (valid time); their known time is "
            "taken as the valid time",
            examples,
            table=lookup.table,
        )

    def _ambiguous(self, lookup: LatestLookup, column: str, outputs: list[str]) -> None:
        keys = [f'"__aj_k{j}"' for j in range(len(lookup.table_keys))]
        group = ", ".join([*keys, "s", "k"])
        on = " AND ".join(f"r.{c} = g.{c}" for c in [*keys, "s", "k"])
        ambiguous = (
            f"SELECT {group} FROM r GROUP BY {group} HAVING count(*) > 1 AND "
            "(min(v0) <> max(v0) OR (count(v0) > 0 AND count(v0) < count(*)))"
        )
        # a cheap count first: positions need an ordered scan
        p = Params()
        rows = self._rows_sql(lookup, [column], p)
        count = f"WITH r AS ({rows}) SELECT count(*) FROM ({ambiguous})"
        if not self._scalar_rows(count, p)[0][0]:
            return
        p = Params()
        rows = self._rows_sql(lookup, [column], p, positions=True)
        found = self._fetch(
            f"""
            WITH r AS ({rows}), g AS ({ambiguous})
            SELECT r.src_pos, r.v0 AS value, r.s, r.k,
                   dense_rank() OVER (ORDER BY {", ".join(f"r.{c}" for c in [*keys, "s", "k"])})
                       AS grp
            FROM r JOIN g ON {on} ORDER BY r.src_pos
            """,
            p,
        )
        if found.num_rows == 0:
            return
        pos = found.column("src_pos").to_numpy()
        groups = int(pc.max(found.column("grp")).as_py())
        raw = self._fetch(
            f"SELECT {', '.join(q(c) for c in lookup.table_keys)}, {q(lookup.valid.column)} AS "
            f"valid_time FROM (SELECT row_number() OVER () - 1 AS src_pos, * FROM "
            f"{q(self.sources[lookup.table])}) WHERE list_contains($pos, src_pos) ORDER BY src_pos",
            _params(pos=[int(x) for x in pos[: self.max_examples]]),
        )
        examples = []
        for j, row in enumerate(raw.to_pylist()):
            examples.append(
                {
                    "position": int(pos[j]),
                    "key": {c: row[c] for c in lookup.table_keys},
                    "valid_time": row["valid_time"],
                    "known_time": _micros_to_py(found.column("k").slice(j, 1))[0],
                    "value": found.column("value")[j].as_py(),
                    "group": int(found.column("grp")[j].as_py()),
                }
            )
        self._add(
            Rule.AMBIGUOUS_SOURCE_ROWS,
            None,
            pos,
            f"{found.num_rows:,} rows of table {lookup.table!r} fall in {groups:,} groups with "
            f"equal key, valid and known time but different {column!r} values (read by "
            f"{', '.join(map(repr, outputs))}); the build keeps the last in input order, so "
            "the result depends on load order",
            examples,
            table=lookup.table,
            details={"groups": groups, "column": column, "features": outputs},
        )

    def _source_examples(
        self, found: pa.Table, keys: Sequence[str], columns: Sequence[str]
    ) -> list[dict[str, Any]]:
        examples = []
        for row in found.slice(0, self.max_examples).to_pylist():
            ex: dict[str, Any] = {"position": int(row["src_pos"])}
            ex["key"] = {c: row[c] for c in keys}
            ex.update({c: row[c] for c in columns})
            examples.append(ex)
        return examples

    # -- label proxy -----------------------------------------------------------------------
