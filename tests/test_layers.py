"""The layers point one way (docs/architecture.md): runtime is the torch-free base, bench sits
on runtime, compress on both, and the CLI (runtime/cli.py) on top dispatches lazily. The test
reads every module's imports with Python's ast (top-level and inside functions alike) and
fails on an import that points up a layer or on two modules that import each other."""
from __future__ import annotations

import ast
from pathlib import Path

REPO = Path(__file__).resolve().parents[1]
LAYER = {"runtime": 0, "bench": 1, "compress": 2}
TOP = {"limner.runtime.cli"}  # the CLI sits above every layer


def _modules() -> dict[str, Path]:
    out = {}
    for pkg in LAYER:
        for f in (REPO / pkg).glob("*.py"):
            name = f"limner.{pkg}" + ("" if f.stem == "__init__" else f".{f.stem}")
            out[name] = f
    return out


def _imports(name: str, path: Path) -> set[str]:
    pkg = name if path.stem == "__init__" else name.rsplit(".", 1)[0]
    found = set()
    for node in ast.walk(ast.parse(path.read_text())):
        if isinstance(node, ast.Import):
            found |= {a.name for a in node.names if a.name.startswith("limner.")}
        elif isinstance(node, ast.ImportFrom):
            if node.level:
                base = pkg.rsplit(".", node.level - 1)[0] if node.level > 1 else pkg
                mod = f"{base}.{node.module}" if node.module else base
                # `from . import x` names modules
                found |= {f"{mod}.{a.name}" for a in node.names} if not node.module else {mod}
            elif node.module and node.module.startswith("limner."):
                found.add(node.module)
                found |= {f"{node.module}.{a.name}" for a in node.names}
    mods = _modules()
    return {m for m in found if m in mods and m != name}


def test_no_import_points_up_a_layer():
    mods = _modules()
    bad = []
    for name, path in mods.items():
        if name in TOP:
            continue
        mine = LAYER[name.split(".")[1]]
        for dep in _imports(name, path):
            if LAYER[dep.split(".")[1]] > mine:
                bad.append(f"{name} imports {dep}")
    assert not bad, "\n".join(bad)


def test_no_two_modules_import_each_other():
    mods = _modules()
    deps = {n: _imports(n, p) for n, p in mods.items()}
    pairs = sorted({tuple(sorted((a, b))) for a in deps for b in deps[a] if a in deps.get(b, set())})
    assert not pairs, pairs


def test_the_walk_sees_imports():
    """The checks above would pass on an empty walk: make sure it finds known edges."""
    mods = _modules()
    assert "limner.runtime.images" in _imports("limner.bench.run", mods["limner.bench.run"])
    assert "limner.bench.lossnet_h5" in _imports("limner.compress.lossnet", mods["limner.compress.lossnet"])
    assert "limner.runtime.model" in _imports("limner.runtime.playlist", mods["limner.runtime.playlist"])
