"""The Spark engine gives the DuckDB engine's results: generated cases, the demo, time zones."""

from __future__ import annotations

import json
import os
import re
from collections.abc import Iterator
from pathlib import Path
from typing import Any

import numpy as np
import pandas as pd
import pyarrow as pa
import pyarrow.parquet as pq
import pytest

import asof_join as aj
from asof_join.demo import make_demo_data
from tests.compare import assert_frames_match
from tests.strategies import CaseRecipe, NumpyDraw, build_spec, make_data, make_recipe

pytestmark = pytest.mark.spark
pytest.importorskip("pyspark")

#: Generated specs per test, and independent data sets per spec (batched into one Spark build)
CONFIGS = int(os.environ.get("ASOF_JOIN_SPARK_CONFIGS", "12"))
PER_CONFIG = int(os.environ.get("ASOF_JOIN_SPARK_PER_CONFIG", "10"))
NURSERY = aj.load_spec(Path(__file__).parent / "fixtures" / "specs" / "nursery.yaml")


def _spark_engine(spark: Any) -> Any:
    from asof_join.engines.spark import SparkEngine

    return SparkEngine(spark)


def _batches(seed: int, configs: int, per_config: int, **options: Any) -> Iterator[Any]:
    """Specs from the property tests' generator, each with `per_config` data sets in one input.

    The data sets use disjoint integer keys, so one build over their union is `per_config`
    independent cases (the contract's semantics are per key); both engines get the same union.
    """
    rng = np.random.default_rng(seed)
    for _ in range(configs):
        draw = NumpyDraw(rng)
        recipe = make_recipe(draw, **options)
        parts = [make_data(draw, recipe, key_offset=100 * (k + 1)) for k in range(per_config)]
        union = {n: pd.concat([p[n] for p in parts], ignore_index=True) for n in parts[0]}
        cases = sum(len(p[recipe.labels.name]) > 0 for p in parts)
        yield recipe, union, bool(rng.integers(0, 2)), cases


def _same_on_both(spark: Any, recipe: CaseRecipe, data: dict[str, Any], provenance: bool) -> None:
    spec = build_spec(recipe)
    try:
        expected = aj.build(spec, data=data, provenance=provenance).to_pandas()
    except aj.AsofJoinError as err:
        with pytest.raises(type(err), match=re.escape(str(err))):
            aj.build(spec, data=data, provenance=provenance, engine=_spark_engine(spark))
        return
    train = aj.build(spec, data=data, provenance=provenance, engine=_spark_engine(spark))
    assert_frames_match(train.to_pandas(), expected, context=f"provenance={provenance}\n{recipe}")


@pytest.mark.parametrize(
    ("seed", "options"),
    [
        (1, {"latest": True, "trailing": False}),
        (2, {"latest": True, "trailing": True}),
        (3, {"latest": True, "trailing": True, "time_kinds": True}),
    ],
    ids=["latest", "trailing", "time_kinds"],
)
def test_generated_cases_equal_duckdb(spark: Any, seed: int, options: dict[str, bool]) -> None:
    """CONFIGS x PER_CONFIG (default 120 per test) generated cases: values, nulls, order."""
    checked = 0
    for recipe, union, provenance, cases in _batches(seed, CONFIGS, PER_CONFIG, **options):
        _same_on_both(spark, recipe, union, provenance)
        checked += cases
    assert checked >= CONFIGS * PER_CONFIG // 2


@pytest.mark.parametrize("name", ['a"b', "a`b", "x; drop table y", "select", "with space", "plänt"])
def test_backtick_quoting_round_trips(spark: Any, name: str) -> None:
    from asof_join.engines.sql import literal_backslash, quote_ident_backtick

    value = "it's \\ a `test`"
    frame = spark.sql(f"SELECT {literal_backslash(value)} AS {quote_ident_backtick(name)}")
    assert frame.columns == [name]
    assert frame.collect()[0][0] == value


@pytest.fixture(scope="module")
def demo() -> dict[str, pa.Table]:
    data = make_demo_data(n_orders=3_000, seed=5)
    return {name: table for name, table in data.items() if name in NURSERY.tables()}


def test_demo_equals_duckdb(spark: Any, demo: dict[str, pa.Table]) -> None:
    expected = aj.build(NURSERY, data=demo, provenance=True).to_pandas()
    train = aj.build(NURSERY, data=demo, provenance=True, engine="spark", spark=spark)
    assert_frames_match(train.to_pandas(), expected)
    assert len(train) == len(expected)


