"""The DuckDB engine: binds frames and files, runs the row checks, renders and runs the plan."""

from __future__ import annotations

import glob
import os
from collections.abc import Mapping
from typing import Any

import duckdb
import numpy as np
import pyarrow as pa

from .._frames import check_local_path
from ..errors import InputError, NullTimeError, SpecError, UnreadableInputError
from ..plan import Plan
from .render import POSITION, SqlRenderer
from .sql import literal, quote_ident


class DuckDBRenderer(SqlRenderer):
    """DuckDB has ASOF JOIN, QUALIFY, struct_pack and ICU time zones: the base syntax."""

    SUPPORTS_ASOF_JOIN = True
    SUPPORTS_QUALIFY = True


class DuckDBWindowRenderer(DuckDBRenderer):
    """DuckDB without ASOF JOIN or QUALIFY: the formulation engines like Spark SQL run.

    Selected with ``DuckDBEngine(asof="window")`` so the union-and-window latest lookup is
    tested against the oracle on DuckDB too.
    """

    SUPPORTS_ASOF_JOIN = False
    SUPPORTS_QUALIFY = False


_RENDERERS: dict[str, type[DuckDBRenderer]] = {
    "join": DuckDBRenderer,
    "window": DuckDBWindowRenderer,
}


_PARQUET = (".parquet", ".pq", ".parq")
_CSV = (".csv", ".tsv", ".txt", ".csv.gz", ".tsv.gz")


def connect(
    *,
    memory_limit: str | None = None,
    temp_dir: str | os.PathLike[str] | None = None,
    threads: int | None = None,
    connection: duckdb.DuckDBPyConnection | None = None,
) -> duckdb.DuckDBPyConnection:
    """A DuckDB connection set up the way every part of asof_join needs it.

    UTC session time zone, no progress bar, no extension downloads, and as-of joins that stay
    sort-merge joins: a label relation shared by several lookups has no size estimate, and
    DuckDB may then plan an as-of join as a nested loop (318 s instead of 5 s at 900k labels).
    https://duckdb.org/docs/stable/configuration/overview (asof_loop_join_threshold)
    """
    con = connection if connection is not None else duckdb.connect()

    def run(sql: str, params: dict[str, object] | None = None) -> list[tuple[Any, ...]]:
        return con.execute(sql, params or {}).fetchall()

    run("SET TimeZone = 'UTC'")
    run("SET enable_progress_bar = false")
    run("SET autoinstall_known_extensions = false")
    run("SET autoload_known_extensions = false")
    known = "SELECT count(*) FROM duckdb_settings() WHERE name = 'asof_loop_join_threshold'"
    if run(known)[0][0]:  # older DuckDB versions do not have the setting
        run("SET asof_loop_join_threshold = 0")
    if memory_limit is not None:
        run(f"SET memory_limit = {literal(str(memory_limit))}")
    if temp_dir is not None:
        run(f"SET temp_directory = {literal(str(temp_dir))}")
    if threads is not None:
        run(f"SET threads = {int(threads)}")
    return con


