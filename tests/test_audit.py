"""Tests for aj.audit: planted leaks, provenance tampering, every rule both ways, report, CLI."""

from __future__ import annotations

import datetime as dt
import json
import re
import sys
from importlib import resources
from pathlib import Path
from typing import Any

import numpy as np
import pandas as pd
import polars as pl
import pyarrow as pa
import pyarrow.compute as pc
import pyarrow.parquet as pq
import pytest
import yaml

import asof_join as aj
from asof_join.audit import Cause
from asof_join.cli import main
from asof_join.demo import make_demo_data, write_demo_data

N = 3_000
NURSERY = resources.files("asof_join") / "specs" / "nursery.yaml"
H = dt.timedelta(hours=1)


# --- fixtures and helpers ------------------------------------------------------------------


@pytest.fixture(scope="module")
def spec() -> aj.TrainingSetSpec:
    return aj.load_spec(NURSERY)


@pytest.fixture(scope="module")
def data(spec: aj.TrainingSetSpec) -> dict[str, pa.Table]:
    tables = make_demo_data(N, seed=1)
    return {name: tables[name] for name in spec.tables()}


@pytest.fixture(scope="module")
def train(spec: aj.TrainingSetSpec, data: dict[str, pa.Table]) -> pd.DataFrame:
    return aj.build(spec, data=data).to_pandas()


@pytest.fixture(scope="module")
def train_prov(spec: aj.TrainingSetSpec, data: dict[str, pa.Table]) -> pd.DataFrame:
    return aj.build(spec, data=data, provenance=True).to_pandas()


def only(report: aj.AuditReport, rule: aj.Rule, feature: str | None = None) -> aj.Finding:
    hits = [f for f in report.findings if f.rule is rule and f.feature == feature]
    assert len(hits) == 1, report
    return hits[0]


def rules(report: aj.AuditReport) -> set[tuple[str, str | None]]:
    return {(f.rule.value, f.feature) for f in report.findings}


def as_kind(frame: pd.DataFrame, kind: str) -> Any:
    table = pa.Table.from_pandas(frame, preserve_index=False)
    if kind == "polars":
        return pl.from_arrow(table)
    if kind == "arrow":
        return table
    return frame


def plant_later_values(
    train: pd.DataFrame,
    source: pa.Table,
    *,
    feature: str,
    column: str,
    key: str,
    time: str,
    share: float = 0.03,
    seed: int = 7,
) -> tuple[pd.DataFrame, set[int]]:
    """Replace ~share of a feature's values with the value of a later source row (same key,
    valid at or after the label time) that differs from the point-in-time value."""
    rng = np.random.default_rng(seed)
    src = source.to_pandas()
    by_key = {k: g.sort_values(time) for k, g in src.groupby(key)}
    out = train.copy()
    planted: set[int] = set()
    picks = rng.choice(len(train), size=int(share * len(train) * 3), replace=False)
    for pos in picks:
        if len(planted) >= int(share * len(train)):
            break
        row = train.iloc[pos]
        rows = by_key.get(row[key])
        if rows is None:
            continue
        later = rows[(rows[time] >= row["ordered_at"]) & rows[column].notna()]
        later = later[later[column] != row[feature]] if pd.notna(row[feature]) else later
        if later.empty:
            continue
        out.iat[pos, out.columns.get_loc(feature)] = later[column].iloc[rng.integers(len(later))]
        planted.add(int(pos))
    assert len(planted) >= int(0.9 * share * len(train))
    return out, planted


# --- clean sets ----------------------------------------------------------------------------


def test_clean_set_by_recomputation_is_ok(
    spec: aj.TrainingSetSpec, data: dict[str, pa.Table], train: pd.DataFrame
) -> None:
    report = aj.audit(train, spec, data=data, label="returned")
    assert report.ok
    assert report.findings == []
    assert set(report.checked.values()) == {"recomputation"}
    assert set(report.charts) == {"tier", "region", "plant_price", "in_stock"}
    chart = report.charts["plant_price"]
    assert sum(chart.flagged) == 0
    assert chart.clean[0] == 0  # nothing supplied from the label's instant or later
    assert sum(chart.clean) == int(train["plant_price"].notna().sum())


