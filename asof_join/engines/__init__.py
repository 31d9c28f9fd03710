"""Engine protocol and registry: engines load by name on first use."""

from __future__ import annotations

import enum
import importlib
from collections.abc import Mapping
from typing import TYPE_CHECKING, Any, Protocol

from ..errors import SpecError

if TYPE_CHECKING:
    import pyarrow as pa

    from ..plan import Plan


class EngineName(str, enum.Enum):
    """The engines build() can run on."""

    DUCKDB = "duckdb"
    SPARK = "spark"


_REGISTRY: dict[str, str] = {
    EngineName.DUCKDB.value: "asof_join.engines.duckdb:DuckDBEngine",
    EngineName.SPARK.value: "asof_join.engines.spark:SparkEngine",
}


class Result(Protocol):
    """A built training set as an engine holds it (lazy until read)."""

    sql: str

    def arrow(self) -> pa.Table: ...
    def count(self) -> int: ...
    def write_parquet(self, path: str, metadata: Mapping[str, str]) -> None: ...
    def write_csv(self, path: str) -> None: ...


class Engine(Protocol):
    """Binds data, reads schemas, runs row checks, renders and runs a plan."""

    name: str

    def bind(self, tables: Mapping[str, object]) -> dict[str, pa.Schema]: ...
    def check_null_times(self, plan: Plan) -> None: ...
    def render(self, plan: Plan) -> tuple[str, dict[str, object]]: ...
    def run(self, plan: Plan) -> Result: ...


def get_engine(name: str, **options: Any) -> Engine:
    """Load an engine by name; unknown names are a SpecError listing the known ones."""
    target = _REGISTRY.get(str(getattr(name, "value", name)))
    if target is None:
        msg = f"unknown engine {name!r}; choose one of {sorted(_REGISTRY)}"
        raise SpecError(msg)
    module_name, cls_name = target.split(":")
    module = importlib.import_module(module_name)
    engine: Engine = getattr(module, cls_name)(**options)
    return engine
