"""One case per foreseeable mistake: the error class, and a message naming table/column/value."""

from __future__ import annotations

import datetime as dt
import re
from pathlib import Path

import duckdb
import pandas as pd
import pyarrow as pa
import pytest

import asof_join as aj

customer = aj.Entity("customer", keys=["customer_id"])
plant = aj.Entity("plant", keys=["plant_id"])


def _orders() -> pd.DataFrame:
    return pd.DataFrame(
        {
            "order_id": [1, 2, 3],
            "customer_id": [10, 11, 10],
            "plant_id": [5, 5, 6],
            "ordered_at": pd.to_datetime(["2024-03-01", "2024-03-02", "2024-03-05"]),
        }
    )


def _profiles() -> pd.DataFrame:
    return pd.DataFrame(
        {
            "customer_id": [10, 11],
            "updated_at": pd.to_datetime(["2024-02-01", "2024-02-03"]),
            "loaded_at": pd.to_datetime(["2024-02-02", "2024-02-04"]),
            "tier": ["seed", "bloom"],
        }
    )


ORDERS = aj.EventTable("orders", time="ordered_at", entities=[customer, plant])
PROFILES = aj.EventTable("profiles", time="updated_at", known_at="loaded_at", entities=[customer])
SPEC = aj.TrainingSetSpec(labels=ORDERS, features=[aj.Latest(PROFILES, ["tier"])])


def _build(spec: aj.TrainingSetSpec = SPEC, **data: object) -> aj.TrainingSet:
    bound: dict[str, object] = {"orders": _orders(), "profiles": _profiles()}
    bound.update(data)
    return aj.build(spec, data=bound)


# -- declaration mistakes (SpecError) ------------------------------------------------------


def test_bad_duration_names_value() -> None:
    with pytest.raises(aj.SpecError, match=re.escape("'7x'")):
        aj.Latest(PROFILES, ["tier"], max_age="7x")


def test_negative_delay() -> None:
    with pytest.raises(aj.SpecError, match="negative"):
        aj.EventTable("prices", time="effective_at", delay="-1h", entities=[plant])


def test_known_at_and_delay_together() -> None:
    with pytest.raises(aj.SpecError, match=r"'prices'.*both known_at"):
        aj.EventTable("prices", time="t", known_at="k", delay="1h", entities=[plant])


def test_duplicate_output_names_name_both_features() -> None:
    prices = aj.EventTable("prices", time="effective_at", entities=[plant])
    expected = r"Latest\('prices'.*Latest\('profiles'.*both output 'tier'"
    with pytest.raises(aj.SpecError, match=expected):
        aj.TrainingSetSpec(
            labels=ORDERS,
            features=[aj.Latest(PROFILES, ["tier"]), aj.Latest(prices, ["tier"])],
        )


def test_feature_named_like_label_key() -> None:
    with pytest.raises(aj.SpecError, match=re.escape("'customer_id'")):
        aj.TrainingSetSpec(
            labels=ORDERS, features=[aj.Latest(PROFILES, ["tier"], name="customer_id")]
        )


def test_feature_named_like_any_label_column_found_in_data() -> None:
    spec = aj.TrainingSetSpec(
        labels=ORDERS, features=[aj.Latest(PROFILES, ["tier"], name="order_id")]
    )
    with pytest.raises(aj.SpecError, match=r"'order_id'.*label table 'orders'"):
        _build(spec)


def test_name_with_several_columns() -> None:
    with pytest.raises(aj.SpecError, match="prefix="):
        aj.Latest(PROFILES, ["tier", "region"], name="x")


def test_unknown_entity_on_feature() -> None:
    with pytest.raises(aj.SpecError, match=r"entity='plant'.*'profiles'"):
        aj.TrainingSetSpec(labels=ORDERS, features=[aj.Latest(PROFILES, ["tier"], entity="plant")])


def test_two_tables_one_name() -> None:
    other = aj.EventTable("profiles", time="changed_at", entities=[customer])
    with pytest.raises(aj.SpecError, match="two different tables are named 'profiles'"):
        aj.TrainingSetSpec(
            labels=ORDERS,
            features=[aj.Latest(PROFILES, ["tier"]), aj.Latest(other, ["region"])],
        )


def test_trailing_without_column_needs_count() -> None:
    with pytest.raises(aj.SpecError, match="needs a column"):
        aj.Trailing(PROFILES, None, "sum", over="7d")


def test_unknown_aggregate() -> None:
    with pytest.raises(aj.SpecError, match="agg"):
        aj.Trailing(PROFILES, "tier", "median", over="7d")


