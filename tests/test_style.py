"""House-style rules that a machine can check (../shared/STYLE.md rules 1, 3, 11, 13, 19)."""

from __future__ import annotations

import ast
import re
from pathlib import Path

import pytest

from .conftest import REPO

RUNTIME_FILES = sorted((REPO / "parsers").rglob("*.py")) + sorted((REPO / "daemon").rglob("*.py"))
#: Modules over this many lines must say why in a "# size: <reason>" comment (STYLE rule 1's soft
#: cap, and its review question R1: "Does any module exceed 400 lines without a stated reason?").
MAX_LINES = 400
#: parsers/ is sans-IO (STYLE rule 3).
FORBIDDEN_IN_PARSERS = {"asyncio", "socket", "serial", "time", "logging", "select", "threading"}
#: Reference libraries are for tests and benches only.
TEST_ONLY_LIBRARIES = {"pyrtcm", "pymap3d", "georinex"}


def _imports(path: Path) -> set[str]:
    tree = ast.parse(path.read_text(), filename=str(path))
    names: set[str] = set()
    for node in ast.walk(tree):
        if isinstance(node, ast.Import):
            names.update(alias.name.split(".")[0] for alias in node.names)
        elif isinstance(node, ast.ImportFrom) and node.module and node.level == 0:
            names.add(node.module.split(".")[0])
    return names


@pytest.mark.parametrize("path", RUNTIME_FILES, ids=lambda p: p.relative_to(REPO).as_posix())
def test_module_size_within_cap(path: Path) -> None:
    """A runtime module stays under 400 lines unless it states a reason (STYLE rule 1, R1)."""
    text = path.read_text()
    if text.count("\n") > MAX_LINES:
        assert "# size:" in text, (
            f"{path.name} has {text.count(chr(10))} lines and no '# size:' reason"
        )


@pytest.mark.parametrize("path", sorted((REPO / "parsers").rglob("*.py")), ids=lambda p: p.name)
def test_parsers_are_sans_io(path: Path) -> None:
    """parsers/ imports no asyncio, socket, serial, time or logging (STYLE rule 3)."""
    assert not (_imports(path) & FORBIDDEN_IN_PARSERS)


@pytest.mark.parametrize("path", RUNTIME_FILES, ids=lambda p: p.relative_to(REPO).as_posix())
def test_runtime_never_imports_reference_libraries(path: Path) -> None:
    """pyrtcm, pymap3d and georinex are test-only cross-check references."""
    assert not (_imports(path) & TEST_ONLY_LIBRARIES)


def test_logging_configured_only_by_cli() -> None:
    """basicConfig/setLevel appear only in daemon/cli (STYLE rule 11)."""
    offenders = [
        p.relative_to(REPO).as_posix()
        for p in RUNTIME_FILES
        if "cli" not in p.parts and re.search(r"\bbasicConfig\(|\.setLevel\(", p.read_text())
    ]
    assert offenders == []


def test_no_bare_create_task() -> None:
    """No asyncio.create_task / ensure_future outside a TaskGroup (STYLE rule 13)."""
    offenders = [
        p.relative_to(REPO).as_posix()
        for p in RUNTIME_FILES
        if re.search(r"asyncio\.(create_task|ensure_future)\(", p.read_text())
    ]
    assert offenders == []


def test_no_global_prometheus_registry() -> None:
    """Runtime code never registers on prometheus_client's global REGISTRY (STYLE rule 19)."""
    offenders = [
        p.relative_to(REPO).as_posix()
        for p in RUNTIME_FILES
        if re.search(r"\bREGISTRY\b", p.read_text()) and "prometheus_client" in p.read_text()
    ]
    assert offenders == []
