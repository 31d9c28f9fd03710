"""The Spark engine: binds DataFrames, tables, files and frames; runs the plan in Spark SQL."""

from __future__ import annotations

import glob
import itertools
import json
import os
from collections.abc import Mapping, Sequence
from pathlib import Path
from typing import TYPE_CHECKING, Any
from urllib.parse import unquote, urlparse

import numpy as np
import pyarrow as pa
import pyarrow.compute as pc

from .._frames import check_local_path
from ..errors import InputError, NullTimeError, UnreadableInputError, UnsupportedByEngineError
from ..plan import Plan
from .render import POSITION, SqlRenderer
from .sql import Params, literal_backslash, quote_ident_backtick

if TYPE_CHECKING:
    from pyspark.sql import DataFrame, SparkSession

#: positions of multi-file inputs: file index * 2^40 + row index in the file
_FILE_STRIDE = 1 << 40
_PARQUET = (".parquet", ".pq", ".parq")
_CSV = (".csv", ".tsv", ".txt", ".csv.gz", ".tsv.gz")
_SIDECAR = "_asof_join.json"
_ENGINE_IDS = itertools.count(1)


class SparkRenderer(SqlRenderer):
    """Spark SQL: no ASOF JOIN (window formulation), no QUALIFY, backticks, ``:name`` markers.

    Every time is normalized to a ``TIMESTAMP`` (an instant), read in the session time zone,
    which the engine sets to UTC: naive values (``TIMESTAMP_NTZ``) and dates are cast, so
    they are read as UTC wall-clock times, and ``timezone=`` applies ``to_utc_timestamp``.
    Durations are added in whole microseconds (``unix_micros`` / ``timestamp_micros``).
    See https://spark.apache.org/docs/latest/sql-ref-datatypes.html for the two timestamps.
    """

    SUPPORTS_ASOF_JOIN = False
    SUPPORTS_QUALIFY = False  # Spark 4 has QUALIFY; 3.5 does not
    SUPPORTS_POSITIONAL_JOIN = False
    PACKS_COUNTS = False  # no HUGEINT: one window aggregate per output
    PARAM_MARKER = ":"

    def q(self, name: str) -> str:
        return quote_ident_backtick(name)

    def literal(self, value: str) -> str:
        return literal_backslash(value)

    def utc_from_aware(self, expr: str) -> str:
        return expr  # a TIMESTAMP is already an instant

    def utc_from_local(self, expr: str, zone_param: str) -> str:
        return f"to_utc_timestamp({expr}, {zone_param})"

    def aware_from_utc(self, expr: str) -> str:
        return expr

    def naive_from_utc(self, expr: str) -> str:
        return f"CAST({expr} AS TIMESTAMP_NTZ)"

    def to_timestamp(self, expr: str) -> str:
        return f"CAST({expr} AS TIMESTAMP)"

    def floor_nanos(self, expr: str) -> str:
        # Spark holds microseconds; the engine floors nanosecond frames before binding them
        return self.to_timestamp(expr)

    def micros(self, value: int) -> str:
        return f"CAST({self.params.add(value)} AS BIGINT)"

    def time_plus(self, expr: str, value: int) -> str:
        return f"timestamp_micros(unix_micros({expr}) + {self.micros(value)})"

    def time_minus(self, expr: str, value: int) -> str:
        return f"timestamp_micros(unix_micros({expr}) - {self.micros(value)})"

    def epoch_us(self, expr: str) -> str:
        return f"unix_micros({expr})"

    def last_non_null(self, expr: str) -> str:
        return f"last({expr}, true)"

    def struct_pack(self, fields: Sequence[tuple[str, str]]) -> str:
        return "named_struct(" + ", ".join(f"{self.literal(k)}, {v}" for k, v in fields) + ")"

    def struct_field(self, expr: str, name: str) -> str:
        return f"{expr}.{self.q(name)}"

    def count_distinct_over(self, expr: str, flt: str, window: str) -> str:
        # Spark has no DISTINCT window aggregates; collect_set skips nulls as count does
        return f"size(collect_set({expr}){flt} OVER {window})"

    def never(self, expr: str) -> tuple[str, str]:
        # FILTER on a window aggregate fails at run time in Spark: aggregate nulls instead
        return f"CASE WHEN false THEN {expr} END", ""

    def shift_left(self, value: str, bits: str) -> str:
        return f"shiftleft({value}, {bits})"

    def shift_right(self, value: str, bits: str) -> str:
        return f"shiftright({value}, {bits})"

    def unnest_range(self, start: str, stop: str) -> str:
        return f"explode(sequence({start}, {stop} - 1))"