def test_zero_window() -> None:
    with pytest.raises(aj.SpecError, match="positive"):
        aj.Trailing(PROFILES, "tier", "count", over="0s")


def test_unknown_timezone() -> None:
    with pytest.raises(aj.SpecError, match=re.escape("'Mars/Olympus'")):
        aj.TrainingSetSpec(labels=ORDERS, features=[], timezone="Mars/Olympus")


def test_label_table_cannot_skip_rows() -> None:
    labels = aj.EventTable("orders", time="ordered_at", entities=[customer], null_times="skip")
    with pytest.raises(aj.SpecError, match="never dropped"):
        aj.TrainingSetSpec(labels=labels, features=[])


def test_extra_key_in_spec_file_is_an_error(tmp_path: Path) -> None:
    path = tmp_path / "spec.yaml"
    path.write_text(
        "tables:\n  orders: {time: at, entities: [customer], tim_zone: x}\nlabels: orders\n"
        "entities: {customer: [customer_id]}\n"
    )
    with pytest.raises(aj.SpecError, match="tim_zone"):
        aj.load_spec(path)


def test_spec_file_unknown_table_in_feature(tmp_path: Path) -> None:
    path = tmp_path / "spec.yaml"
    path.write_text(
        "entities: {customer: [customer_id]}\n"
        "tables:\n  orders: {time: at, entities: [customer]}\nlabels: orders\n"
        "features:\n  - latest: profils\n    columns: [tier]\n"
    )
    with pytest.raises(aj.SpecError, match="'profils'"):
        aj.load_spec(path)


def test_missing_spec_file() -> None:
    with pytest.raises(aj.SpecError, match="cannot read spec file"):
        aj.load_spec("/nonexistent/spec.yaml")


def test_unknown_engine() -> None:
    with pytest.raises(aj.SpecError, match="unknown engine 'sparkle'"):
        aj.build(SPEC, data={"orders": _orders(), "profiles": _profiles()}, engine="sparkle")


# -- data mistakes (InputError) -------------------------------------------------------------


def test_missing_known_at_column_suggests_fix() -> None:
    table = aj.EventTable("profiles", time="updated_at", known_at="loded_at", entities=[customer])
    spec = aj.TrainingSetSpec(labels=ORDERS, features=[aj.Latest(table, ["tier"])])
    with pytest.raises(aj.ColumnNotFoundError, match=r"'profiles'.*'loded_at'.*'loaded_at'"):
        _build(spec)


def test_missing_time_column() -> None:
    with pytest.raises(aj.ColumnNotFoundError, match=r"'orders'.*'ordered_at'"):
        _build(orders=_orders().drop(columns="ordered_at"))


def test_missing_feature_column() -> None:
    spec = aj.TrainingSetSpec(labels=ORDERS, features=[aj.Latest(PROFILES, ["tierr"])])
    with pytest.raises(aj.ColumnNotFoundError, match=r"'tierr'.*Did you mean 'tier'"):
        _build(spec)


def test_missing_key_column_in_feature_table() -> None:
    with pytest.raises(aj.ColumnNotFoundError, match=r"'profiles'.*'customer_id'"):
        _build(profiles=_profiles().rename(columns={"customer_id": "cust"}))


def test_missing_join_key_on_label_table() -> None:
    with pytest.raises(aj.ColumnNotFoundError, match=r"'orders'.*'customer_id'"):
        _build(orders=_orders().drop(columns="customer_id"))


def test_key_type_mismatch_names_both_tables() -> None:
    profiles = _profiles().assign(customer_id=["10", "11"])
    with pytest.raises(aj.KeyTypeMismatchError, match=r"'orders'.*'customer_id'.*'profiles'"):
        _build(profiles=profiles)


def test_time_column_not_a_timestamp() -> None:
    orders = _orders().assign(ordered_at=["2024-03-01", "2024-03-02", "2024-03-05"])
    with pytest.raises(aj.TimeTypeError, match=r"'orders'.*'ordered_at'.*not a timestamp"):
        _build(orders=orders)


def test_naive_and_aware_mixed() -> None:
    orders = _orders()
    orders["ordered_at"] = orders["ordered_at"].dt.tz_localize("Europe/Paris")
    with pytest.raises(aj.TimeTypeError, match=r"timezone-aware.*naive.*timezone="):
        _build(orders=orders)


def test_null_label_times_report_count_and_positions() -> None:
    orders = _orders()
    orders.loc[[0, 2], "ordered_at"] = pd.NaT
    with pytest.raises(aj.NullTimeError, match=r"'orders'.*'ordered_at'.*2 null.*\[0, 2\]"):
        _build(orders=orders)


