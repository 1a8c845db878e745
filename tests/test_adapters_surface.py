"""The adapters' layout: a deliberate public surface, ports the service keeps to, one home for SQL dialects.

These read the source with :mod:`ast` (what the modules import and which attributes they use)
and check the packages' ``__all__`` lists, so a change of layout fails here before it spreads.
"""

from __future__ import annotations

import ast
import importlib
import inspect
from pathlib import Path

import pytest

import leadline.adapters as adapters
from leadline.adapters.ports import AlarmPublisher, EventSink, Source
from leadline.adapters.sinks import MqttAlarmPublisher
from leadline.adapters.sources import MqttSettings
from leadline.adapters.store import EventQueries, EventStore, EventWriter, open_store

ADAPTERS = Path(__file__).resolve().parents[1] / "adapters"

PUBLIC = [
    "AlarmPublisher", "Config", "CsvFollower", "EventQueries", "EventSink", "EventStore", "EventWriter",
    "MqttAlarmPublisher", "MqttSubscriber", "RejectSample", "Service", "Source", "SourceOffset",
    "build_service", "load_config", "main", "open_store", "run_service", "upgrade_store",
]  # fmt: skip
SUBPACKAGES = ["cli", "config", "service", "sinks", "sources", "store"]
SUBCOMMAND_MODULES = ["check_config", "demo", "events", "export", "notes", "review", "run", "score", "status"]


def protocol_members(protocol: type) -> set[str]:
    return {n for n, v in vars(protocol).items() if not n.startswith("_") and callable(v)}


def public_members(cls: type) -> set[str]:
    return {n for n, _ in inspect.getmembers(cls) if not n.startswith("_")}


# ------------------------------------------------------------------------ public surface
def test_the_public_names_of_leadline_adapters():
    assert adapters.__all__ == sorted(PUBLIC)
    for name in PUBLIC:
        value = getattr(adapters, name)
        assert value.__module__.startswith("leadline.adapters."), (name, value.__module__)
    namespace: dict = {}
    exec("from leadline.adapters import *", namespace)  # noqa: S102 - the star import itself is under test
    assert set(PUBLIC) <= set(namespace)
    with pytest.raises(AttributeError, match="no attribute 'EventStoreFacade'"):
        adapters.EventStoreFacade  # noqa: B018


@pytest.mark.parametrize("name", SUBPACKAGES)
def test_each_subpackage_lists_what_it_offers(name):
    package = importlib.import_module(f"leadline.adapters.{name}")
    listed = package.__all__
    assert len(set(listed)) == len(listed) and listed, name
    for item in listed:
        assert hasattr(package, item), f"leadline.adapters.{name}.__all__ names {item!r}, which it lacks"


def test_the_cli_offers_the_command_not_its_subcommand_modules():
    from leadline.adapters import cli

    assert set(cli.__all__) == {"build_parser", "installed_version", "main"}
    assert not set(cli.__all__) & set(SUBCOMMAND_MODULES)
    for module in SUBCOMMAND_MODULES:
        assert (ADAPTERS / "cli" / f"{module}.py").exists(), module


def test_no_flat_modules_left_in_adapters():
    flat = sorted(p.name for p in ADAPTERS.glob("*.py"))
    assert flat == ["__init__.py", "ports.py"]


# ------------------------------------------------------------------------------- ports
def test_the_store_is_both_sides_and_the_sides_are_apart(tmp_path):
    store = open_store(str(tmp_path / "events.db"))
    try:
        assert isinstance(store, EventSink) and isinstance(store, EventQueries)
    finally:
        store.close()
    sink = protocol_members(EventSink)
    assert sink <= public_members(EventWriter)
    # The review side has none of the service's writes; only closing is common.
    assert public_members(EventQueries) & sink == {"close"}
    assert not {n for n in public_members(EventQueries) if n.startswith(("stage_", "flush"))}
    assert issubclass(EventStore, EventWriter) and issubclass(EventStore, EventQueries)


def test_the_mqtt_alarm_publisher_is_an_alarm_publisher():
    assert isinstance(MqttAlarmPublisher(MqttSettings(client_id="surface-check")), AlarmPublisher)