class SparkEngine:
    """Runs plans on a SparkSession: the same plan and results as the DuckDB engine.

    Latest features use the sort-and-window formulation (Spark SQL has no ASOF JOIN). PySpark's
    internal ``DataFrame._joinAsOf`` is not used: Spark rewrites it into a correlated subquery
    (``min_by`` over ``t - time`` per label), which fails analysis on views over Parquet files
    and did not finish in 400 s where the window formulation took 16 s (100k labels, local[2]).

    Args:
        spark: the session (default: the active one). The engine sets its
            ``spark.sql.session.timeZone`` to UTC: naive times are read as UTC wall-clock times.
    """

    name = "spark"

    def __init__(self, spark: SparkSession | None = None) -> None:
        try:
            from pyspark.sql import SparkSession
        except ImportError:  # pragma: no cover - depends on the environment
            msg = "engine='spark' needs pyspark: pip install 'asof_join[spark]'"
            raise UnsupportedByEngineError(msg) from None
        if spark is None:
            spark = SparkSession.getActiveSession()
        if spark is None:
            msg = "engine='spark' needs a session: build(..., engine='spark', spark=SparkSession)"
            raise UnsupportedByEngineError(msg)
        self.spark = spark
        spark.conf.set("spark.sql.session.timeZone", "UTC")
        self.prefix = f"aj{next(_ENGINE_IDS)}"
        self.sources: dict[str, str] = {}
        self.frames: dict[str, DataFrame] = {}
        #: tables bound as local frames, kept as given (label columns come back from here)
        self.local: dict[str, pa.Table] = {}
        #: per table: the SQL (or a comment) that defines its view, for printing
        self.definitions: dict[str, str] = {}

    # -- binding ---------------------------------------------------------------------------

    def bind(self, tables: Mapping[str, object]) -> dict[str, pa.Schema]:
        """Register each table as a temp view with an input-position column; Arrow schemas."""
        schemas: dict[str, pa.Schema] = {}
        for i, (name, obj) in enumerate(tables.items()):
            view = f"{self.prefix}_src_{i}"
            frame, local = self._positioned(name, view, obj)
            self.sources[name] = view
            self.frames[name] = frame
            schema = arrow_schema(frame, exclude=(POSITION,))
            schemas[name] = schema
            if local is not None:
                self.local[name] = local
        return schemas

    def _positioned(self, name: str, view: str, obj: object) -> tuple[DataFrame, pa.Table | None]:
        """The table as a DataFrame with POSITION, registered as `view`."""
        if _is_spark_frame(obj):
            frame: DataFrame = obj  # type: ignore[assignment]  # checked just above
            return self._from_spark(name, view, frame, f"a DataFrame bound to table {name!r}"), None
        if isinstance(obj, (str, os.PathLike)):
            text = os.fspath(obj)
            if _looks_like_table(text) and self.spark.catalog.tableExists(text):
                frame = self.spark.table(text)
                return self._from_spark(name, view, frame, f"spark.table({text!r})"), None
            return self._from_path(name, view, text), None
        table = _to_arrow(name, obj)
        return self._from_arrow(name, view, table), table

    def _from_spark(self, name: str, view: str, frame: DataFrame, what: str) -> DataFrame:
        from pyspark.sql import functions as F

        _require_free(name, frame.columns)
        # a DataFrame's order is its partition order: monotonically_increasing_id follows it
        positioned = frame.withColumn(POSITION, F.monotonically_increasing_id())
        positioned.createOrReplaceTempView(view)
        self.definitions[name] = (
            f"-- {self.q(view)}: {what}, with {self.q(POSITION)} = "
            "monotonically_increasing_id() (the DataFrame's partition order)"
        )
        return positioned

    def _from_arrow(self, name: str, view: str, table: pa.Table) -> DataFrame:
        from pyspark.sql.pandas.types import from_arrow_schema

        _require_free(name, table.schema.names)
        table = _spark_ready(name, table)
        table = table.append_column(POSITION, pa.array(np.arange(table.num_rows), pa.int64()))
        # naive timestamps stay naive: TIMESTAMP_NTZ, not the session-zone TIMESTAMP
        schema = from_arrow_schema(table.schema, prefer_timestamp_ntz=True)
        try:
            if _spark_major(self.spark) >= 4:
                frame = self.spark.createDataFrame(table, schema=schema)
            else:  # pragma: no cover - Spark 3.5 takes pandas, not Arrow, frames
                frame = self.spark.createDataFrame(table.to_pandas(), schema=schema)
        except Exception as exc:  # Spark raises many kinds here: name the table
            first = str(exc).strip().splitlines()[0] if str(exc).strip() else type(exc).__name__
            msg = f"table {name!r}: Spark cannot take this frame ({first}); check its column types"
            raise InputError(msg, table=name) from None
        frame.createOrReplaceTempView(view)
        self.definitions[name] = (
            f"-- {self.q(view)}: a local frame bound to table {name!r} "
            f"({table.num_rows} rows), with {self.q(POSITION)} = row position"
        )
        return frame

    def _from_path(self, name: str, view: str, path: str) -> DataFrame:
        check_local_path(name, path, directories=True)
        is_csv = path.lower().endswith(_CSV)
        try:
            if is_csv:
                return self._csv(name, view, path)
            return self._parquet(name, view, path)
        except InputError:
            raise
        except Exception as exc:
            first = str(exc).strip().splitlines()[0] if str(exc).strip() else type(exc).__name__
            fix = "check the path and the file"
            if "NANOS" in first:
                fix = (
                    "Spark reads no nanosecond timestamps: write the file with microseconds "
                    "(pyarrow: coerce_timestamps='us')"
                )
            msg = (
                f"table {name!r}: cannot read {path!r} as {'CSV' if is_csv else 'Parquet'} "
                f"with Spark: {first}; {fix}"
            )
            raise UnreadableInputError(msg, table=name, value=path) from None

    def _parquet(self, name: str, view: str, path: str) -> DataFrame:
        """Parquet in SQL a user can re-run: positions from ``_metadata.row_index``."""
        q = self.q
        source = f"parquet.{q(path)}"
        reader = self.spark.read.parquet(path)
        columns = reader.columns
        _require_free(name, columns)
        src, files_alias = q("__aj_src"), q("__aj_files")
        picked = ", ".join(f"{src}.{q(c)}" for c in columns)
        row_index = f"{src}._metadata.row_index"
        if len(reader.inputFiles()) <= 1:
            body = f"SELECT {picked}, {row_index} AS {q(POSITION)}\nFROM {source} AS {src}"
        else:
            # DuckDB reads a glob's files in name order: number them so, row index within
            found = self.spark.sql(f"SELECT DISTINCT _metadata.file_path FROM {source}")
            files = sorted((r[0] for r in found.collect()), key=_path_order)
            values = ", ".join(f"({self.literal(f)}, {i})" for i, f in enumerate(files))
            body = (
                f"SELECT {picked}, {files_alias}.i * {_FILE_STRIDE} + {row_index} AS "
                f"{q(POSITION)}\nFROM {source} AS {src}\nJOIN (VALUES {values}) AS "
                f"{files_alias}(p, i) ON {files_alias}.p = {src}._metadata.file_path"
            )
        statement = f"CREATE OR REPLACE TEMPORARY VIEW {q(view)} AS\n{body}"
        self.spark.sql(statement)
        self.definitions[name] = f"-- table {name!r}\n{statement};"
        return self.spark.table(view)

    def _csv(self, name: str, view: str, path: str) -> DataFrame:
        """CSV with a header, types inferred; timestamps read as naive, as DuckDB does."""
        from pyspark.sql import Window
        from pyspark.sql import functions as F
        from pyspark.sql.types import TimestampType

        frame = self.spark.read.csv(path, header=True, inferSchema=True)
        _require_free(name, frame.columns)
        for field in frame.schema.fields:
            if isinstance(field.dataType, TimestampType):
                column = F.col(quote_ident_backtick(field.name))
                frame = frame.withColumn(field.name, column.cast("timestamp_ntz"))
        files = sorted(
            (r[0] for r in frame.select("_metadata.file_path").distinct().collect()),
            key=_path_order,
        )
        index = F.create_map(
            *itertools.chain.from_iterable((F.lit(f), F.lit(i)) for i, f in enumerate(files))
        )
        file_path = F.col("_metadata.file_path")
        within = Window.partitionBy(file_path).orderBy(F.monotonically_increasing_id())
        position = (
            F.coalesce(index[file_path], F.lit(0)).cast("bigint") * _FILE_STRIDE
            + F.row_number().over(within)
            - 1
        )
        positioned = frame.withColumn(POSITION, position)
        positioned.createOrReplaceTempView(view)
        self.definitions[name] = (
            f"-- {self.q(view)}: CSV {path!r} read by asof_join (header, inferred types, "
            f"timestamps as TIMESTAMP_NTZ), with {self.q(POSITION)} = row position"
        )
        return positioned

    @staticmethod
    def q(name: str) -> str:
        return quote_ident_backtick(name)

    @staticmethod
    def literal(value: str) -> str:
        return literal_backslash(value)

    # -- checks that scan rows -------------------------------------------------------------

    def check_null_times(self, plan: Plan) -> None:
        """Fail on null times the declaration does not allow: count and first positions."""
        q = self.q
        by_table: dict[str, list[Any]] = {}
        for check in plan.checks:
            by_table.setdefault(check.table, []).append(check)
        for table, checks in by_table.items():
            src = q(self.sources[table])
            counts = ", ".join(f"count(*) - count({q(c.column)})" for c in checks)
            row = self.spark.sql(f"SELECT {counts} FROM {src}").collect()[0]
            for check, nulls in zip(checks, row, strict=True):
                if not nulls:
                    continue
                col = q(check.column)
                pos = q(POSITION)
                marks = [
                    int(r[0])
                    for r in self.spark.sql(
                        f"SELECT {pos} FROM {src} WHERE {col} IS NULL ORDER BY {pos} LIMIT 5"
                    ).collect()
                ]
                # positions count rows before each mark (multi-file positions have gaps)
                ranks = ", ".join(f"count_if({pos} < {m})" for m in marks)
                first = [int(x) for x in self.spark.sql(f"SELECT {ranks} FROM {src}").collect()[0]]
                fix = (
                    "set null_times='keep' on the label table (those rows get null features) "
                    "or drop them"
                    if check.role == "label time"
                    else "set null_times='skip' on that table to ignore such rows, or fill them"
                )
                msg = (
                    f"table {check.table!r} column {check.column!r} ({check.role}) has {nulls} "
                    f"null value(s), first at 0-based row(s) {first}; {fix}"
                )
                raise NullTimeError(msg, table=check.table, column=check.column, value=int(nulls))

    # -- rendering and running -------------------------------------------------------------

    def render(self, plan: Plan) -> tuple[str, dict[str, object]]:
        renderer = SparkRenderer(plan, self.sources, positioned=self.sources)
        sql = renderer.render()
        return sql, dict(renderer.params.values)

    def run(self, plan: Plan) -> SparkResult:
        sql, params = self.render(plan)
        frame = self.spark.sql(sql, args=params or None)  # analyzed now: views resolved
        return SparkResult(self, frame, sql, params, plan)


