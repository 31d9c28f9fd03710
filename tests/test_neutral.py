"""The spec, file format, plan and input checks stay engine-neutral: no engine imports."""

from __future__ import annotations

import ast
from pathlib import Path

import pytest

PACKAGE = Path(__file__).parents[1] / "asof_join"
NEUTRAL = ["spec.py", "spec_file.py", "plan.py", "inputs.py", "durations.py", "errors.py"]
BANNED = ("duckdb", "pyspark", "asof_join.engines", ".engines")


@pytest.mark.parametrize("module", NEUTRAL)
def test_neutral_module_imports_no_engine(module: str) -> None:
    tree = ast.parse((PACKAGE / module).read_text(encoding="utf-8"))
    imported: list[str] = []
    for node in ast.walk(tree):
        if isinstance(node, ast.Import):
            imported += [alias.name for alias in node.names]
        elif isinstance(node, ast.ImportFrom):
            imported.append("." * node.level + (node.module or ""))
    bad = [name for name in imported if name.startswith(BANNED) or name in ("..engines",)]
    assert not bad, f"{module} imports {bad}"