class DuckDBEngine:
    """Runs plans in one DuckDB connection (in-process; spills to temp_dir under memory_limit)."""

    name = "duckdb"

    def __init__(
        self,
        *,
        memory_limit: str | None = None,
        temp_dir: str | os.PathLike[str] | None = None,
        threads: int | None = None,
        connection: duckdb.DuckDBPyConnection | None = None,
        asof: str = "join",
    ) -> None:
        if asof not in _RENDERERS:
            msg = f"asof={asof!r} is not a DuckDB as-of method; choose one of {sorted(_RENDERERS)}"
            raise SpecError(msg)
        self.renderer = _RENDERERS[asof]
        self.con = connect(
            memory_limit=memory_limit, temp_dir=temp_dir, threads=threads, connection=connection
        )
        self.sources: dict[str, str] = {}
        # table name -> a view of the same rows plus POSITION (see _position)
        self.positioned: dict[str, str] = {}
        self.arrow_schemas: dict[str, pa.Schema] = {}
        self._keep: list[object] = []
        self._frames: dict[str, pa.Table] = {}  # in-memory inputs, as registered
        # table name -> number of rows, where known without a scan (frames, Parquet footers)
        self.row_counts: dict[str, int] = {}
        self._int32: dict[tuple[str, str], bool] = {}  # (table, column) -> values fit INTEGER
        # table name -> SQL comment lines saying what its views hold (for readable SQL)
        self.definitions: dict[str, list[str]] = {}

    # -- binding ---------------------------------------------------------------------------

    def bind(self, tables: Mapping[str, object]) -> dict[str, pa.Schema]:
        """Register every table's data under an internal name; return their Arrow schemas."""
        schemas: dict[str, pa.Schema] = {}
        for i, (name, obj) in enumerate(tables.items()):
            view = f"aj_src_{i}"
            original = self._register(name, view, obj)
            self.sources[name] = view
            rel = self.con.sql(f"SELECT * FROM {quote_ident(view)} LIMIT 0")
            schema = rel.to_arrow_table().schema
            schemas[name] = schema
            self.arrow_schemas[name] = original if original is not None else schema
            self._position(name, f"aj_pos_{i}", obj, schema)
            self._define(name, view, obj)
            self._count(name, view, obj)
        return schemas

    def _count(self, name: str, view: str, obj: object) -> None:
        """Record the table's row count when it costs no scan: a frame's length, or the sum
        of Parquet footers (DuckDB answers count(*) from them). CSV stays unknown."""
        if name in self._frames:
            self.row_counts[name] = self._frames[name].num_rows
        elif isinstance(obj, (str, os.PathLike)) and not os.fspath(obj).lower().endswith(_CSV):
            count = self.fetch(f"SELECT count(*) FROM {quote_ident(view)}")[0][0]
            self.row_counts[name] = int(count)

    def _define(self, name: str, view: str, obj: object) -> None:
        """Readable SQL's preamble for a table: CREATE VIEW statements for a file (so the
        script runs in the duckdb shell), or a comment naming the frame to register."""
        q = quote_ident
        if isinstance(obj, (str, os.PathLike)):
            path = os.fspath(obj)
            reader = "read_csv" if path.lower().endswith(_CSV) else "read_parquet"
            scan = f"{reader}({literal(path)})"
            lines = [
                f"-- table {name!r}",
                f"CREATE OR REPLACE TEMP VIEW {q(view)} AS SELECT * FROM {scan};",
            ]
            if name in self.positioned:
                lines.append(
                    f"CREATE OR REPLACE TEMP VIEW {q(self.positioned[name])} AS "
                    f"SELECT *, file_row_number AS {q(POSITION)} FROM {scan};"
                )
        else:  # reprs: a line break in a name cannot end the comment
            rows = self._frames[name].num_rows if name in self._frames else "?"
            kind = f"{type(obj).__module__.split('.')[0]} {type(obj).__name__}"
            lines = [f"-- {q(view)}: table {name!r}, a {kind} ({rows} rows): register it"]
            if name in self.positioned:
                lines.append(
                    f"-- {q(self.positioned[name])}: the same rows with {q(POSITION)} = "
                    "row position (0, 1, ...)"
                )
        self.definitions[name] = lines

    def _position(self, name: str, view: str, obj: object, schema: pa.Schema) -> None:
        """Register `view`: the table's rows with POSITION, their 0-based input position.

        Numbering rows in the query (``row_number() OVER ()``) is a single-threaded pass that
        costs about 0.5 s per 10M rows; a single Parquet file has the position for free
        (``file_row_number``) and an in-memory frame takes a column. CSV files and multi-file
        globs are numbered in the query.
        """
        if POSITION in schema.names:
            return
        if isinstance(obj, (str, os.PathLike)):
            path = os.fspath(obj)
            if not path.lower().endswith(_PARQUET) or glob.has_magic(path):
                return
            if "file_row_number" in schema.names:  # a real column would hide the virtual one
                return
            rel = self.con.read_parquet(path)
            rel.select(f"*, file_row_number AS {quote_ident(POSITION)}").create_view(view)
        else:
            table = self._frames.get(name)
            if table is None:
                return
            numbers = pa.array(np.arange(table.num_rows, dtype=np.int64))
            positioned = table.append_column(POSITION, numbers)
            self.con.register(view, positioned)
            self._keep.append(positioned)
        self.positioned[name] = view

    def _register(self, name: str, view: str, obj: object) -> pa.Schema | None:
        if isinstance(obj, (str, os.PathLike)):
            self._register_path(name, view, os.fspath(obj))
            return None
        module = type(obj).__module__.split(".")[0]
        if module == "pandas":
            import pandas as pd

            assert isinstance(obj, pd.DataFrame)
            table = pa.Table.from_pandas(obj, preserve_index=False)
            self._register_frame(name, view, table)
            return table.schema
        if module == "polars":
            import polars as pl

            frame = obj.collect() if isinstance(obj, pl.LazyFrame) else obj
            assert isinstance(frame, pl.DataFrame)
            table = frame.to_arrow()
            self._register_frame(name, view, table)
            return table.schema
        if isinstance(obj, pa.Table):
            self._register_frame(name, view, obj)
            return obj.schema
        if isinstance(obj, pa.RecordBatchReader):
            table = obj.read_all()
            self._register_frame(name, view, table)
            return table.schema
        if isinstance(obj, duckdb.DuckDBPyRelation):
            # a relation belongs to its own connection: bring it over through Arrow
            table = obj.to_arrow_table()
            self._register_frame(name, view, table)
            return table.schema
        msg = (
            f"data for table {name!r} is a {type(obj).__name__}; pass a pandas, polars or "
            "pyarrow frame, a DuckDB relation, or a Parquet/CSV path or glob"
        )
        raise InputError(msg, table=name)

    def _register_frame(self, name: str, view: str, table: pa.Table) -> None:
        self.con.register(view, table)
        self._keep.append(table)
        self._frames[name] = table

    def _register_path(self, name: str, view: str, path: str) -> None:
        check_local_path(name, path)
        lower = path.lower()
        try:
            is_csv = lower.endswith(_CSV)
            rel = self.con.read_csv(path) if is_csv else self.con.read_parquet(path)
            rel.create_view(view)
        except duckdb.Error as exc:
            first = str(exc).splitlines()[0]
            msg = (
                f"table {name!r}: cannot read {path!r} as "
                f"{'CSV' if lower.endswith(_CSV) else 'Parquet'}: {first}; check the file"
            )
            raise UnreadableInputError(msg, table=name, value=path) from None

    def fetch(self, sql: str, params: dict[str, object] | None = None) -> list[tuple[Any, ...]]:
        """Run a statement to completion and return its rows."""
        return self.con.execute(sql, params or {}).fetchall()

    # -- checks that scan rows -------------------------------------------------------------

    def check_null_times(self, plan: Plan) -> None:
        """Fail on null times the declaration does not allow: count and first positions."""
        for check in plan.checks:
            src = quote_ident(self.sources[check.table])
            col = quote_ident(check.column)
            nulls = int(self.fetch(f"SELECT count(*) - count({col}) FROM {src}")[0][0])
            if nulls == 0:
                continue
            first = [
                int(r[0])
                for r in self.fetch(
                    f"SELECT pos FROM (SELECT row_number() OVER () - 1 AS pos, {col} AS c "
                    f"FROM {src}) WHERE c IS NULL ORDER BY pos LIMIT 5"
                )
            ]
            fix = (
                "set null_times='keep' on the label table (those rows get null features) or "
                "drop them"
                if check.role == "label time"
                else "set null_times='skip' on that table to ignore such rows, or fill them"
            )
            msg = (
                f"table {check.table!r} column {check.column!r} ({check.role}) has {nulls} null "
                f"value(s), first at 0-based row(s) {first}; {fix}"
            )
            raise NullTimeError(msg, table=check.table, column=check.column, value=nulls)

    # -- rendering and running -------------------------------------------------------------

    def narrow_keys(self, plan: Plan) -> set[tuple[int, int]]:
        """(step, key index) of lookups whose key can sort and join as a 32-bit INTEGER.

        Every lookup sorts by key (the tie-break window, the as-of join, a trailing frame); a
        4-byte key instead of 8 keeps the sort key narrower: about 3% of a 30-day trailing
        build at 5M x 10M and 6% of a latest build at 10M x 10M. Only for a wider integer
        column of the table whose values all fit INTEGER (min and max: Parquet statistics, or a
        scan of the column), joined to an integer label column, which is read with TRY_CAST: a
        label key out of range matches no row either way.
        """
        narrow: set[tuple[int, int]] = set()
        labels = self.arrow_schemas[plan.labels.table]
        for lookup in plan.lookups:
            table = self.arrow_schemas[lookup.table]
            pairs = zip(lookup.table_keys, lookup.label_keys, strict=True)
            for i, (column, label_column) in enumerate(pairs):
                typ = table.field(column).type
                wide = (pa.types.is_integer(typ) and typ.bit_width > 32) or typ == pa.uint32()
                if (
                    wide
                    and pa.types.is_integer(labels.field(label_column).type)
                    and self._fits_int32(lookup.table, column)
                ):
                    narrow.add((lookup.step, i))
        return narrow

    def _fits_int32(self, table: str, column: str) -> bool:
        if (table, column) not in self._int32:
            col = quote_ident(column)
            low, high = self.fetch(
                f"SELECT min({col}), max({col}) FROM {quote_ident(self.sources[table])}"
            )[0]
            self._int32[(table, column)] = low is None or (low >= -(2**31) and high < 2**31)
        return self._int32[(table, column)]

    def render(self, plan: Plan) -> tuple[str, dict[str, object]]:
        renderer = self.renderer(
            plan, self.sources, self.positioned, self.row_counts, self.narrow_keys(plan)
        )
        sql = renderer.render()
        return sql, dict(renderer.params.values)

    def run(self, plan: Plan) -> DuckDBResult:
        sql, params = self.render(plan)
        label_schema = self.arrow_schemas[plan.labels.table]
        return DuckDBResult(self, sql, params, label_schema, plan)


