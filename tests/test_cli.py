"""Tests for the asof-join command line, run in-process through main([...])."""

from __future__ import annotations

import json
from importlib import resources
from pathlib import Path

import pandas as pd
import pyarrow as pa
import pyarrow.parquet as pq
import pytest
import yaml

import asof_join as aj
from asof_join.cli import main
from asof_join.demo import write_demo_data

N = 3_000
NURSERY = resources.files("asof_join") / "specs" / "nursery.yaml"
with resources.as_file(NURSERY) as _path:
    FEATURES = aj.load_spec(_path).output_columns()  # the list is pinned in test_demo.py


@pytest.fixture(scope="module")
def project(tmp_path_factory: pytest.TempPathFactory) -> Path:
    """A folder with the demo data in data/ and spec.yaml naming it by relative paths."""
    root = tmp_path_factory.mktemp("project")
    write_demo_data(root / "data", N, seed=1)
    doc = yaml.safe_load(NURSERY.read_text(encoding="utf-8"))
    for name, table in doc["tables"].items():
        table["path"] = f"data/{name}.parquet"
    (root / "spec.yaml").write_text(yaml.safe_dump(doc, sort_keys=False), encoding="utf-8")
    return root


def run(capsys: pytest.CaptureFixture[str], *argv: str) -> tuple[int, str, str]:
    code = main(list(argv))
    out, err = capsys.readouterr()
    return code, out, err


def same_columns(a: pa.Table, b: pa.Table) -> bool:
    """Same names, types and values (a Parquet file may mark never-null columns NOT NULL)."""
    return a.column_names == b.column_names and all(
        a.column(i).equals(b.column(i)) for i in range(a.num_columns)
    )


def assert_one_line_error(code: int, out: str, err: str, *fragments: str) -> None:
    assert code == 2
    assert out == ""
    assert err.endswith("\n")
    assert err.count("\n") == 1, err
    assert err.startswith("asof-join: error: ")
    assert "Traceback" not in err
    for fragment in fragments:
        assert fragment in err


def test_schema_prints_json_schema(capsys: pytest.CaptureFixture[str]) -> None:
    code, out, err = run(capsys, "schema")
    assert (code, err) == (0, "")
    schema = json.loads(out)
    assert schema == aj.spec_json_schema()
    assert {"tables", "labels", "features"} <= set(schema["properties"])


def test_build_parquet_from_spec_paths(
    capsys: pytest.CaptureFixture[str], project: Path, tmp_path: Path
) -> None:
    out_file = tmp_path / "train.parquet"
    code, out, err = run(capsys, "build", str(project / "spec.yaml"), "-o", str(out_file))
    assert (code, err) == (0, "")
    assert f"wrote {N:,} rows" in out
    got = pq.read_table(out_file)
    orders = pq.read_table(project / "data" / "orders.parquet")
    assert got.column_names == orders.column_names + FEATURES
    assert same_columns(got.select(orders.column_names), orders)
    # The same build through the Python API, with the tables bound by data=.
    spec = aj.load_spec(project / "spec.yaml")
    data = {name: pq.read_table(project / "data" / f"{name}.parquet") for name in spec.tables()}
    assert same_columns(got, aj.build(spec, data=data).to_arrow())
    assert got.schema.metadata[b"asof_join.fingerprint"] == spec.fingerprint().encode()


def test_build_resolves_spec_paths_from_the_spec_folder(
    capsys: pytest.CaptureFixture[str],
    project: Path,
    tmp_path: Path,
    monkeypatch: pytest.MonkeyPatch,
) -> None:
    monkeypatch.chdir(tmp_path)
    code, _, err = run(capsys, "build", str(project / "spec.yaml"), "-o", "train.parquet")
    assert (code, err) == (0, "")
    assert pq.read_metadata(tmp_path / "train.parquet").num_rows == N


def test_build_csv_with_provenance_and_options(
    capsys: pytest.CaptureFixture[str], project: Path, tmp_path: Path
) -> None:
    out_file = tmp_path / "train.csv"
    code, _, err = run(
        capsys,
        "build",
        str(project / "spec.yaml"),
        "-o",
        str(out_file),
        "--provenance",
        "--memory-limit",
        "500MB",
        "--temp-dir",
        str(tmp_path / "spill"),
        "--threads",
        "1",
    )
    assert (code, err) == (0, "")
    frame = pd.read_csv(out_file)
    assert len(frame) == N
    assert list(frame.columns[7:11]) == ["tier", "tier__time", "tier__known_at", "region"]