def attributes_used_on(tree: ast.AST, owner: str) -> set[str]:
    """Attribute names read on ``owner`` (a name, or ``self.<name>``) anywhere in ``tree``."""
    used = set()
    for node in ast.walk(tree):
        if not isinstance(node, ast.Attribute):
            continue
        base = node.value
        if isinstance(base, ast.Name) and base.id == owner:
            used.add(node.attr)
        elif isinstance(base, ast.Attribute) and base.attr == owner and isinstance(base.value, ast.Name):
            used.add(node.attr)
    return used


def test_the_service_loop_uses_only_its_ports():
    tree = ast.parse((ADAPTERS / "service" / "loop.py").read_text())
    reports = ast.parse((ADAPTERS / "service" / "feed_reports.py").read_text())  # a base class of Service
    store_used = attributes_used_on(tree, "store") | attributes_used_on(reports, "store")
    assert attributes_used_on(reports, "store")
    assert store_used and store_used <= protocol_members(EventSink), store_used - protocol_members(EventSink)
    published = attributes_used_on(tree, "publisher")
    assert published and published <= protocol_members(AlarmPublisher)
    source_used = attributes_used_on(tree, "source")
    assert source_used <= protocol_members(Source) | {"name"}, source_used - protocol_members(Source)


@pytest.mark.parametrize("module", ["events", "export", "notes", "status", "review"])
def test_review_commands_use_only_the_query_side(module):
    tree = ast.parse((ADAPTERS / "cli" / f"{module}.py").read_text())
    used = attributes_used_on(tree, "store") - {"close"}
    allowed = public_members(EventQueries)
    assert used <= allowed, f"cli/{module}.py uses {sorted(used - allowed)} of the store beyond EventQueries"


def imports_of(path: Path) -> list[str]:
    """Absolute module names imported by ``path`` (relative imports resolved)."""
    package = "leadline.adapters." + ".".join(path.relative_to(ADAPTERS).parent.parts)
    names = []
    for node in ast.walk(ast.parse(path.read_text())):
        if isinstance(node, ast.Import):
            names += [a.name for a in node.names]
        elif isinstance(node, ast.ImportFrom):
            if node.level:
                base = package.rstrip(".").rsplit(".", node.level - 1)[0] if node.level > 1 else package.rstrip(".")
                names.append(f"{base}.{node.module}" if node.module else base)
            else:
                names.append(node.module)
    return names


@pytest.mark.parametrize("path", sorted((ADAPTERS / "store").glob("*.py")), ids=lambda p: p.name)
def test_the_store_imports_no_sources_cli_or_service(path):
    for name in imports_of(path):
        assert not name.startswith(("leadline.adapters.sources", "leadline.adapters.cli",
                                    "leadline.adapters.service", "leadline.adapters.config")), (path.name, name)


def code_strings(tree: ast.AST) -> list[str]:
    """String constants of ``tree`` other than docstrings."""
    docstrings = set()
    for node in ast.walk(tree):
        if isinstance(node, (ast.Module, ast.ClassDef, ast.FunctionDef, ast.AsyncFunctionDef)) and node.body:
            first = node.body[0]
            if isinstance(first, ast.Expr) and isinstance(first.value, ast.Constant):
                docstrings.add(id(first.value))
    return [n.value for n in ast.walk(tree)
            if isinstance(n, ast.Constant) and isinstance(n.value, str) and id(n) not in docstrings]


@pytest.mark.parametrize("path", sorted(set((ADAPTERS / "store").glob("*.py")) - {ADAPTERS / "store" / "dialects.py"}),
                         ids=lambda p: p.name)
def test_backend_specific_code_lives_in_dialects(path):
    tree = ast.parse(path.read_text())
    for text in code_strings(tree):
        assert text not in ("sqlite", "postgresql"), f"{path.name} branches on the backend name"
        for marker in ("PRAGMA", "BEGIN IMMEDIATE", "pg_advisory", "CREATE TRIGGER"):
            assert marker not in text, (path.name, marker)
    for name in imports_of(path):
        assert not name.startswith(("sqlalchemy.dialects", "sqlite3", "psycopg")), (path.name, name)
    keywords = {k.arg for n in ast.walk(tree) if isinstance(n, ast.Call) for k in n.keywords}
    assert not keywords & {"sqlite_where", "postgresql_where"}, path.name