def test_clean_provenance_set_needs_no_data(
    spec: aj.TrainingSetSpec, train_prov: pd.DataFrame
) -> None:
    report = aj.audit(train_prov, spec)
    assert report.ok and report.findings == []
    assert report.checked["tier"] == "provenance"
    assert report.checked["views_7d"] == "not checked"
    assert any("not checked" in n for n in report.notes)


def test_no_provenance_and_no_data_cannot_run(
    spec: aj.TrainingSetSpec, train: pd.DataFrame
) -> None:
    with pytest.raises(aj.UnknownTableError, match=re.escape("data={'profiles'")):
        aj.audit(train, spec)


def test_frame_missing_a_feature_column(spec: aj.TrainingSetSpec, train: pd.DataFrame) -> None:
    with pytest.raises(aj.ColumnNotFoundError, match=re.escape("no column 'plant_price'")):
        aj.audit(train.drop(columns=["plant_price"]), spec)


def test_data_naming_an_undeclared_table(
    spec: aj.TrainingSetSpec, train_prov: pd.DataFrame
) -> None:
    with pytest.raises(aj.UnknownTableError, match="'pricez'"):
        aj.audit(train_prov, spec, data={"pricez": pa.table({"x": [1]})})


# --- planted leaks and value_mismatch --------------------------------------------------------


@pytest.mark.parametrize("kind", ["pandas", "polars", "arrow"])
@pytest.mark.parametrize(
    ("feature", "table", "column", "key", "time"),
    [
        ("plant_price", "prices", "price", "plant_id", "effective_at"),
        ("tier", "profiles", "tier", "customer_id", "updated_at"),
    ],
)
def test_planted_later_values_are_found_exactly(
    spec: aj.TrainingSetSpec,
    data: dict[str, pa.Table],
    train: pd.DataFrame,
    kind: str,
    feature: str,
    table: str,
    column: str,
    key: str,
    time: str,
) -> None:
    leaked, planted = plant_later_values(
        train, data[table], feature=feature, column=column, key=key, time=time
    )
    report = aj.audit(as_kind(leaked, kind), spec, data=data)
    assert not report.ok
    finding = only(report, aj.Rule.VALUE_MISMATCH, feature)
    assert finding.cause is Cause.LATER_ROW
    assert finding.severity is aj.Severity.ERROR
    assert finding.table == table
    flagged = set(finding.positions)
    precision = len(flagged & planted) / len(flagged)
    recall = len(flagged & planted) / len(planted)
    assert precision == 1.0
    assert recall >= 0.99
    assert finding.rows == len(flagged)
    assert rules(report) == {("value_mismatch", feature)}
    ex = finding.examples[0]
    assert ex["position"] == finding.positions[0]
    assert ex["later_row_time"] >= ex["label_time"]
    assert ex["supplied"] != ex["point_in_time"]
    assert set(ex["key"]) == set(spec.join_keys(spec.features[0 if feature == "tier" else 1])[0])
    chart = report.charts[feature]
    assert chart.flagged[0] == len(flagged)  # every leaked row came from t or later


def test_value_of_unknown_cause_is_a_warning(
    spec: aj.TrainingSetSpec, data: dict[str, pa.Table], train: pd.DataFrame
) -> None:
    changed = train.copy()
    rows = [5, 50, 500]
    changed.loc[rows, "plant_price"] = -1.0  # no price row ever held -1
    report = aj.audit(changed, spec, data=data)
    assert report.ok  # warnings only
    finding = only(report, aj.Rule.VALUE_MISMATCH, "plant_price")
    assert finding.cause is Cause.UNKNOWN
    assert finding.severity is aj.Severity.WARNING
    assert finding.positions == rows
    assert report.fails("warning") and not report.fails("error")
    assert report.charts["plant_price"].unplaced == 3