def test_demo_from_files_equals_duckdb(
    spark: Any, demo: dict[str, pa.Table], tmp_path: Path
) -> None:
    """Parquet files, a two-file glob (read in name order) and a CSV file."""
    data: dict[str, object] = {}
    for name, table in demo.items():
        if name == "orders":
            # shuffled rows across three files: label order is file name, then row in the file
            folder = tmp_path / name
            folder.mkdir()
            third = table.num_rows // 3
            for i, (lo, hi) in enumerate([(0, third), (third, 2 * third), (2 * third, None)]):
                part = table.slice(lo, None if hi is None else hi - lo)
                pq.write_table(part, folder / f"part-{i}.parquet", row_group_size=400)
            data[name] = str(folder / "*.parquet")
        elif name == "views":
            path = tmp_path / "views.csv"
            table.to_pandas().to_csv(path, index=False)
            data[name] = str(path)
        else:
            path = tmp_path / f"{name}.parquet"
            pq.write_table(table, path, row_group_size=500)
            data[name] = str(path)
    expected = aj.build(NURSERY, data=data).to_pandas()
    got = aj.build(NURSERY, data=data, engine="spark", spark=spark).to_pandas()
    assert_frames_match(got, expected)


def test_spark_dataframes_and_table_names(spark: Any, demo: dict[str, pa.Table]) -> None:
    from pyspark.sql.pandas.types import from_arrow_schema

    def frame(table: pa.Table) -> Any:
        # naive times stay naive (TIMESTAMP_NTZ); one partition keeps the input order
        return spark.createDataFrame(table, schema=from_arrow_schema(table.schema)).coalesce(1)

    expected = aj.build(NURSERY, data=demo).to_pandas()
    data: dict[str, object] = dict(demo)
    data["orders"] = frame(demo["orders"])
    frame(demo["prices"]).createOrReplaceTempView("aj_test_prices")
    data["prices"] = "aj_test_prices"
    train = aj.build(NURSERY, data=data, engine="spark", spark=spark)
    assert_frames_match(train.to_pandas(), expected)
    assert len(train) == len(expected)


def _zoned(zone_labels: str | None, zone_rows: str | None) -> dict[str, pd.DataFrame]:
    """The same instants, written naive (UTC wall clock) or aware in the given zones."""
    base = pd.Timestamp("2024-03-30 22:00")  # a daylight saving change in Paris follows
    t = [base + pd.Timedelta(hours=h) for h in (1, 3, 5, 7, 30)]
    s = [base + pd.Timedelta(hours=h) for h in (0, 1, 3, 4, 6, 29)]

    def column(values: list[pd.Timestamp], zone: str | None) -> pd.Series:
        series = pd.Series(values, dtype="datetime64[us]")
        if zone is None:
            return series
        return series.dt.tz_localize("UTC").dt.tz_convert(zone)

    labels = pd.DataFrame({"k": [1, 1, 1, 2, 1], "t": column(t, zone_labels)})
    rows = pd.DataFrame(
        {"k": [1, 1, 1, 2, 1, 1], "s": column(s, zone_rows), "v": [1.0, None, 3.0, 4.0, 5.0, 6.0]}
    )
    return {"labels": labels, "rows": rows}


def _zone_spec(timezone: str | None = None) -> aj.TrainingSetSpec:
    key = aj.Entity("key", keys=["k"])
    labels = aj.EventTable("labels", time="t", entities=[key])
    rows = aj.EventTable("rows", time="s", entities=[key])
    features = [
        aj.Latest(rows, ["v"], max_age="2h"),
        aj.Trailing(rows, "v", "mean", over="3h", name="v_mean"),
    ]
    return aj.TrainingSetSpec(labels=labels, features=features, timezone=timezone)


@pytest.mark.parametrize(
    ("zone_labels", "zone_rows", "timezone"),
    [
        (None, None, None),
        ("UTC", "UTC", None),
        ("Asia/Kolkata", "Europe/Paris", None),
        (None, "Europe/Paris", "UTC"),
    ],
)
def test_naive_and_aware_inputs_agree(
    spark: Any, zone_labels: str | None, zone_rows: str | None, timezone: str | None
) -> None:
    data = _zoned(zone_labels, zone_rows)
    spec = _zone_spec(timezone)
    expected = aj.build(spec, data=data, provenance=True).to_pandas()
    got = aj.build(spec, data=data, provenance=True, engine="spark", spark=spark).to_pandas()
    assert_frames_match(got, expected)
    # the same instants give the same features, whichever way they are written
    naive = aj.build(_zone_spec(), data=_zoned(None, None)).to_pandas()
    assert got["v"].tolist() == pytest.approx(naive["v"].tolist(), nan_ok=True)
    assert got["v_mean"].tolist() == pytest.approx(naive["v_mean"].tolist(), nan_ok=True)
    aware = zone_labels is not None or zone_rows is not None
    assert (got["v__time"].dt.tz is not None) == aware


