"""The engine is pure: no I/O, no clock, nothing from the daemon shell (DESIGN §2).

Checked on the source with ast, so a forbidden import anywhere in a module, even
inside a function, fails here.
"""

from __future__ import annotations

import ast
from pathlib import Path

import pytest

ENGINE = Path(__file__).resolve().parent.parent / "daemon" / "engine"
MODULES = sorted(ENGINE.rglob("*.py"))

# Top-level packages the engine must never import: I/O, the clock, threads, logging.
FORBIDDEN_ROOTS = {
    "paho",
    "apscheduler",
    "socket",
    "ssl",
    "sqlite3",
    "time",
    "os",
    "pathlib",
    "io",
    "shutil",
    "tempfile",
    "subprocess",
    "threading",
    "multiprocessing",
    "asyncio",
    "selectors",
    "logging",
    "structlog",
    "requests",
    "urllib",
    "http",
}
# The daemon shell around the engine.
SHELL_MODULES = {"cli", "replay", "logfile", "hourly", "profile_files", "errors"}
# Clock reads on the datetime classes: datetime.now(), datetime.utcnow(), date.today().
CLOCK_ATTRS = {"now", "utcnow", "today"}


def _imports(tree: ast.AST, module: Path) -> list[tuple[int, str]]:
    """(line, absolute dotted name) of every import in the module."""
    package = ["daemon", *module.relative_to(ENGINE.parent).with_suffix("").parts[:-1]]
    found: list[tuple[int, str]] = []
    for node in ast.walk(tree):
        if isinstance(node, ast.Import):
            found += [(node.lineno, a.name) for a in node.names]
        elif isinstance(node, ast.ImportFrom):
            if node.level:
                base = package[: len(package) - node.level + 1]
                name = ".".join(base + ([node.module] if node.module else []))
            else:
                name = node.module or ""
            found.append((node.lineno, name))
            # `from daemon import cli` names the shell module in the alias
            found += [(node.lineno, f"{name}.{a.name}") for a in node.names]
    return found


def test_the_engine_has_modules() -> None:
    names = {m.stem for m in MODULES}
    assert {"engine", "decode", "cleaning", "series", "profiles"} <= names


@pytest.mark.parametrize("module", MODULES, ids=lambda m: m.name)
def test_no_io_or_clock_imports(module: Path) -> None:
    tree = ast.parse(module.read_text(encoding="utf-8"), filename=str(module))
    bad = [
        f"{module.name}:{line}: imports {name}"
        for line, name in _imports(tree, module)
        if name.split(".")[0] in FORBIDDEN_ROOTS
    ]
    assert not bad, bad


@pytest.mark.parametrize("module", MODULES, ids=lambda m: m.name)
def test_no_import_from_the_shell(module: Path) -> None:
    tree = ast.parse(module.read_text(encoding="utf-8"), filename=str(module))
    bad = []
    for line, name in _imports(tree, module):
        parts = name.split(".")
        # anything under daemon but outside daemon.engine is the shell; a bare shell
        # module name would be an absolute import through a sys.path hack
        outside = parts[0] == "daemon" and (len(parts) == 1 or parts[1] != "engine")
        if outside or parts[0] in SHELL_MODULES:
            bad.append(f"{module.name}:{line}: imports {name}")
    assert not bad, bad


def _clock_reads(tree: ast.AST) -> list[tuple[int, str]]:
    """Uses of datetime.now / datetime.utcnow / date.today, however datetime was imported."""
    classes = {"datetime", "date"}  # names that may hold datetime.datetime / datetime.date
    for node in ast.walk(tree):
        if isinstance(node, ast.ImportFrom) and node.module == "datetime":
            classes |= {a.asname or a.name for a in node.names if a.name in ("datetime", "date")}
        elif isinstance(node, ast.Import):
            classes |= {a.asname or a.name for a in node.names if a.name == "datetime"}
    found = []
    for node in ast.walk(tree):
        if isinstance(node, ast.Attribute) and node.attr in CLOCK_ATTRS:
            owner = node.value
            name = owner.id if isinstance(owner, ast.Name) else getattr(owner, "attr", "")
            if name in classes:
                found.append((node.lineno, f"{name}.{node.attr}"))
        # `from datetime import datetime` then `now = datetime.now` is caught above;
        # a clock function imported by name would be an ImportFrom of it:
        if isinstance(node, ast.ImportFrom) and node.module in ("datetime", "time"):
            found += [(node.lineno, a.name) for a in node.names if a.name in CLOCK_ATTRS]
    return found


@pytest.mark.parametrize("module", MODULES, ids=lambda m: m.name)
def test_no_clock_reads(module: Path) -> None:
    tree = ast.parse(module.read_text(encoding="utf-8"), filename=str(module))
    bad = [f"{module.name}:{line}: {what}" for line, what in _clock_reads(tree)]
    assert not bad, bad


def test_the_checks_can_fail() -> None:
    """The walkers above do see what they forbid (guard against a vacuous pass)."""
    src = (
        "import os\nfrom time import monotonic\nfrom .. import cli\n"
        "from datetime import datetime\nx = datetime.now()\n"
    )
    fake = ENGINE / "fake_module.py"  # path only, for the relative-import base
    tree = ast.parse(src)
    names = {n for _, n in _imports(tree, fake)}
    assert "os" in names and "time" in names and "daemon.cli" in names
    assert [w for _, w in _clock_reads(tree)] == ["datetime.now"]
    aliased = ast.parse("import datetime as dt\nx = dt.date.today()\ny = v.now - 5\n")
    assert [w for _, w in _clock_reads(aliased)] == ["date.today"]