class DuckDBResult:
    """A lazy training set in DuckDB: executed on first read, streamed when written."""

    def __init__(
        self,
        engine: DuckDBEngine,
        sql: str,
        params: dict[str, object],
        label_schema: pa.Schema,
        plan: Plan,
    ) -> None:
        self.engine = engine
        self.sql = sql
        self.params = params
        self.label_schema = label_schema
        self.plan = plan
        self._table: pa.Table | None = None

    def readable_sql(self) -> str:
        """A script for the duckdb shell: settings, the views of file-bound tables (frames are
        named in comments), then the query with parameters written inline (the run binds
        them)."""
        from .sql import Params

        head = [
            "SET TimeZone = 'UTC';",
            "SET asof_loop_join_threshold = 0;",
            *(line for name in self.plan.tables for line in self.engine.definitions[name]),
        ]
        return "\n".join([*head, Params(dict(self.params)).inline(self.sql) + ";"])

    def relation(self) -> duckdb.DuckDBPyRelation:
        return self.engine.con.sql(self.sql, params=self.params)

    def arrow(self) -> pa.Table:
        if self._table is None:
            table = self.relation().to_arrow_table()
            self._table = _restore_label_types(table, self.label_schema)
        return self._table

    def count(self) -> int:
        src = quote_ident(self.engine.sources[self.plan.labels.table])
        return int(self.engine.fetch(f"SELECT count(*) FROM {src}")[0][0])

    def write_parquet(self, path: str, metadata: Mapping[str, str]) -> None:
        kv = ", ".join(f"{literal(k)}: {literal(v)}" for k, v in metadata.items())
        self.engine.fetch(
            f"COPY ({self.sql}) TO {literal(path)} (FORMAT parquet, KV_METADATA {{{kv}}})",
            self.params,
        )

    def write_csv(self, path: str) -> None:
        self.engine.fetch(
            f"COPY ({self.sql}) TO {literal(path)} (FORMAT csv, HEADER true)", self.params
        )


def _restore_label_types(table: pa.Table, label_schema: pa.Schema) -> pa.Table:
    """Cast label columns back to the types they came in with (e.g. a time zone's name)."""
    columns = list(table.columns)
    changed = False
    for i, field in enumerate(label_schema):
        if i >= len(columns) or table.schema.field(i).name != field.name:
            break
        if columns[i].type != field.type:
            try:
                columns[i] = columns[i].cast(field.type)
                changed = True
            except (pa.ArrowInvalid, pa.ArrowNotImplementedError):
                continue
    if not changed:
        return table
    names = table.schema.names
    return pa.Table.from_arrays(columns, names=names, metadata=table.schema.metadata)