def test_float_tolerance_and_nan_as_null(
    spec: aj.TrainingSetSpec, data: dict[str, pa.Table], train: pd.DataFrame
) -> None:
    nudged = train.copy()
    nudged["plant_price"] = nudged["plant_price"] * (1 + 1e-12)  # within rel 1e-9: equal
    assert aj.audit(nudged, spec, data=data).findings == []
    nudged["plant_price"] = train["plant_price"] * (1 + 1e-6)  # beyond it: differs
    report = aj.audit(nudged, spec, data=data)
    assert only(report, aj.Rule.VALUE_MISMATCH, "plant_price").rows == int(
        train["plant_price"].notna().sum()
    )
    polars_nan = pl.from_pandas(train).with_columns(pl.col("plant_price").fill_null(float("nan")))
    assert aj.audit(polars_nan, spec, data=data).findings == []


def test_trailing_aggregate_counting_the_labelled_row(
    spec: aj.TrainingSetSpec, data: dict[str, pa.Table], train: pd.DataFrame
) -> None:
    leaked = train.copy()
    rows = list(range(0, N, 40))
    leaked.loc[rows, "spend_30d"] = train.loc[rows, "spend_30d"] + train.loc[rows, "amount"]
    odd = [7, 77]
    leaked.loc[odd, "spend_30d"] = train.loc[odd, "spend_30d"] * 1.5 + 1.0
    report = aj.audit(leaked, spec, data=data)
    findings = {f.cause: f for f in report.findings if f.feature == "spend_30d"}
    assert findings[Cause.NOT_YET_VISIBLE_ROWS].positions == rows
    assert findings[Cause.NOT_YET_VISIBLE_ROWS].severity is aj.Severity.ERROR
    assert findings[Cause.UNKNOWN].positions == odd
    assert findings[Cause.UNKNOWN].severity is aj.Severity.WARNING
    assert len(report.findings) == 2


def _merge_asof_case(
    exact: bool,
) -> tuple[aj.TrainingSetSpec, dict[str, pd.DataFrame], pd.DataFrame, set[int]]:
    """Labels and feature rows where ~10% of labels have a row stamped at their exact time."""
    rng = np.random.default_rng(3)
    n, keys = 600, 15
    base = pd.Timestamp("2024-01-01")
    labels = pd.DataFrame(
        {
            "user": rng.integers(0, keys, n),
            "t": base + pd.to_timedelta(rng.choice(10_000_000, n, replace=False), unit="s"),
        }
    ).sort_values("t", ignore_index=True)
    m = 900
    rows = pd.DataFrame(
        {
            "user": rng.integers(0, keys, m),
            "s": base + pd.to_timedelta(rng.choice(10_000_000, m, replace=False) + 0.5, unit="s"),
        }
    )
    rows["s"] = rows["s"].astype("datetime64[us]")
    labels["t"] = labels["t"].astype("datetime64[us]")
    ties = labels.sample(frac=0.1, random_state=1)
    rows = pd.concat([rows, ties.rename(columns={"t": "s"})], ignore_index=True)
    rows["score"] = np.arange(len(rows), dtype=float)  # every row's value is unique
    rows = rows.sort_values("s", ignore_index=True)
    train = pd.merge_asof(
        labels, rows, left_on="t", right_on="s", by="user", allow_exact_matches=exact
    ).drop(columns=["s"])
    user = aj.Entity("user", keys=["user"])
    spec = aj.TrainingSetSpec(
        labels=aj.EventTable("clicks", time="t", entities=[user]),
        features=[aj.Latest(aj.EventTable("scores", time="s", entities=[user]), ["score"])],
    )
    tie_keys = set(zip(ties["user"], ties["t"], strict=True))
    expected = {
        i
        for i, (u, t) in enumerate(zip(train["user"], train["t"], strict=True))
        if (u, t) in tie_keys
    }
    return spec, {"scores": rows}, train, expected