def test_build_data_overrides_spec(
    capsys: pytest.CaptureFixture[str], project: Path, tmp_path: Path
) -> None:
    # The packaged spec has no path: every table comes from --data.
    other = write_demo_data(tmp_path / "other", 500, seed=9)
    spec = aj.load_spec(project / "spec.yaml")
    binds = [f"--data={name}={other[name]}" for name in spec.tables()]
    with resources.as_file(NURSERY) as nursery:
        code, out, err = run(
            capsys, "build", str(nursery), "-o", str(tmp_path / "t.parquet"), *binds
        )
    assert (code, err) == (0, "")
    assert "wrote 500 rows" in out
    # One override on top of the spec's own paths.
    code, out, err = run(
        capsys,
        "build",
        str(project / "spec.yaml"),
        "-o",
        str(tmp_path / "u.parquet"),
        "--data",
        f"orders={other['orders']}",
    )
    assert (code, err) == (0, "")
    assert "wrote 500 rows" in out


def test_missing_spec_file_exits_2(capsys: pytest.CaptureFixture[str], tmp_path: Path) -> None:
    missing = tmp_path / "nope.yaml"
    code, out, err = run(capsys, "build", str(missing), "-o", str(tmp_path / "t.parquet"))
    assert_one_line_error(code, out, err, "nope.yaml")
    code, out, err = run(capsys, "sql", str(missing))
    assert_one_line_error(code, out, err, "nope.yaml")


def test_invalid_spec_exits_2(capsys: pytest.CaptureFixture[str], tmp_path: Path) -> None:
    bad = tmp_path / "bad.yaml"
    bad.write_text(
        "version: 1\nentities: {c: [c_id]}\n"
        "tables: {a: {time: t, entities: [c]}}\n"
        "labels: a\nfeatures:\n  - latest: b\n    columns: [x]\n  - latest: z\n    columns: [y]\n",
        encoding="utf-8",
    )
    code, out, err = run(capsys, "build", str(bad), "-o", str(tmp_path / "t.parquet"))
    assert_one_line_error(code, out, err, "'b'", "'z'")


def test_unbound_table_exits_2(capsys: pytest.CaptureFixture[str], tmp_path: Path) -> None:
    with resources.as_file(NURSERY) as nursery:
        code, out, err = run(capsys, "build", str(nursery), "-o", str(tmp_path / "t.parquet"))
    assert_one_line_error(code, out, err, "orders")


def test_bad_options_exit_2(
    capsys: pytest.CaptureFixture[str], project: Path, tmp_path: Path
) -> None:
    spec = str(project / "spec.yaml")
    code, out, err = run(capsys, "build", spec, "-o", str(tmp_path / "t.json"))
    assert_one_line_error(code, out, err, "t.json", ".parquet or *.csv")
    code, out, err = run(capsys, "build", spec, "-o", str(tmp_path / "t.csv"), "--data", "orders")
    assert_one_line_error(code, out, err, "NAME=PATH", "'orders'")
    code, out, err = run(capsys, "demo", str(tmp_path), "--orders", "0")
    assert_one_line_error(code, out, err, "--orders")
    with pytest.raises(SystemExit) as exc:  # argparse's own usage errors also exit 2
        main(["build", spec])
    assert exc.value.code == 2
    capsys.readouterr()


def test_sql_prints_the_compiled_sql(capsys: pytest.CaptureFixture[str], project: Path) -> None:
    code, out, err = run(capsys, "sql", str(project / "spec.yaml"))
    assert (code, err) == (0, "")
    assert "SELECT" in out.upper()
    assert '"loaded_at"' in out
    spec = aj.load_spec(project / "spec.yaml")
    data = {name: table.path for name, table in spec.tables().items()}
    assert out.strip() == aj.build(spec, data=data).sql.strip()


def test_demo(capsys: pytest.CaptureFixture[str], tmp_path: Path) -> None:
    code, out, err = run(capsys, "demo", str(tmp_path / "demo"), "--orders", str(N), "--seed", "2")
    assert (code, err) == (0, "")
    lines = out.splitlines()
    assert len(lines) <= 24
    assert lines[-1] == f"data: {tmp_path / 'demo'} (with train.parquet)"
    assert max(map(len, lines[:-1])) <= 100
    assert f"{N:,} rows" in out
    assert "from the future" in out
    for name in FEATURES:
        assert any(line.strip().startswith(name + " ") for line in lines), name
    written = sorted(p.name for p in (tmp_path / "demo").iterdir())
    assert written == sorted(
        [f"{t}.parquet" for t in ("customers", "orders", "profiles", "prices", "stock")]
        + ["views.parquet", "returns.parquet", "train.parquet"]
    )
    assert pq.read_metadata(tmp_path / "demo" / "train.parquet").num_rows == N


def test_demo_in_a_temp_dir(capsys: pytest.CaptureFixture[str]) -> None:
    code, out, err = run(capsys, "demo", "--orders", "800")
    assert (code, err) == (0, "")
    assert "800 rows" in out
    assert "removed" in out