class SparkResult:
    """A lazy training set in Spark: a DataFrame ordered by label position."""

    def __init__(
        self,
        engine: SparkEngine,
        frame: DataFrame,
        sql: str,
        params: dict[str, object],
        plan: Plan,
    ) -> None:
        self.engine = engine
        self.frame = frame
        self.sql = sql
        self.params = params
        self.plan = plan
        self._table: pa.Table | None = None

    def readable_sql(self) -> str:
        """A script for spark-sql: session time zone, the views, then the query (values inline)."""
        params = Params(dict(self.params), marker=":", quote=literal_backslash)
        head = ["SET spark.sql.session.timeZone = UTC;"]
        head += [self.engine.definitions[name] for name in self.plan.tables]
        return "\n".join(head) + "\n" + params.inline(self.sql) + ";"

    def to_spark(self) -> DataFrame:
        """The DataFrame (sorted by label position); times in it are Spark's microseconds."""
        return self.frame

    def arrow(self) -> pa.Table:
        """The result collected to the driver (for results that fit in its memory)."""
        if self._table is None:
            from pyspark.sql import functions as F

            local = self.engine.local.get(self.plan.labels.table)
            outputs = [o.name for o in self.plan.outputs]
            if local is None:
                self._table = _collect(self.frame)
            else:
                # label columns exactly as they came in (nanoseconds, zone names, dtypes): only
                # the features travel back from Spark, in label order
                picked = self.frame.select(*(F.col(quote_ident_backtick(c)) for c in outputs))
                feats = _collect(picked)
                self._table = pa.Table.from_arrays(
                    [*local.columns, *feats.columns], names=[*local.schema.names, *outputs]
                )
        return self._table

    def count(self) -> int:
        local = self.engine.local.get(self.plan.labels.table)
        if local is not None:
            return local.num_rows
        return int(self.engine.frames[self.plan.labels.table].count())

    def write_parquet(self, path: str, metadata: Mapping[str, str]) -> None:
        """A directory of part files in label order, and ``_asof_join.json`` beside them.

        Spark's Parquet writer takes no file-level key-value metadata, so the fingerprint,
        spec and version go into the sidecar.
        """
        self.frame.write.mode("overwrite").parquet(path)
        _write_sidecar(self.engine.spark, path, json.dumps(dict(metadata), sort_keys=True))

    def write_csv(self, path: str) -> None:
        self.frame.write.mode("overwrite").option("header", True).csv(path)