def test_merge_asof_with_exact_matches_is_flagged_on_exactly_those_rows() -> None:
    spec, data, train, exact_rows = _merge_asof_case(exact=True)
    assert len(exact_rows) == 60
    report = aj.audit(train, spec, data=data)
    finding = only(report, aj.Rule.VALUE_MISMATCH, "score")
    assert finding.cause is Cause.LATER_ROW
    assert set(finding.positions) == exact_rows
    assert all(ex["later_row_time"] == ex["label_time"] for ex in finding.examples)
    assert len(report.findings) == 1


def test_merge_asof_without_exact_matches_is_clean() -> None:
    spec, data, train, _ = _merge_asof_case(exact=False)
    assert aj.audit(train, spec, data=data).findings == []


# --- provenance rules ------------------------------------------------------------------------


def test_tampered_provenance_time_gives_future_row(
    spec: aj.TrainingSetSpec, train_prov: pd.DataFrame
) -> None:
    tampered = train_prov.copy()
    rows = list(tampered.index[tampered["plant_price"].notna()][::100])
    tampered.loc[rows, "plant_price__time"] = tampered.loc[rows, "ordered_at"] + H
    tampered.loc[rows, "plant_price__known_at"] = tampered.loc[rows, "ordered_at"] + 2 * H
    edge = rows[0]
    tampered.loc[edge, "plant_price__time"] = tampered.loc[edge, "ordered_at"]  # at t: future
    report = aj.audit(tampered, spec)
    finding = only(report, aj.Rule.FUTURE_ROW, "plant_price")
    assert finding.positions == rows
    assert finding.severity is aj.Severity.ERROR
    assert rules(report) == {("future_row", "plant_price")}
    assert report.charts["plant_price"].flagged[0] == len(rows)
    assert finding.examples[0]["row_time"] == tampered.loc[edge, "ordered_at"]


def test_known_at_label_time_gives_not_yet_known(
    spec: aj.TrainingSetSpec, train_prov: pd.DataFrame
) -> None:
    tampered = train_prov.copy()
    rows = list(tampered.index[tampered["tier"].notna()][3::150])
    tampered.loc[rows, "tier__known_at"] = tampered.loc[rows, "ordered_at"]
    report = aj.audit(tampered, spec)
    assert only(report, aj.Rule.NOT_YET_KNOWN, "tier").positions == rows
    assert rules(report) == {("not_yet_known", "tier")}


def _hand_made(inclusive: bool) -> tuple[aj.TrainingSetSpec, pd.DataFrame]:
    user = aj.Entity("user", keys=["user"])
    spec = aj.TrainingSetSpec(
        labels=aj.EventTable("clicks", time="t", entities=[user]),
        features=[
            aj.Latest(
                aj.EventTable("plans", time="s", entities=[user], inclusive=inclusive), ["plan"]
            )
        ],
    )
    t = pd.to_datetime(["2024-01-02", "2024-01-02", "2024-01-02", "2024-01-02"])
    frame = pd.DataFrame(
        {
            "user": [1, 2, 3, 4],
            "t": t,
            "plan": ["a", "b", "c", None],
            "plan__time": pd.to_datetime(["2024-01-01", "2024-01-02", "2024-01-01", None]),
            "plan__known_at": pd.to_datetime(["2024-01-01", "2024-01-02", "2024-01-02", None]),
        }
    )
    return spec, frame


def test_inclusive_tables_accept_rows_known_at_the_label_time() -> None:
    spec, frame = _hand_made(inclusive=True)
    assert aj.audit(frame, spec).findings == []
    spec, frame = _hand_made(inclusive=False)
    report = aj.audit(frame, spec)
    assert only(report, aj.Rule.FUTURE_ROW, "plan").positions == [1]
    assert only(report, aj.Rule.NOT_YET_KNOWN, "plan").positions == [2]


def test_half_provenance_is_recomputed() -> None:
    spec, frame = _hand_made(inclusive=False)
    plans = pd.DataFrame(
        {"user": [1, 2, 3], "s": pd.to_datetime(["2024-01-01"] * 3), "plan": ["a", "b", "c"]}
    )
    report = aj.audit(frame.drop(columns=["plan__known_at"]), spec, data={"plans": plans})
    assert report.checked == {"plan": "recomputation"}
    assert rules(report) == set()


