"""The declaration: construction, YAML/JSON round trips, fingerprints, durations, JSON Schema."""

from __future__ import annotations

import datetime as dt
import json
import subprocess
import sys
from pathlib import Path

import pytest
import yaml
from hypothesis import given
from hypothesis import strategies as st

import asof_join as aj
from asof_join.durations import format_duration, parse_duration
from asof_join.spec_file import SpecDocument

SPECS = sorted((Path(__file__).parent / "fixtures" / "specs").glob("*.yaml"))
NURSERY = Path(__file__).parent / "fixtures" / "specs" / "nursery.yaml"


def _contract_example() -> aj.TrainingSetSpec:
    customer = aj.Entity("customer", keys=["customer_id"])
    plant = aj.Entity("plant", keys=["plant_id"])
    orders = aj.EventTable("orders", time="ordered_at", entities=[customer, plant])
    profiles = aj.EventTable(
        "profiles", time="updated_at", known_at="loaded_at", entities=[customer]
    )
    prices = aj.EventTable("prices", time="effective_at", delay="1h", entities=[plant])
    views = aj.EventTable("views", time="viewed_at", entities={"customer": ["buyer_id"]})
    return aj.TrainingSetSpec(
        labels=orders,
        features=[
            aj.Latest(profiles, ["tier", "region"], max_age="365d"),
            aj.Latest(prices, ["price"], prefix="plant_"),
            aj.Trailing(views, None, "count", over="7d", name="views_7d"),
            aj.Trailing(orders, "amount", "sum", over="30d", entity=customer, name="spend_30d"),
        ],
    )


def test_contract_example_output_names() -> None:
    spec = _contract_example()
    assert spec.output_columns() == ["tier", "region", "plant_price", "views_7d", "spend_30d"]
    assert spec.join_keys(spec.features[2]) == (("customer_id",), ("buyer_id",))
    assert spec.join_keys(spec.features[3]) == (("customer_id",), ("customer_id",))


@pytest.mark.parametrize("path", SPECS, ids=lambda p: p.name)
def test_yaml_round_trip(path: Path, tmp_path: Path) -> None:
    spec = aj.load_spec(path)
    again = tmp_path / "again.yaml"
    again.write_text(spec.to_yaml())
    assert aj.load_spec(again) == spec
    as_json = tmp_path / "again.json"
    as_json.write_text(spec.to_json())
    assert aj.load_spec(as_json) == spec


def test_python_spec_round_trips_through_yaml(tmp_path: Path) -> None:
    spec = _contract_example()
    path = tmp_path / "spec.yaml"
    path.write_text(spec.to_yaml())
    loaded = aj.load_spec(path)
    assert loaded.fingerprint() == spec.fingerprint()
    assert loaded.to_document() == spec.to_document()


def test_fingerprint_ignores_key_order_and_paths(tmp_path: Path) -> None:
    doc = yaml.safe_load(NURSERY.read_text())
    shuffled = {k: doc[k] for k in reversed(list(doc))}
    shuffled["tables"] = {k: dict(reversed(list(v.items()))) for k, v in doc["tables"].items()}
    shuffled["tables"]["orders"]["path"] = "elsewhere/orders.parquet"
    path = tmp_path / "shuffled.yaml"
    path.write_text(yaml.safe_dump(shuffled))
    assert aj.load_spec(path).fingerprint() == aj.load_spec(NURSERY).fingerprint()


def test_fingerprint_changes_with_semantics(tmp_path: Path) -> None:
    doc = yaml.safe_load(NURSERY.read_text())
    doc["features"][0]["max_age"] = "364d"
    path = tmp_path / "changed.yaml"
    path.write_text(yaml.safe_dump(doc))
    assert aj.load_spec(path).fingerprint() != aj.load_spec(NURSERY).fingerprint()


def test_fingerprint_is_stable_across_processes() -> None:
    code = f"import asof_join as aj, sys; print(aj.load_spec({str(NURSERY)!r}).fingerprint())"
    runs = {
        subprocess.run(
            [sys.executable, "-c", code],
            capture_output=True,
            text=True,
            check=True,
            env={"PYTHONHASHSEED": seed},
        ).stdout.strip()
        for seed in ("0", "1", "12345")
    }
    assert runs == {aj.load_spec(NURSERY).fingerprint()}


def test_specs_are_frozen() -> None:
    spec = _contract_example()
    with pytest.raises(Exception, match="frozen"):
        spec.timezone = "UTC"  # type: ignore[misc]


def test_relative_paths_resolve_against_the_spec_file(tmp_path: Path) -> None:
    (tmp_path / "sub").mkdir()
    path = tmp_path / "sub" / "spec.yaml"
    path.write_text(
        "entities: {customer: [customer_id]}\n"
        "tables:\n  orders: {time: at, entities: [customer], path: data/orders.parquet}\n"
        "labels: orders\n"
    )
    assert aj.load_spec(path).labels.path == str(tmp_path / "sub" / "data" / "orders.parquet")


def test_json_schema_describes_the_file_format() -> None:
    schema = aj.spec_json_schema()
    json.dumps(schema)
    assert set(schema["required"]) >= {"tables", "labels"}
    for path in SPECS:
        SpecDocument.model_validate(yaml.safe_load(path.read_text()))


@pytest.mark.parametrize(
    ("text", "expected"),
    [
        ("90s", dt.timedelta(seconds=90)),
        ("15m", dt.timedelta(minutes=15)),
        ("36h", dt.timedelta(hours=36)),
        ("7d", dt.timedelta(days=7)),
        ("P7D", dt.timedelta(days=7)),
        ("PT1H30M", dt.timedelta(minutes=90)),
    ],
)
def test_contract_duration_forms(text: str, expected: dt.timedelta) -> None:
    assert parse_duration(text) == expected


@given(st.timedeltas(min_value=dt.timedelta(0), max_value=dt.timedelta(days=5000)))
def test_duration_format_round_trips(value: dt.timedelta) -> None:
    assert parse_duration(format_duration(value)) == value
