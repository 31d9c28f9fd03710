"""The latest lookup without ASOF JOIN (the Spark formulation), on DuckDB, against the oracle."""

from __future__ import annotations

import os

from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

import asof_join as aj
from asof_join.engines.duckdb import DuckDBEngine
from tests.compare import assert_frames_match
from tests.oracle import oracle_build
from tests.strategies import Case, cases

EXAMPLES = int(os.environ.get("ASOF_JOIN_EXAMPLES", "250")) // 2


@settings(
    max_examples=max(EXAMPLES, 10),
    deadline=None,
    suppress_health_check=[HealthCheck.too_slow, HealthCheck.data_too_large],
)
@given(case=cases(latest=True, trailing=True, time_kinds=True), provenance=st.booleans())
def test_window_formulation_matches_oracle(case: Case, provenance: bool) -> None:
    """SUPPORTS_ASOF_JOIN = False and SUPPORTS_QUALIFY = False, rendered for DuckDB."""
    spec, data = case
    engine = DuckDBEngine(asof="window")
    actual = aj.build(spec, data=data, provenance=provenance, engine=engine).to_pandas()
    expected = oracle_build(spec, data, provenance=provenance)
    assert_frames_match(
        actual, expected, context=f"provenance={provenance}; reproducer:\n{case.code()}"
    )


def test_window_formulation_sql_has_no_asof_join_or_qualify() -> None:
    customer = aj.Entity("customer", keys=["customer_id"])
    orders = aj.EventTable("orders", time="at", entities=[customer])
    tiers = aj.EventTable("tiers", time="at", known_at="loaded", entities=[customer])
    spec = aj.TrainingSetSpec(labels=orders, features=[aj.Latest(tiers, ["tier"])])
    import pandas as pd

    o = pd.DataFrame({"customer_id": [1, 1], "at": pd.to_datetime(["2024-01-02", "2024-01-05"])})
    t = pd.DataFrame(
        {
            "customer_id": [1, 1],
            "at": pd.to_datetime(["2024-01-01", "2024-01-05"]),
            "loaded": pd.to_datetime(["2024-01-01", "2024-01-05"]),
            "tier": [None, "bloom"],
        }
    )
    train = aj.build(spec, data={"orders": o, "tiers": t}, engine=DuckDBEngine(asof="window"))
    assert "ASOF" not in train.sql and "QUALIFY" not in train.sql
    assert train.to_pandas()["tier"].isna().tolist() == [True, True]