def test_timezone_aware_provenance(spec: aj.TrainingSetSpec, data: dict[str, pa.Table]) -> None:
    aware = {}
    for name, table in data.items():
        for i, field in enumerate(table.schema):
            if pa.types.is_timestamp(field.type):
                table = table.set_column(
                    i, field.name, table.column(i).cast(pa.timestamp("us", "UTC"))
                )
        aware[name] = table
    frame = aj.build(spec, data=aware, provenance=True).to_pandas()
    assert aj.audit(frame, spec).findings == []
    frame.loc[[10, 20], "in_stock__time"] = frame.loc[[10, 20], "ordered_at"]
    assert only(aj.audit(frame, spec), aj.Rule.FUTURE_ROW, "in_stock").positions == [10, 20]


# --- stale_value ---------------------------------------------------------------------------


def _no_max_age(spec: aj.TrainingSetSpec) -> aj.TrainingSetSpec:
    features = [
        f.model_copy(update={"max_age": None}) if isinstance(f, aj.Latest) else f
        for f in spec.features
    ]
    return aj.TrainingSetSpec(labels=spec.labels, features=features)


@pytest.mark.parametrize("provenance", [True, False])
def test_values_older_than_max_age_are_stale(
    spec: aj.TrainingSetSpec, data: dict[str, pa.Table], provenance: bool
) -> None:
    loose = aj.build(_no_max_age(spec), data=data, provenance=True).to_pandas()
    age = loose["ordered_at"] - loose["tier__time"]
    stale = list(loose.index[age > pd.Timedelta(days=365)])
    assert stale
    frame = loose if provenance else loose.drop(columns=[c for c in loose if "__" in c])
    report = aj.audit(frame, spec, data=None if provenance else data)
    for feature in ("tier", "region"):
        finding = only(report, aj.Rule.STALE_VALUE, feature)
        assert finding.positions == stale
        assert finding.severity is aj.Severity.WARNING
    assert report.ok
    assert rules(report) == {("stale_value", "tier"), ("stale_value", "region")}


# --- label_proxy ---------------------------------------------------------------------------


def _proxy_case() -> tuple[aj.TrainingSetSpec, dict[str, pd.DataFrame], pd.DataFrame]:
    rng = np.random.default_rng(5)
    n = 400
    t = pd.Timestamp("2024-01-01") + pd.to_timedelta(np.arange(n) * 3600, unit="s")
    y = rng.random(n) < 0.3
    labels = pd.DataFrame({"user": np.arange(n) % 40, "t": t, "y": y})
    rows = pd.DataFrame(
        {
            "user": labels["user"],
            "s": t - pd.Timedelta(minutes=1),
            "leak_num": y * 10.0 + rng.normal(0, 1, n),  # separates y: AUC ~1
            "flag": y,  # equals y
            "noise": rng.normal(0, 1, n),
        }
    )
    user = aj.Entity("user", keys=["user"])
    spec = aj.TrainingSetSpec(
        labels=aj.EventTable("events", time="t", entities=[user]),
        features=[
            aj.Latest(
                aj.EventTable("signals", time="s", entities=[user]),
                ["leak_num", "flag", "noise"],
            )
        ],
    )
    train = aj.build(spec, data={"events": labels, "signals": rows}).to_pandas()
    return spec, {"signals": rows}, train


def test_label_proxy_by_auc_and_by_equality() -> None:
    spec, data, train = _proxy_case()
    report = aj.audit(train, spec, data=data, label="y")
    assert not report.ok
    auc = only(report, aj.Rule.LABEL_PROXY, "leak_num")
    assert auc.details["measure"] == "roc_auc" and auc.details["value"] >= 0.99
    assert auc.positions == [] and auc.rows == len(train)
    equal = only(report, aj.Rule.LABEL_PROXY, "flag")
    assert equal.details["measure"] == "equal_share" and equal.details["value"] == 1.0
    assert ("label_proxy", "noise") not in rules(report)
    # inverted: AUC <= 0.01 is a proxy too
    inverted = train.assign(leak_num=-train["leak_num"])
    assert ("label_proxy", "leak_num") in rules(aj.audit(inverted, spec, data=data, label="y"))