# -- helpers ------------------------------------------------------------------------------------


def arrow_schema(frame: DataFrame, exclude: Sequence[str] = ()) -> pa.Schema:
    """A Spark schema as Arrow: TIMESTAMP -> timestamp[us, UTC], TIMESTAMP_NTZ -> naive."""
    from pyspark.sql.pandas.types import to_arrow_type

    fields = []
    for field in frame.schema.fields:
        if field.name in exclude:
            continue
        try:
            typ = to_arrow_type(field.dataType, timezone="UTC")
        except Exception:  # a type Arrow cannot hold: no check needs its details
            typ = pa.null()
        fields.append(pa.field(field.name, typ, nullable=field.nullable))
    return pa.schema(fields)


def _collect(frame: DataFrame) -> pa.Table:
    """A DataFrame as an Arrow table, in its order."""
    if hasattr(frame, "toArrow"):
        return frame.toArrow()
    # Spark 3.5 has no toArrow; mypy reads `frame._x` as a column lookup
    batches = frame._collect_as_arrow()  # type: ignore[operator]  # pragma: no cover
    if batches:  # pragma: no cover - Spark 3.5
        return pa.Table.from_batches(batches)
    return pa.Table.from_pandas(frame.toPandas(), preserve_index=False)  # pragma: no cover


