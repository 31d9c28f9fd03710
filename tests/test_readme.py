"""The README's quickstart runs as written and prints what the README says it prints."""

from __future__ import annotations

import contextlib
import io
import re
from pathlib import Path

README = Path(__file__).parents[1] / "README.md"


def _python_blocks() -> list[str]:
    return re.findall(r"```python\n(.*?)```", README.read_text(encoding="utf-8"), flags=re.S)


def test_quickstart_runs_and_prints_the_documented_frame() -> None:
    code = _python_blocks()[0]
    out = io.StringIO()
    with contextlib.redirect_stdout(out):
        exec(compile(code, str(README), "exec"), {})
    printed = out.getvalue().splitlines()
    documented = [line[2:] for line in code.splitlines() if line.startswith("# ") or line == "#"]
    assert printed[: len(documented)] == documented


def test_trailing_worked_example() -> None:
    """The README's 'Trailing windows' table, computed."""
    import pandas as pd

    import asof_join as aj

    c = aj.Entity("customer", keys=["customer_id"])
    p = aj.Entity("plant", keys=["plant_id"])
    orders = aj.EventTable("orders", time="t", entities=[c, p])
    views = aj.EventTable("views", time="viewed_at", delay="1h", entities=[c, p])
    feats = [aj.Trailing(views, None, "count", over="7d", name="rows")] + [
        aj.Trailing(views, "seconds", a, over="7d", name=a)
        for a in ["count", "sum", "mean", "std", "last"]
    ]
    spec = aj.TrainingSetSpec(labels=orders, features=feats)
    o = pd.DataFrame(
        {"customer_id": [7], "plant_id": [12], "t": pd.to_datetime(["2024-03-10 12:00"])}
    )
    seen = ["2024-03-03 12:00", "2024-03-05 09:00", "2024-03-08 20:00", "2024-03-10 11:30"]
    v = pd.DataFrame(
        {
            "customer_id": [7] * 4,
            "plant_id": [12] * 4,
            "viewed_at": pd.to_datetime(seen),
            "seconds": [40, 15, None, 90],
        }
    )
    row = aj.build(spec, data={"orders": o, "views": v}).to_pandas().iloc[0]
    assert (row["rows"], row["count"], row["sum"], row["mean"]) == (2, 1, 15.0, 15.0)
    assert pd.isna(row["std"]) and pd.isna(row["last"])


def test_latest_worked_example() -> None:
    """The README's table of profile updates and what each label time sees."""
    import pandas as pd

    import asof_join as aj

    c = aj.Entity("customer", keys=["customer_id"])
    orders = aj.EventTable("orders", time="t", entities=[c])
    profiles = aj.EventTable("profiles", time="s", known_at="k", entities=[c])
    spec = aj.TrainingSetSpec(
        labels=orders,
        features=[
            aj.Latest(profiles, ["tier"]),
            aj.Trailing(profiles, None, "count", over="1d", name="n_1d"),
        ],
    )
    p = pd.DataFrame(
        {
            "customer_id": [7, 7, 7],
            "s": pd.to_datetime(["2024-03-01 08:00", "2024-03-01 08:00", "2024-03-02 00:00"]),
            "k": pd.to_datetime(["2024-03-01 14:00", "2024-03-03 09:00", "2024-03-02 01:00"]),
            "tier": ["bloom", "evergreen", "sprout"],
        }
    )
    t = ["2024-03-01 12:00", "2024-03-01 14:00", "2024-03-02 12:00", "2024-03-04 00:00"]
    o = pd.DataFrame({"customer_id": [7] * 4, "t": pd.to_datetime(t)})
    out = aj.build(spec, data={"orders": o, "profiles": p}).to_pandas()
    assert out["tier"].isna().tolist() == [True, True, False, False]
    assert out["tier"].iloc[2:].tolist() == ["sprout", "sprout"]
    assert out["n_1d"].iloc[2] == 1