def test_no_label_proxy_without_label_or_on_noise() -> None:
    spec, data, train = _proxy_case()
    assert aj.audit(train, spec, data=data).findings == []
    rng = np.random.default_rng(11)
    clean = train.assign(leak_num=train["noise"], flag=rng.random(len(train)) < 0.3)
    report = aj.audit(clean, spec, data=data, label="y")
    assert not [f for f in report.findings if f.rule is aj.Rule.LABEL_PROXY]


def test_label_proxy_without_sklearn(monkeypatch: pytest.MonkeyPatch) -> None:
    spec, data, train = _proxy_case()
    monkeypatch.setitem(sys.modules, "sklearn.metrics", None)
    report = aj.audit(train, spec, data=data, label="y")
    assert ("label_proxy", "flag") in rules(report)
    assert ("label_proxy", "leak_num") not in rules(report)
    assert any("scikit-learn is not installed" in n for n in report.notes)


# --- split_overlap -------------------------------------------------------------------------


def test_split_by_time_with_its_gap_does_not_overlap(train: pd.DataFrame) -> None:
    cut = ["2024-01-01", "2024-07-01"]
    split = aj.split_by_time(train, time="ordered_at", cuts=cut, gap="1d")
    user = aj.Entity("customer", keys=["customer_id"])
    spec = aj.TrainingSetSpec(labels=aj.EventTable("orders", time="ordered_at", entities=[user]))
    assert aj.audit(split, spec, gap="1d").findings == []


def test_split_overlap_rows_are_listed(train: pd.DataFrame) -> None:
    user = aj.Entity("customer", keys=["customer_id"])
    spec = aj.TrainingSetSpec(labels=aj.EventTable("orders", time="ordered_at", entities=[user]))
    split = aj.split_by_time(
        train, time="ordered_at", cuts=["2024-01-01"], gap="0s", names=("train", "test")
    )
    report = aj.audit(split, spec, gap="2d")
    train_end = split.loc[split["split"] == "train", "ordered_at"].max()
    want = list(
        split.index[
            (split["split"] == "test") & (split["ordered_at"] <= train_end + pd.Timedelta(days=2))
        ]
    )
    assert want
    finding = only(report, aj.Rule.SPLIT_OVERLAP)
    assert finding.positions == want
    assert finding.severity is aj.Severity.ERROR
    assert finding.examples[0]["earlier_split"] == "train"
    # a random assignment overlaps badly; split= names a column of any name
    shuffled = split.drop(columns=["split"]).assign(
        part=np.random.default_rng(0).choice(["train", "test"], len(split))
    )
    assert only(aj.audit(shuffled, spec, split="part"), aj.Rule.SPLIT_OVERLAP).rows > N // 4


# --- source rules --------------------------------------------------------------------------


def test_ambiguous_source_rows(spec: aj.TrainingSetSpec, data: dict[str, pa.Table]) -> None:
    prices = data["prices"]
    picks = [3, 20, 40]
    extra = prices.take(picks)
    bumped = extra.set_column(2, "price", pc.add(extra.column("price"), 1.0))
    same = {**data, "prices": pa.concat_tables([prices, extra])}  # exact duplicates: fine
    frame = aj.build(spec, data=same).to_pandas()
    assert aj.audit(frame, spec, data=same).findings == []
    ambiguous = {**data, "prices": pa.concat_tables([prices, bumped])}
    frame = aj.build(spec, data=ambiguous).to_pandas()
    report = aj.audit(frame, spec, data=ambiguous)
    finding = only(report, aj.Rule.AMBIGUOUS_SOURCE_ROWS)
    n = prices.num_rows
    assert finding.positions == [*picks, n, n + 1, n + 2]
    assert finding.table == "prices" and finding.details["groups"] == 3
    assert finding.severity is aj.Severity.WARNING
    assert report.ok