def _spark_major(spark: SparkSession) -> int:
    return int(spark.version.split(".")[0])


def _is_spark_frame(obj: object) -> bool:
    module = type(obj).__module__
    return module.startswith("pyspark.sql") and type(obj).__name__ == "DataFrame"


def _looks_like_table(text: str) -> bool:
    """A catalog name (``db.table``), not a path or glob."""
    return not (
        "/" in text
        or "\\" in text
        or "://" in text
        or glob.has_magic(text)
        or text.lower().endswith(_PARQUET + _CSV)
    )


def _path_order(uri: str) -> str:
    """Sort key of a file URI: its decoded path, the order DuckDB reads a glob in."""
    return unquote(urlparse(uri).path or uri)


def _require_free(name: str, columns: Sequence[str]) -> None:
    if POSITION in columns:
        msg = f"table {name!r} has a column named {POSITION!r}, which asof_join uses; rename it"
        raise InputError(msg, table=name, column=POSITION)


def _to_arrow(name: str, obj: object) -> pa.Table:
    """A pandas, polars or pyarrow frame (or DuckDB relation) as an Arrow table."""
    module = type(obj).__module__.split(".")[0]
    if module == "pandas":
        return pa.Table.from_pandas(obj, preserve_index=False)  # type: ignore[arg-type]
    if module == "polars":
        import polars as pl

        frame = obj.collect() if isinstance(obj, pl.LazyFrame) else obj
        assert isinstance(frame, pl.DataFrame)
        return frame.to_arrow()
    if isinstance(obj, pa.Table):
        return obj
    if isinstance(obj, pa.RecordBatchReader):
        return obj.read_all()
    if module == "duckdb":
        return obj.to_arrow_table()  # type: ignore[attr-defined]
    msg = (
        f"data for table {name!r} is a {type(obj).__name__}; pass a Spark DataFrame, a table "
        "name, a Parquet/CSV path or glob, or a pandas, polars or pyarrow frame"
    )
    raise InputError(msg, table=name)


