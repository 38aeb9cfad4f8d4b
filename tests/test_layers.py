"""The house rules that a grep can check: SQL only in the state package, no guarded imports of our own code."""

from __future__ import annotations

import ast
import re
from pathlib import Path

PACKAGE = Path(__file__).resolve().parents[1] / "monitor"
SQL_CALL = re.compile(r"\.(execute|executemany|executescript)\(")


def _modules() -> list[Path]:
    return sorted(p for p in PACKAGE.rglob("*.py") if "_shipped" not in p.parts)


def test_sql_only_in_the_state_package() -> None:
    """No module outside monitor/state/ calls execute/executemany/executescript on a connection."""
    offenders = [f"{p.relative_to(PACKAGE.parent)}:{i}" for p in _modules() if "state" not in p.parts
                 for i, text in enumerate(p.read_text(encoding="utf-8").splitlines(), 1) if SQL_CALL.search(text)]
    assert offenders == []


def test_no_import_of_our_own_modules_is_guarded() -> None:
    """`except ImportError` never wraps an import of `monitor.*`: a missing module of ours fails loudly."""
    offenders = []
    for p in _modules():
        tree = ast.parse(p.read_text(encoding="utf-8"))
        for node in ast.walk(tree):
            if not isinstance(node, ast.Try):
                continue
            catches = any(isinstance(h.type, ast.Name) and h.type.id in ("ImportError", "ModuleNotFoundError")
                          for h in node.handlers)
            ours = any(isinstance(n, ast.ImportFrom) and (n.module or "").startswith("monitor")
                       for stmt in node.body for n in ast.walk(stmt))
            if catches and ours:
                offenders.append(f"{p.relative_to(PACKAGE.parent)}:{node.lineno}")
    assert offenders == []


def test_the_state_package_imports_nothing_above_it() -> None:
    """monitor/state/ is an edge: it imports no daemon, alerts, commands or ingest module (the outbox
    stores `Alert` values, so the value module `monitor.alerts.alert` is allowed)."""
    above = ("monitor.daemon", "monitor.alerts", "monitor.commands", "monitor.ingest", "monitor.cli")
    offenders = []
    for p in sorted((PACKAGE / "state").glob("*.py")):
        for node in ast.walk(ast.parse(p.read_text(encoding="utf-8"))):
            if isinstance(node, ast.ImportFrom) and (node.module or "").startswith(above) \
                    and node.module != "monitor.alerts.alert":
                offenders.append(f"{p.name}: {node.module}")
    assert offenders == []
