"""The core stays pure: nothing in detector/ imports I/O libraries or the adapters."""

import ast
from pathlib import Path

import pytest

DETECTOR = Path(__file__).resolve().parents[1] / "detector"
FORBIDDEN = ("paho", "sqlalchemy", "psycopg", "leadline.adapters", "socket", "sqlite3")


@pytest.mark.parametrize("path", sorted(DETECTOR.rglob("*.py")), ids=lambda p: p.name)
def test_detector_module_imports_no_io(path):
    tree = ast.parse(path.read_text(), filename=str(path))
    for node in ast.walk(tree):
        names = []
        if isinstance(node, ast.Import):
            names = [a.name for a in node.names]
        elif isinstance(node, ast.ImportFrom) and node.module and node.level == 0:
            names = [node.module]
        for name in names:
            assert not name.startswith(FORBIDDEN), f"{path.name} imports {name}"
