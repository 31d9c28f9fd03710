"""Shared fixtures: one local Spark session for the tests marked ``spark`` (skipped without it)."""

from __future__ import annotations

from collections.abc import Iterator
from typing import Any

import pytest


@pytest.fixture(scope="session")
def spark() -> Iterator[Any]:
    """Spark local[2], UTC session zone, 4 shuffle partitions, no UI; stopped at the end."""
    pytest.importorskip("pyspark")
    from pyspark.sql import SparkSession

    try:
        session = (
            SparkSession.builder.master("local[2]")
            .appName("asof_join-tests")
            .config("spark.sql.session.timeZone", "UTC")
            .config("spark.sql.shuffle.partitions", "4")
            .config("spark.default.parallelism", "2")
            .config("spark.ui.enabled", "false")
            .config("spark.ui.showConsoleProgress", "false")
            .getOrCreate()
        )
    except Exception as exc:  # no Java, or the JVM did not start
        pytest.skip(f"no local Spark session: {exc}")
    session.sparkContext.setLogLevel("ERROR")
    yield session
    session.stop()