def _spark_ready(name: str, table: pa.Table) -> pa.Table:
    """Types Spark takes: microsecond timestamps (nanoseconds floored), no unsigned or views."""
    columns = []
    for field, column in zip(table.schema, table.columns, strict=True):
        columns.append(_spark_column(name, field, column.combine_chunks()))
    return pa.Table.from_arrays(columns, names=table.schema.names)


def _spark_column(name: str, field: pa.Field, array: pa.Array) -> pa.Array:
    typ = field.type
    if pa.types.is_dictionary(typ):
        array = array.dictionary_decode()
        typ = array.type
    if pa.types.is_timestamp(typ):
        if typ.unit == "ns":
            # floor, not truncate toward zero: times before 1970 go to the earlier microsecond
            mask = array.is_null().to_numpy(zero_copy_only=False)
            raw = array.cast(pa.int64()).fill_null(0).to_numpy(zero_copy_only=False)
            micros = pa.array(np.floor_divide(raw, 1000), pa.int64(), mask=mask)
            return micros.cast(pa.timestamp("us", typ.tz))
        if typ.unit != "us":
            return array.cast(pa.timestamp("us", typ.tz))
        return array
    if pa.types.is_date64(typ):
        return array.cast(pa.date32())
    if pa.types.is_large_string(typ) or pa.types.is_string_view(typ):
        return array.cast(pa.string())
    if pa.types.is_large_binary(typ) or pa.types.is_binary_view(typ):
        return array.cast(pa.binary())
    if pa.types.is_unsigned_integer(typ):
        wider = {8: pa.int16(), 16: pa.int32(), 32: pa.int64()}.get(typ.bit_width)
        if wider is not None:
            return array.cast(wider)
        try:
            return array.cast(pa.int64())
        except pa.ArrowInvalid:
            return array.cast(pa.decimal128(20, 0))
    if pa.types.is_float16(typ):
        return pc.cast(array, pa.float32())
    return array


def _write_sidecar(spark: SparkSession, path: str, text: str) -> None:
    """Write ``<path>/_asof_join.json``: locally, else through Hadoop's file system API."""
    parsed = urlparse(path)
    if parsed.scheme in ("", "file"):
        target = Path(parsed.path if parsed.scheme else path) / _SIDECAR
        target.write_text(text + "\n", encoding="utf-8")
        return
    jvm = getattr(spark, "_jvm", None)
    if jvm is None:  # pragma: no cover - Spark Connect: no JVM gateway in the client
        spark.createDataFrame([(text,)], "value string").coalesce(1).write.mode("overwrite").text(
            f"{path.rstrip('/')}/{_SIDECAR}"
        )
        return
    hadoop_path = jvm.org.apache.hadoop.fs.Path(f"{path.rstrip('/')}/{_SIDECAR}")
    fs = hadoop_path.getFileSystem(spark._jsc.hadoopConfiguration())
    stream = fs.create(hadoop_path, True)
    try:
        stream.write(bytearray((text + "\n").encode("utf-8")))
    finally:
        stream.close()
