"""SQL safety: quoting, hostile names end to end, parameters, and golden SQL per fixture spec."""

from __future__ import annotations

import os
from pathlib import Path

import pandas as pd
import pytest

import asof_join as aj
from asof_join.demo import make_demo_data
from asof_join.engines.sql import Params, literal, quote_ident

FIXTURES = Path(__file__).parent / "fixtures"
HOSTILE = ['a"b', "x; drop table y", "select", "with space", "plänt_ïd", "O'Brien", "--x"]


@pytest.mark.parametrize("name", HOSTILE)
def test_quote_ident_round_trips_through_duckdb(name: str) -> None:
    import duckdb

    con = duckdb.connect()
    con.execute(f"CREATE TABLE t ({quote_ident(name)} INTEGER)")
    con.execute("INSERT INTO t VALUES (1)")
    assert con.sql(f"SELECT {quote_ident(name)} FROM t").fetchall() == [(1,)]
    assert [c[0] for c in con.sql("SELECT * FROM t").description] == [name]


def test_quote_ident_refuses_empty_and_nul() -> None:
    with pytest.raises(ValueError, match="non-empty"):
        quote_ident("")
    with pytest.raises(ValueError, match="NUL"):
        quote_ident("a\x00b")


def test_literal_doubles_quotes() -> None:
    assert literal("it's") == "'it''s'"


def test_params_reuse_and_inline() -> None:
    p = Params()
    assert p.add(5) == "$p0"
    assert p.add("Europe/Paris") == "$p1"
    assert p.add(5) == "$p0"
    assert p.inline("x > $p0 AND z = $p1") == "x > 5 AND z = 'Europe/Paris'"


def test_hostile_names_end_to_end() -> None:
    """Table, key, time and value names with quotes, semicolons, spaces and non-ASCII."""
    key, time, value, known = 'cust"id; drop', "when select", "tïer 'x'", "loaded at;--"
    who = aj.Entity("cüstomer", keys=[key])
    labels = aj.EventTable('or"ders; --', time=time, entities=[who])
    feats = aj.EventTable("pröfiles 'p'", time=time, known_at=known, entities=[who])
    spec = aj.TrainingSetSpec(
        labels=labels,
        features=[
            aj.Latest(feats, [value], prefix='p"; '),
            aj.Trailing(feats, value, "count_distinct", over="3d", name="n dist; select"),
        ],
    )
    times = pd.to_datetime(["2024-01-03", "2024-01-10", "2024-01-03"])
    lab = pd.DataFrame({key: [1, 1, 2], time: times})
    src = pd.DataFrame(
        {
            key: [1, 1, 2],
            time: pd.to_datetime(["2024-01-01", "2024-01-05", "2024-01-02"]),
            known: pd.to_datetime(["2024-01-02", "2024-01-06", "2024-01-04"]),
            value: ["seed", "bloom", "sprout"],
        }
    )
    out = aj.build(spec, data={'or"ders; --': lab, "pröfiles 'p'": src}).to_pandas()
    assert list(out.columns) == [key, time, f'p"; {value}', "n dist; select"]
    tiers = out[f'p"; {value}']
    assert tiers.iloc[:2].tolist() == ["seed", "bloom"] and pd.isna(tiers.iloc[2])
    assert out["n dist; select"].tolist() == [1, 0, 0]


