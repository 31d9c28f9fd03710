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
    documented = [
        line[2:] for line in code.splitlines() if line.startswith("# ") or line == "#"
    ]
    assert printed[: len(documented)] == documented
