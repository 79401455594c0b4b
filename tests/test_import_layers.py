"""Imports run one way: no two modules of the package import each other, at module level or inside a function
(a layered package has an acyclic import graph: common practice; a cycle hidden in a function-level import is
still a cycle).  Read from the source text with the standard library's ``ast``, not by importing."""
import ast
from pathlib import Path

import protomine

ROOT = Path(protomine.__file__).parent


def _modules() -> dict[str, Path]:
    out = {}
    for p in ROOT.rglob("*.py"):
        parts = ("protomine",) + p.relative_to(ROOT).with_suffix("").parts
        if parts[-1] == "__init__":
            parts = parts[:-1]
        out[".".join(parts)] = p
    return out


def _imports(name: str, path: Path, mods: dict[str, Path]) -> set[str]:
    package = name if path.name == "__init__.py" else name.rsplit(".", 1)[0]
    found = set()
    for node in ast.walk(ast.parse(path.read_text())):
        if isinstance(node, ast.ImportFrom):
            if node.level:
                base = package.split(".")[: len(package.split(".")) - (node.level - 1)]
                target = ".".join(base + ([node.module] if node.module else []))
            else:
                target = node.module or ""
            for a in node.names:
                full = f"{target}.{a.name}"
                found.add(full if full in mods else target)
        elif isinstance(node, ast.Import):
            found.update(a.name for a in node.names)
    return {m for m in found if m in mods and m != name}


def test_no_two_modules_import_each_other():
    mods = _modules()
    graph = {m: _imports(m, p, mods) for m, p in mods.items()}
    # a package's __init__ re-exporting its own modules is not a layer crossing
    mutual = sorted((a, b) for a in graph for b in graph[a] if a < b and a in graph[b]
                    and not b.startswith(a + ".") and not a.startswith(b + "."))
    assert mutual == []


def test_the_check_sees_a_function_level_import(tmp_path):
    # the reader must catch a cycle hidden inside a function (the kind this test exists for)
    p = tmp_path / "m.py"
    p.write_text("def f():\n    from ..label.matcher import ViewSearch\n")
    mods = {"protomine.mine.m": p, "protomine.label.matcher": p}
    assert _imports("protomine.mine.m", p, mods) == {"protomine.label.matcher"}