def test_readable_sql_is_a_script_that_runs(tmp_path: Path) -> None:
    """The readable SQL runs in a fresh DuckDB once the frames its comments name are
    registered, and gives build()'s rows. A line break in a table name stays inside its
    comment (a repr); a quote and a line break in a path stay inside a string literal."""
    import duckdb
    import numpy as np
    import pyarrow as pa

    who = aj.Entity("c", keys=["k"])
    name = "l\nDROP TABLE x; --"
    labels = aj.EventTable(name, time="t", entities=[who])
    src = aj.EventTable("s", time="t", entities=[who])
    spec = aj.TrainingSetSpec(
        labels=labels,
        features=[aj.Latest(src, ["v"]), aj.Trailing(src, "v", "sum", over="3d", name="v3")],
    )
    times = pd.to_datetime(["2024-01-01", "2024-01-01", "2024-01-02"])
    rows = pd.DataFrame({"k": [1, 1, 2], "t": times, "v": [1.0, 2.0, 4.0]})
    lab = pd.DataFrame({"k": [1, 2, 3], "t": pd.to_datetime(["2024-01-03"] * 3)})
    folder = tmp_path / "a'\nSELECT 1;"
    folder.mkdir()
    rows.to_parquet(folder / "s.parquet")
    ts = aj.build(spec, data={name: lab, "s": str(folder / "s.parquet")})
    script = ts.sql
    assert f"-- {quote_ident('aj_src_0')}: table {name!r}" in script
    con = duckdb.connect()
    table = pa.Table.from_pandas(lab, preserve_index=False)
    con.register("aj_src_0", table)
    con.register("aj_pos_0", table.append_column("__aj_pos", pa.array(np.arange(3))))
    got = con.sql(script).to_arrow_table()
    assert got.equals(ts.to_arrow())
    assert got.column("v").to_pylist() == [2.0, 4.0, None]


def test_values_are_bound_not_pasted() -> None:
    """Durations and zones travel as parameters: the SQL text holds placeholders."""
    who = aj.Entity("c", keys=["k"])
    labels = aj.EventTable("l", time="t", entities=[who])
    src = aj.EventTable("s", time="t", delay="1h", entities=[who])
    spec = aj.TrainingSetSpec(labels=labels, features=[aj.Latest(src, ["v"], max_age="2d")])
    frame = pd.DataFrame({"k": [1], "t": pd.to_datetime(["2024-01-02"]), "v": [1.0]})
    ts = aj.build(spec, data={"l": frame[["k", "t"]], "s": frame})
    raw = ts._result.sql
    assert "$p0" in raw and "172800000000" not in raw
    assert "172800000000" in ts.sql  # the readable form shows the values


def _golden_data() -> dict[str, object]:
    return dict(make_demo_data(n_orders=300, seed=1))


@pytest.mark.parametrize("spec_file", sorted((FIXTURES / "specs").glob("*.yaml")), ids=str)
def test_golden_sql(spec_file: Path) -> None:
    """Each fixture spec renders to its checked-in SQL; refresh with ASOF_JOIN_UPDATE_GOLDEN=1."""
    spec = aj.load_spec(spec_file)
    data = {name: table for name, table in _golden_data().items() if name in spec.tables()}
    sql = aj.build(spec, data=data).sql + "\n"
    golden = FIXTURES / "sql" / (spec_file.stem + ".sql")
    if os.environ.get("ASOF_JOIN_UPDATE_GOLDEN") == "1" or not golden.exists():
        golden.write_text(sql, encoding="utf-8")
    assert sql == golden.read_text(encoding="utf-8"), f"golden SQL changed: {golden}"


def test_unknown_plan_step_is_refused_not_guessed() -> None:
    """A renderer without a method for a step raises UnsupportedByEngineError."""
    from asof_join.engines.render import SqlRenderer

    class NoTrailing(SqlRenderer):
        render_TrailingLookup = None  # type: ignore[assignment]  # the step is missing

    who = aj.Entity("c", keys=["k"])
    labels = aj.EventTable("l", time="t", entities=[who])
    spec = aj.TrainingSetSpec(
        labels=labels, features=[aj.Trailing(labels, None, "count", over="1d")]
    )
    frame = pd.DataFrame({"k": [1], "t": pd.to_datetime(["2024-01-02"])})
    ts = aj.build(spec, data={"l": frame})
    with pytest.raises(aj.UnsupportedByEngineError, match="TrailingLookup"):
        NoTrailing(ts.plan, ts.engine.sources).render()