def test_hostile_names(spark: Any) -> None:
    key, time, value, known = 'cust"id; drop', "when `select`", "tïer 'x'", "loaded at;--"
    who = aj.Entity("cüstomer", keys=[key])
    labels = aj.EventTable('or"ders; --', time=time, entities=[who])
    feats = aj.EventTable("pröfiles `p`", time=time, known_at=known, entities=[who])
    spec = aj.TrainingSetSpec(
        labels=labels,
        features=[
            aj.Latest(feats, [value], prefix='p"`; '),
            aj.Trailing(feats, value, "count_distinct", over="3d", name="n dist; select"),
            aj.Trailing(feats, value, "min", over="3d", name="a.b"),
        ],
    )
    lab = pd.DataFrame(
        {key: [1, 1, 2], time: pd.to_datetime(["2024-01-03", "2024-01-10", "2024-01-03"])}
    )
    src = pd.DataFrame(
        {
            key: [1, 1, 2],
            time: pd.to_datetime(["2024-01-01", "2024-01-05", "2024-01-02"]),
            known: pd.to_datetime(["2024-01-02", "2024-01-06", "2024-01-04"]),
            value: ["seed", "bl'oom\\", "sprout"],
        }
    )
    data = {'or"ders; --': lab, "pröfiles `p`": src}
    expected = aj.build(spec, data=data).to_pandas()
    got = aj.build(spec, data=data, engine="spark", spark=spark).to_pandas()
    assert_frames_match(got, expected)
    assert got[f'p"`; {value}'].tolist()[:2] == ["seed", "bl'oom\\"]


def test_null_times_fail_as_in_duckdb(spark: Any) -> None:
    spec = _zone_spec()
    data = _zoned(None, None)
    data["labels"].loc[[1, 3], "t"] = pd.NaT
    with pytest.raises(aj.NullTimeError) as duck:
        aj.build(spec, data=data)
    with pytest.raises(aj.NullTimeError, match=re.escape(str(duck.value))):
        aj.build(spec, data=data, engine="spark", spark=spark)


def test_to_spark_and_write_parquet(spark: Any, demo: dict[str, pa.Table], tmp_path: Path) -> None:
    train = aj.build(NURSERY, data=demo, engine="spark", spark=spark)
    frame = train.to_spark()
    assert frame.columns == train.columns
    out = tmp_path / "train.parquet"
    train.write_parquet(out)
    meta = json.loads((out / "_asof_join.json").read_text())
    assert meta["asof_join.fingerprint"] == NURSERY.fingerprint() == train.fingerprint
    # part files in name order are label order
    parts = sorted(out.glob("part-*.parquet"))
    back = pa.concat_tables([pq.read_table(p) for p in parts]).to_pandas()
    expected = aj.build(NURSERY, data=demo).to_pandas()
    assert_frames_match(back, expected)
    with pytest.raises(aj.UnsupportedByEngineError, match="engine='spark'"):
        aj.build(NURSERY, data=demo).to_spark()


def test_printed_sql_runs_in_spark(spark: Any, demo: dict[str, pa.Table], tmp_path: Path) -> None:
    """`asof-join sql SPEC --engine spark` prints a script that spark.sql runs to the same rows."""
    from asof_join.cli import main

    spec_text = (Path(__file__).parent / "fixtures" / "specs" / "nursery.yaml").read_text()
    spec_path = tmp_path / "spec.yaml"
    spec_path.write_text(spec_text)
    args = []
    for name, table in demo.items():
        pq.write_table(table, tmp_path / f"{name}.parquet")
        args += ["--data", f"{name}={tmp_path / f'{name}.parquet'}"]
    import contextlib
    import io

    buffer = io.StringIO()
    with contextlib.redirect_stdout(buffer):
        assert main(["sql", str(spec_path), "--engine", "spark", *args]) == 0
    script = buffer.getvalue()
    assert "ASOF" not in script and "QUALIFY" not in script
    statements = [s for s in script.split(";\n") if s.strip()]
    for statement in statements[:-1]:
        spark.sql(statement)
    got = spark.sql(statements[-1].rstrip().rstrip(";")).toArrow().to_pandas()
    expected = aj.build(NURSERY, data={n: str(tmp_path / f"{n}.parquet") for n in demo})
    want = expected.to_pandas()
    for column in NURSERY.output_columns():
        assert got[column].tolist() == pytest.approx(want[column].tolist(), nan_ok=True)