def test_known_before_valid(spec: aj.TrainingSetSpec, data: dict[str, pa.Table]) -> None:
    profiles = data["profiles"].to_pandas()
    rows = [2, 20, 200]
    profiles.loc[rows, "loaded_at"] = profiles.loc[rows, "updated_at"] - H
    bad = {**data, "profiles": profiles}
    frame = aj.build(spec, data=bad, provenance=True).to_pandas()
    report = aj.audit(frame, spec, data=bad)
    finding = only(report, aj.Rule.KNOWN_BEFORE_VALID)
    assert finding.positions == rows and finding.table == "profiles"
    assert finding.examples[0]["known_at"] < finding.examples[0]["valid_time"]
    assert rules(report) == {("known_before_valid", None)}
    assert aj.audit(frame.iloc[:0], spec, data=data).findings == []


# --- the report --------------------------------------------------------------------------------


def test_report_renderings(spec: aj.TrainingSetSpec, train_prov: pd.DataFrame) -> None:
    tampered = train_prov.copy()
    tampered.loc[[1, 2], "plant_price__time"] = tampered.loc[[1, 2], "ordered_at"]
    report = aj.audit(tampered, spec)
    text = str(report)
    assert text.startswith("asof-join audit: FAIL: 1 error, 0 warnings in 3,000 rows")
    assert "ERROR   future_row  plant_price  rows=2" in text
    assert text.isascii()
    doc = json.loads(report.to_json())
    assert doc["ok"] is False and doc["findings"][0]["positions"] == [1, 2]
    assert doc["findings"][0]["rule"] == "future_row"
    frame = report.to_frame()
    assert list(frame["rule"]) == ["future_row"] and list(frame["rows"]) == [2]
    page = report._repr_html_()
    assert (
        page.count("<svg") == 4
        and "<script" not in page.lower()
        and "http://" not in page.replace('xmlns="http://www.w3.org/2000/svg"', "")
    )
    assert "future_row" in page
    assert aj.audit(train_prov, spec).to_frame().empty


def test_rule_ids_and_severities_are_the_contract() -> None:
    assert [r.value for r in aj.Rule] == [
        "future_row",
        "not_yet_known",
        "value_mismatch",
        "stale_value",
        "label_proxy",
        "split_overlap",
        "ambiguous_source_rows",
        "known_before_valid",
    ]
    assert aj.Rule("future_row") == "future_row"
    assert {s.value for s in aj.Severity} == {"error", "warning"}


# --- command line ------------------------------------------------------------------------------


@pytest.fixture(scope="module")
def project(tmp_path_factory: pytest.TempPathFactory) -> Path:
    root = tmp_path_factory.mktemp("audit_project")
    write_demo_data(root / "data", 1_000, seed=2)
    doc = yaml.safe_load(NURSERY.read_text(encoding="utf-8"))
    for name, table in doc["tables"].items():
        table["path"] = f"data/{name}.parquet"
    (root / "spec.yaml").write_text(yaml.safe_dump(doc, sort_keys=False), encoding="utf-8")
    spec = aj.load_spec(root / "spec.yaml")
    aj.build(spec, provenance=True).write_parquet(root / "clean.parquet")
    frame = pq.read_table(root / "clean.parquet").to_pandas()
    frame.loc[[4, 8], "in_stock__time"] = frame.loc[[4, 8], "ordered_at"]
    frame.to_parquet(root / "leaky.parquet")
    plain = aj.build(spec).to_pandas()
    plain.loc[[3], "plant_price"] = -5.0
    plain.to_parquet(root / "odd.parquet")
    return root


def run(capsys: pytest.CaptureFixture[str], *argv: str) -> tuple[int, str, str]:
    code = main(list(argv))
    out, err = capsys.readouterr()
    return code, out, err


def test_cli_audit_clean_exits_0(capsys: pytest.CaptureFixture[str], project: Path) -> None:
    code, out, err = run(
        capsys, "audit", str(project / "clean.parquet"), "--spec", str(project / "spec.yaml")
    )
    assert (code, err) == (0, "")
    assert out.startswith("asof-join audit: OK: no findings")


