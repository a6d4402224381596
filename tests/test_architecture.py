"""The layering of docs/architecture.md, read from the imports of every module under src/forebear.

Data flows one way: core -> records -> (engine | cluster) -> loop -> face -> bench.
A module may import its own part and the parts before it, with these rules:

* engine and cluster never import each other: workers never load the surrogates,
  and the surrogates never touch Dask;
* the engine imports no Dask, distributed or filelock;
* ``cluster/plugin.py`` (the loop hosted inside a scheduler) is the one module
  below the loop that may import the loop, and nothing in the loop imports it.

And no module outside ``bench/`` is over ``MAX_LINES`` lines: one concern a module.
"""

from __future__ import annotations

import ast
import shutil
from pathlib import Path

SRC = Path(__file__).resolve().parents[1] / "src" / "forebear"
RANK = {"core": 0, "records": 1, "engine": 2, "cluster": 2, "loop": 3, "face": 4, "bench": 5}
PEERS = {("engine", "cluster"), ("cluster", "engine")}
ENGINE_BANNED = ("dask", "distributed", "filelock")
PLUGIN = "forebear.cluster.plugin"
MAX_LINES = 400
# Modules allowed past MAX_LINES for now (none; a split in flight may name one here).
PENDING: set[str] = set()


def _module(path: Path, root: Path) -> str:
    rel = path.relative_to(root.parent).with_suffix("")
    parts = list(rel.parts)
    if parts[-1] == "__init__":
        parts.pop()
    return ".".join(parts)


def imports(root: Path) -> dict[str, set[str]]:
    """Module name -> the absolute module names it imports (at any depth of its code)."""
    out: dict[str, set[str]] = {}
    for path in sorted(root.rglob("*.py")):
        name = _module(path, root)
        found: set[str] = set()
        for node in ast.walk(ast.parse(path.read_text(), str(path))):
            if isinstance(node, ast.Import):
                found.update(a.name for a in node.names)
            elif isinstance(node, ast.ImportFrom) and node.module and node.level == 0:
                found.add(node.module)
                found.update(f"{node.module}.{a.name}" for a in node.names)
        out[name] = found
    return out


def _part(module: str) -> str | None:
    bits = module.split(".")
    return bits[1] if len(bits) > 1 and bits[0] == "forebear" and bits[1] in RANK else None


def back_edges(graph: dict[str, set[str]]) -> list[str]:
    """Every import that breaks the rules above, as ``'importer -> imported'``."""
    bad: list[str] = []
    for importer, targets in graph.items():
        src = _part(importer)
        if src is None:
            continue  # forebear/__init__.py and __main__.py: the public API may reach every part
        for target in sorted(targets):
            if src == "engine" and target.split(".")[0] in ENGINE_BANNED:
                bad.append(f"{importer} -> {target}")
            dst = _part(target)
            if src == "loop" and target.startswith(PLUGIN):
                bad.append(f"{importer} -> {target}")
            elif dst is None or dst == src or (importer == PLUGIN and dst == "loop"):
                continue
            elif RANK[dst] > RANK[src] or (src, dst) in PEERS:
                bad.append(f"{importer} -> {target}")
    return bad


def long_modules(root: Path, limit: int = MAX_LINES) -> list[str]:
    """``'path: N lines'`` for every module under ``root`` longer than ``limit``, bench/ and PENDING aside."""
    out = []
    for path in sorted(root.rglob("*.py")):
        rel = path.relative_to(root).as_posix()
        if rel.startswith("bench/") or rel in PENDING:
            continue
        n = len(path.read_text().splitlines())
        if n > limit:
            out.append(f"{rel}: {n} lines")
    return out


def test_the_tree_has_no_back_edge() -> None:
    graph = imports(SRC)
    assert "forebear.loop.controller" in graph and "forebear.core.spec" in graph  # the tree was read
    assert back_edges(graph) == []


def test_a_deliberate_back_edge_is_caught(tmp_path: Path) -> None:
    tree = tmp_path / "forebear"
    shutil.copytree(SRC, tree, ignore=shutil.ignore_patterns("__pycache__", "data"))
    assert back_edges(imports(tree)) == []
    space = tree / "core" / "space.py"
    space.write_text(space.read_text() + "\n\ndef _bad():\n    from forebear.loop.controller import Controller  # noqa\n")
    runner = tree / "cluster" / "runner.py"
    runner.write_text(runner.read_text() + "\nimport forebear.engine.surrogate.gp  # noqa\n")
    loop = tree / "loop" / "controller.py"
    loop.write_text(loop.read_text() + "\nfrom forebear.cluster import plugin  # noqa\n")
    gp = tree / "engine" / "surrogate" / "gp.py"
    gp.write_text(gp.read_text() + "\nimport distributed  # noqa\n")
    assert back_edges(imports(tree)) == [
        "forebear.cluster.runner -> forebear.engine.surrogate.gp",
        "forebear.core.space -> forebear.loop.controller",
        "forebear.core.space -> forebear.loop.controller.Controller",
        "forebear.engine.surrogate.gp -> distributed",
        "forebear.loop.controller -> forebear.cluster.plugin",
    ]



def test_no_module_outside_bench_is_over_the_limit() -> None:
    assert (SRC / "core" / "spec.py").is_file()  # the tree was read
    assert long_modules(SRC) == []


def test_a_long_module_is_named(tmp_path: Path) -> None:
    tree = tmp_path / "forebear"
    shutil.copytree(SRC, tree, ignore=shutil.ignore_patterns("__pycache__", "data"))
    space = tree / "core" / "space.py"
    lines = len(space.read_text().splitlines())
    space.write_text(space.read_text() + "\n" * (MAX_LINES + 1 - lines))
    quality = tree / "bench" / "quality.py"  # bench is exempt
    quality.write_text(quality.read_text() + "\n" * MAX_LINES)
    assert long_modules(tree) == [f"core/space.py: {MAX_LINES + 1} lines"]
