"""The layers hold: every module imports only its own layer and the layers below it.

The layer of each module comes from the architecture map in DEVELOPERS.md (the most specific row
that names the module or its folder), so the map and the code cannot drift apart: a module the
map does not cover fails here too.
"""

from __future__ import annotations

import ast
import re
from dataclasses import dataclass
from pathlib import Path

import pytest

ROOT = Path(__file__).resolve().parent.parent
PACKAGE = ROOT / "tracker"
ORDER = ("base", "core", "edge", "sim", "shell", "cli")

#: Outside modules a layer must not import (the core is pure; the edge only turns bytes into
#: messages and back).
FORBIDDEN = {
    "core": ("pydantic", "asyncio", "aiomqtt", "paho", "sqlite3", "socket", "subprocess", "time"),
    "edge": ("asyncio", "aiomqtt", "paho", "sqlite3", "socket", "subprocess"),
}
#: Calls that read the clock (the core's time is event time).
CLOCK_CALLS = {"now", "utcnow", "today", "time", "monotonic", "perf_counter", "time_ns"}


def _layer_table() -> list[tuple[str, str]]:
    text = (ROOT / "DEVELOPERS.md").read_text(encoding="utf-8")
    section = text.split("## Architecture map", 1)[1]
    rows = re.findall(r"^\| `([^`]+)` \| (\w+) \|", section, flags=re.MULTILINE)
    assert rows, "DEVELOPERS.md has no architecture map table"
    return rows


TABLE = _layer_table()


def layer_of(relative: str) -> str:
    """The layer of a module path like ``tracker/core/solve.py``: its most specific row."""
    best = ""
    layer = ""
    for path, name in TABLE:
        if (relative == path or (path.endswith("/") and relative.startswith(path))) and len(
            path
        ) > len(best):
            best, layer = path, name
    return layer


@dataclass(frozen=True)
class Import:
    module: str
    line: int


def imports_of(path: Path) -> list[Import]:
    """Every module a file imports, at any depth (lazy imports inside functions included)."""
    tree = ast.parse(path.read_text(encoding="utf-8"))
    found: list[Import] = []
    package = ".".join(path.relative_to(ROOT).with_suffix("").parts[:-1])
    for node in ast.walk(tree):
        if isinstance(node, ast.Import):
            found += [Import(alias.name, node.lineno) for alias in node.names]
        elif isinstance(node, ast.ImportFrom):
            if node.level:
                base = package.rsplit(".", node.level - 1)[0] if node.level > 1 else package
                module = f"{base}.{node.module}" if node.module else base
            else:
                module = node.module or ""
            found.append(Import(module, node.lineno))
            if module in ("tracker", "tracker.core"):  # from tracker import solve, ...
                found += [Import(f"{module}.{alias.name}", node.lineno) for alias in node.names]
    return found


def module_path(module: str) -> str | None:
    """The repository path of a ``tracker`` module (package folders as their ``__init__``)."""
    parts = module.split(".")
    candidate = ROOT.joinpath(*parts)
    if candidate.with_suffix(".py").exists():
        return str(candidate.with_suffix(".py").relative_to(ROOT))
    if (candidate / "__init__.py").exists():
        return str((candidate / "__init__.py").relative_to(ROOT))
    if candidate.with_suffix(".c").exists():  # a compiled extension: the layer of its source
        return str(candidate.with_suffix(".c").relative_to(ROOT))
    return None


MODULES = sorted(PACKAGE.rglob("*.py"))


@pytest.mark.parametrize("path", MODULES, ids=lambda p: str(p.relative_to(ROOT)))
def test_module_is_on_the_map(path: Path) -> None:
    """Every module of the package has a layer in DEVELOPERS.md's architecture map."""
    relative = str(path.relative_to(ROOT))
    assert layer_of(relative) in ORDER, f"{relative} is not covered by the architecture map"


@pytest.mark.parametrize("path", MODULES, ids=lambda p: str(p.relative_to(ROOT)))
def test_imports_respect_the_layers(path: Path) -> None:
    """A module imports no higher layer, and the core and edge none of their forbidden modules."""
    relative = str(path.relative_to(ROOT))
    own = layer_of(relative)
    problems = []
    for item in imports_of(path):
        top = item.module.split(".")[0]
        if top == "tracker":
            target = module_path(item.module)
            if target is None:
                continue  # a name imported from a package (checked through its module)
            other = layer_of(target)
            if ORDER.index(other) > ORDER.index(own):
                problems.append(f"line {item.line}: {own} imports {item.module} ({other})")
        elif top in FORBIDDEN.get(own, ()):
            problems.append(f"line {item.line}: {own} imports {item.module}")
    assert [] == problems


@pytest.mark.parametrize(
    "path",
    [p for p in MODULES if layer_of(str(p.relative_to(ROOT))) == "core"],
    ids=lambda p: str(p.relative_to(ROOT)),
)
def test_core_never_reads_the_clock(path: Path) -> None:
    """No core module calls datetime.now(), date.today(), time.time() or the like."""
    tree = ast.parse(path.read_text(encoding="utf-8"))
    calls = [
        f"line {node.lineno}: {ast.unparse(node.func)}()"
        for node in ast.walk(tree)
        if isinstance(node, ast.Call)
        and isinstance(node.func, ast.Attribute)
        and node.func.attr in CLOCK_CALLS
        and ast.unparse(node.func.value).split(".")[-1] in ("datetime", "date", "time")
    ]
    assert [] == calls


def test_the_checks_can_fail(tmp_path: Path) -> None:
    """The import walker sees lazy and relative imports (so a leak cannot hide in a function)."""
    source = tmp_path / "tracker" / "core" / "leaky.py"
    source.parent.mkdir(parents=True)
    source.write_text("def f():\n    import aiomqtt\n    from ..shell import daemon\n")
    global ROOT
    saved = ROOT
    ROOT = tmp_path
    try:
        found = [i.module for i in imports_of(source)]
    finally:
        ROOT = saved
    assert ["aiomqtt", "tracker.shell"] == found
