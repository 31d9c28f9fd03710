"""build(): spec + data -> checks -> plan -> engine; the TrainingSet result."""

from __future__ import annotations

import os
from collections.abc import Mapping
from typing import TYPE_CHECKING, Any

from . import __version__
from .engines import Engine, Result, get_engine
from .inputs import check_bindings, check_inputs
from .plan import Plan, make_plan
from .spec import TrainingSetSpec

if TYPE_CHECKING:
    import pandas as pd
    import polars as pl
    import pyarrow as pa


class TrainingSet:
    """A built training set: lazy until read; one row per label row, in label order."""

    def __init__(self, spec: TrainingSetSpec, plan: Plan, engine: Engine, result: Result) -> None:
        self.spec = spec
        self.plan = plan
        self.engine = engine
        self._result = result

    @property
    def sql(self) -> str:
        """The compiled SQL, readable (parameters shown inline)."""
        inline = getattr(self._result, "readable_sql", None)
        return inline() if callable(inline) else self._result.sql

    @property
    def fingerprint(self) -> str:
        """The spec's fingerprint, also written into every output's metadata."""
        return self.plan.fingerprint

    @property
    def columns(self) -> list[str]:
        """Label columns, then feature columns in declared order."""
        return list(self.plan.labels.columns) + [o.name for o in self.plan.outputs]

    def metadata(self) -> dict[str, str]:
        """Key-value metadata written with the data: fingerprint, spec, library version."""
        return {
            "asof_join.fingerprint": self.plan.fingerprint,
            "asof_join.spec": self.spec.to_json(),
            "asof_join.version": __version__,
        }

    def to_arrow(self) -> pa.Table:
        """The result as a pyarrow Table (fingerprint in the schema metadata)."""
        table = self._result.arrow()
        meta = dict(table.schema.metadata or {})
        meta.update({k.encode(): v.encode() for k, v in self.metadata().items()})
        return table.replace_schema_metadata(meta)

    def to_pandas(self) -> pd.DataFrame:
        """The result as a pandas DataFrame."""
        return self._result.arrow().to_pandas()

    def to_polars(self) -> pl.DataFrame:
        """The result as a polars DataFrame."""
        import polars as pl

        frame = pl.from_arrow(self._result.arrow())
        assert isinstance(frame, pl.DataFrame)
        return frame

    def to_spark(self) -> Any:
        """The result as a Spark DataFrame (Spark engine only)."""
        to_spark = getattr(self._result, "to_spark", None)
        if to_spark is None:
            from .errors import UnsupportedByEngineError

            msg = f"to_spark() needs engine='spark'; this set was built with {self.engine.name!r}"
            raise UnsupportedByEngineError(msg)
        return to_spark()

    def write_parquet(self, path: str | os.PathLike[str]) -> None:
        """Write Parquet, streamed by the engine; the fingerprint goes into the file metadata."""
        self._result.write_parquet(os.fspath(path), self.metadata())

    def write_csv(self, path: str | os.PathLike[str]) -> None:
        """Write CSV with a header row, streamed by the engine."""
        self._result.write_csv(os.fspath(path))

    def __len__(self) -> int:
        return self._result.count()

    def __repr__(self) -> str:
        return (
            f"TrainingSet(labels={self.plan.labels.table!r}, features={len(self.plan.outputs)}, "
            f"engine={self.engine.name!r}, fingerprint={self.plan.fingerprint!r})"
        )


def build(
    spec: TrainingSetSpec,
    data: Mapping[str, object] | None = None,
    *,
    provenance: bool = False,
    engine: str | Engine = "duckdb",
    memory_limit: str | None = None,
    temp_dir: str | os.PathLike[str] | None = None,
    threads: int | None = None,
    spark: Any = None,
    connection: Any = None,
) -> TrainingSet:
    """Build a point-in-time correct training set.

    Args:
        spec: the declaration (labels and features).
        data: table name -> pandas/polars/pyarrow frame, DuckDB relation, or Parquet/CSV path
            or glob; overrides each table's ``path``.
        provenance: add ``<name>__time`` and ``<name>__known_at`` after each latest feature.
        engine: ``"duckdb"`` (in-process) or ``"spark"`` (needs ``spark=`` session), or an
            engine object configured by hand, e.g. ``SparkEngine(spark, asof="native")``.
        memory_limit: DuckDB memory limit such as ``"2GB"``; larger builds spill to disk.
        temp_dir: where DuckDB spills.
        threads: DuckDB worker threads (default: all cores).
        spark: a SparkSession for ``engine="spark"``.
        connection: an existing DuckDB connection to run in.

    Returns:
        A lazy TrainingSet: ``to_pandas()``, ``to_polars()``, ``to_arrow()``,
        ``write_parquet()``, ``sql``, ``len()``.

    Example:
        >>> import pandas as pd, asof_join as aj
        >>> customer = aj.Entity("customer", keys=["customer_id"])
        >>> orders = aj.EventTable("orders", time="at", entities=[customer])
        >>> tiers = aj.EventTable("tiers", time="at", entities=[customer])
        >>> spec = aj.TrainingSetSpec(labels=orders, features=[aj.Latest(tiers, ["tier"])])
        >>> at = pd.to_datetime(["2024-01-02", "2024-01-05"])
        >>> o = pd.DataFrame({"customer_id": [1, 1], "at": at})
        >>> t = pd.DataFrame({"customer_id": [1, 1], "tier": ["seed", "bloom"],
        ...                   "at": pd.to_datetime(["2024-01-01", "2024-01-05"])})
        >>> aj.build(spec, data={"orders": o, "tiers": t}).to_pandas()["tier"].tolist()
        ['seed', 'seed']
    """
    if not isinstance(spec, TrainingSetSpec):
        from .errors import SpecError

        msg = f"build() needs a TrainingSetSpec (or aj.load_spec(path)), got {type(spec).__name__}"
        raise SpecError(msg)
    check_bindings(spec, data)
    bound: dict[str, object] = {}
    for name, table in spec.tables().items():
        bound[name] = (data or {}).get(name, table.path)
    options: dict[str, Any] = {}
    if engine == "spark":
        options["spark"] = spark
    else:
        options.update(
            memory_limit=memory_limit, temp_dir=temp_dir, threads=threads, connection=connection
        )
    runner = get_engine(engine, **options) if isinstance(engine, str) else engine
    schemas = runner.bind(bound)
    checked = check_inputs(spec, schemas, provenance=provenance)
    plan = make_plan(
        spec,
        checked.times,
        checked.label_columns,
        provenance=provenance,
        aware=checked.aware,
        integer_columns=checked.integer_columns,
    )
    runner.check_null_times(plan)
    return TrainingSet(spec, plan, runner, runner.run(plan))
