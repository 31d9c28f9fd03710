"""The examples run end to end at a small size and print what their text promises."""

from __future__ import annotations

import os
import re
import subprocess
import sys
from pathlib import Path

EXAMPLES = Path(__file__).parents[1] / "examples"


def _run(script: str, env: dict[str, str]) -> str:
    done = subprocess.run(
        [sys.executable, str(EXAMPLES / script)],
        env={**os.environ, **env},
        capture_output=True,
        text=True,
        timeout=300,
        check=False,
    )
    assert done.returncode == 0, done.stderr[-3000:]
    return done.stdout


def test_ranking_end_to_end() -> None:
    out = _run("ranking_end_to_end.py", {"ASOF_JOIN_EXAMPLE_ORDERS": "3000"})
    assert "3,000 orders" in out
    rows = {
        name: [float(x) for x in re.findall(r"\d\.\d+", line)]
        for name, line in (
            ("pit", next(line for line in out.splitlines() if line.startswith("point in time"))),
            ("naive", next(line for line in out.splitlines() if line.startswith("naive"))),
        )
    }
    for figures in rows.values():
        assert len(figures) == 4 and all(0.0 <= f <= 1.0 for f in figures)
    offline, holdout = rows["naive"][0], rows["naive"][2]
    assert holdout < offline - 0.1, out  # the naive join's offline figure is inflated
    assert rows["pit"][2] > holdout, out