def test_null_feature_times() -> None:
    profiles = _profiles()
    profiles.loc[1, "updated_at"] = pd.NaT
    with pytest.raises(aj.NullTimeError, match=r"'profiles'.*'updated_at'.*null_times='skip'"):
        _build(profiles=profiles)


def test_unknown_table_in_data() -> None:
    with pytest.raises(aj.UnknownTableError, match=r"\['profile'\].*'profiles'"):
        aj.build(SPEC, data={"orders": _orders(), "profile": _profiles()})


def test_table_without_data() -> None:
    with pytest.raises(aj.UnknownTableError, match=r"\['profiles'\]"):
        aj.build(SPEC, data={"orders": _orders()})


def test_unreadable_path(tmp_path: Path) -> None:
    missing = tmp_path / "nope" / "*.parquet"
    with pytest.raises(aj.UnreadableInputError, match=r"'profiles'.*nope"):
        _build(profiles=str(missing))


def test_corrupt_parquet(tmp_path: Path) -> None:
    bad = tmp_path / "profiles.parquet"
    bad.write_bytes(b"this is not parquet")
    with pytest.raises(aj.UnreadableInputError, match=r"'profiles'.*Parquet"):
        _build(profiles=str(bad))


def test_unsupported_data_object() -> None:
    with pytest.raises(aj.InputError, match=r"'profiles'.*list"):
        _build(profiles=[1, 2, 3])


def test_reserved_label_column_name() -> None:
    with pytest.raises(aj.InputError, match="__aj_"):
        _build(orders=_orders().assign(__aj_row=1))


def test_errors_carry_table_column_and_value(tmp_path: Path) -> None:
    """Besides the message, an error names what was wrong as attributes, for handling code."""
    orders = _orders()
    orders.loc[[0, 2], "ordered_at"] = pd.NaT
    with pytest.raises(aj.NullTimeError) as null_times:
        _build(orders=orders)
    assert (null_times.value.table, null_times.value.column, null_times.value.value) == (
        "orders",
        "ordered_at",
        2,
    )
    with pytest.raises(aj.KeyTypeMismatchError) as keys:
        _build(profiles=_profiles().assign(customer_id=["10", "11"]))
    assert keys.value.table is not None and keys.value.column == "customer_id"
    missing = str(tmp_path / "nope.parquet")
    with pytest.raises(aj.UnreadableInputError) as unreadable:
        _build(profiles=missing)
    assert (unreadable.value.table, unreadable.value.value) == ("profiles", missing)
    with pytest.raises(aj.SpecError) as spec:
        aj.Latest(PROFILES, ["tier"], max_age="7x")
    assert (spec.value.table, spec.value.column, spec.value.value) == (None, None, None)


def test_every_error_is_a_value_error() -> None:
    for cls in (aj.SpecError, aj.InputError, aj.ColumnNotFoundError, aj.NullTimeError):
        assert issubclass(cls, aj.AsofJoinError)
        assert issubclass(cls, ValueError)


def test_no_duckdb_exception_escapes_for_mistakes() -> None:
    """A foreseeable mistake never surfaces as a raw duckdb.Error."""
    cases = [
        lambda: _build(orders=_orders().drop(columns="ordered_at")),
        lambda: _build(profiles=_profiles().assign(customer_id=["a", "b"])),
        lambda: _build(profiles="/nonexistent.parquet"),
    ]
    for case in cases:
        with pytest.raises(aj.AsofJoinError) as info:
            case()
        assert not isinstance(info.value, duckdb.Error)


def test_empty_label_table_gives_empty_result_with_columns() -> None:
    empty = _orders().iloc[0:0]
    out = _build(orders=empty).to_pandas()
    assert list(out.columns) == [*_orders().columns, "tier"]
    assert len(out) == 0


def test_empty_feature_table_gives_nulls() -> None:
    out = _build(profiles=_profiles().iloc[0:0]).to_pandas()
    assert out["tier"].isna().all()
    assert len(out) == 3


def test_timedelta_and_iso_durations_accepted() -> None:
    a = aj.Latest(PROFILES, ["tier"], max_age=dt.timedelta(days=7))
    b = aj.Latest(PROFILES, ["tier"], max_age="P7D")
    c = aj.Latest(PROFILES, ["tier"], max_age="7d")
    assert a.max_age == b.max_age == c.max_age == dt.timedelta(days=7)


def test_arrow_record_batch_reader_input() -> None:
    reader = pa.Table.from_pandas(_profiles()).to_reader()
    assert _build(profiles=reader).to_pandas()["tier"].tolist() == ["seed", "bloom", "seed"]