def test_cli_audit_reads_csv(
    capsys: pytest.CaptureFixture[str], project: Path, tmp_path: Path
) -> None:
    csv = tmp_path / "clean.csv"
    pq.read_table(project / "clean.parquet").to_pandas().to_csv(csv, index=False)
    code, out, err = run(capsys, "audit", str(csv), "--spec", str(project / "spec.yaml"))
    assert (code, err) == (0, "")
    assert "OK: no findings" in out


def test_cli_audit_findings_exit_1_and_json(
    capsys: pytest.CaptureFixture[str], project: Path, tmp_path: Path
) -> None:
    out_json = tmp_path / "report.json"
    code, out, err = run(
        capsys,
        "audit",
        str(project / "leaky.parquet"),
        "--spec",
        str(project / "spec.yaml"),
        "--json",
        str(out_json),
    )
    assert (code, err) == (1, "")
    assert "future_row" in out
    doc = json.loads(out_json.read_text())
    assert doc["findings"][0]["positions"] == [4, 8]


def test_cli_fail_on_level(capsys: pytest.CaptureFixture[str], project: Path) -> None:
    args = ["audit", str(project / "odd.parquet"), "--spec", str(project / "spec.yaml")]
    code, out, _ = run(capsys, *args)
    assert code == 0 and "WARNING value_mismatch [unknown]  plant_price" in out
    code, _, _ = run(capsys, *args, "--fail-on", "warning")
    assert code == 1


def test_cli_audit_could_not_run_exits_2(
    capsys: pytest.CaptureFixture[str], project: Path, tmp_path: Path
) -> None:
    spec = str(project / "spec.yaml")
    code, out, err = run(capsys, "audit", str(tmp_path / "missing.parquet"), "--spec", spec)
    assert code == 2 and out == "" and err.count("\n") == 1 and "missing.parquet" in err
    junk = tmp_path / "junk.parquet"
    junk.write_text("not parquet")
    code, _, err = run(capsys, "audit", str(junk), "--spec", spec)
    assert code == 2 and err.startswith("asof-join: error: ") and err.count("\n") == 1
    bad_spec = tmp_path / "bad.yaml"
    bad_spec.write_text("version: 1\nlabels: nope\n")
    code, _, err = run(capsys, "audit", str(project / "clean.parquet"), "--spec", str(bad_spec))
    assert code == 2 and err.count("\n") == 1


def test_nanosecond_times_are_read_like_build_reads_them() -> None:
    """A label at .000000500 ns sees nothing stamped at its floored microsecond (build()'s rule);
    the audit normalizes times with the same renderer, so the built set is clean both ways."""
    user = aj.Entity("user", keys=["user_id"])
    spec = aj.TrainingSetSpec(
        labels=aj.EventTable("labels", time="t", entities=[user]),
        features=[aj.Latest(aj.EventTable("rows", time="s", entities=[user]), ["v"])],
    )
    t = pd.Series([pd.Timestamp("2024-01-15 00:00:00.000000500")], dtype="datetime64[ns]")
    labels = pd.DataFrame({"user_id": [1], "t": t})
    s = pd.Series([pd.Timestamp("2024-01-15")], dtype="datetime64[ns]")
    rows = pd.DataFrame({"user_id": [1], "s": s, "v": [7]})
    data = {"labels": labels, "rows": rows}
    plain = aj.build(spec, data=data).to_pandas()
    assert pd.isna(plain["v"].iloc[0])
    assert aj.audit(plain, spec, data=data).ok
    with_provenance = aj.build(spec, data=data, provenance=True).to_pandas()
    assert aj.audit(with_provenance, spec).ok
    # a set that took the row stamped at the label's own (floored) microsecond leaked it
    leaked = with_provenance.assign(v=[7], v__time=s, v__known_at=s)
    report = aj.audit(leaked, spec)
    assert [f.rule.value for f in report.findings] == ["future_row"]
