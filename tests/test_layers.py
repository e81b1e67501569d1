"""Imports only point down the layer stack (DEVELOPERS.md, "Layers").

Walks every module of the package with ``ast`` (lazy imports inside functions included) and
fails when a module imports one of a higher layer, or a sibling it may not use.
"""

from __future__ import annotations

import ast
from pathlib import Path

import pytest

PACKAGE = Path(__file__).resolve().parents[1] / "tracelab"

#: Layer of each top-level part of the package; higher numbers sit higher in the stack.
LAYERS: dict[str, int] = {
    "tracelab": 0, "errors": 0, "progress": 0, "wording": 0,
    "format": 1,
    "physics": 2,
    "network": 3,
    "store": 4, "inputs": 4,  # input shells (capture, convert): write format v1
    "analyses": 5, "simulate": 5, "forensics": 5,
    "report": 6,
    "fleet": 7,
    "query": 8, "workflow": 8,
    "cli": 9, "__main__": 9,
}
#: Same-layer imports that are allowed (importer, imported); other siblings stay apart.
SIBLINGS_ALLOWED = {("forensics", "analyses"), ("query", "workflow"), ("workflow", "query")}


def _part(module: str) -> str:
    """'tracelab.store.ingest' -> 'store'; 'tracelab' -> 'tracelab'."""
    parts = module.split(".")
    return parts[1] if len(parts) > 1 else parts[0]


def _module_name(path: Path) -> str:
    rel = path.relative_to(PACKAGE.parent).with_suffix("")
    parts = list(rel.parts)
    if parts[-1] == "__init__":
        parts.pop()
    return ".".join(parts)


def _exists(part: str) -> bool:
    return (PACKAGE / part).exists() or (PACKAGE / f"{part}.py").exists()


def _imports(source: str, name: str, is_init: bool) -> list[tuple[int, str]]:
    """(line, absolute module) for every tracelab import in ``source`` of module ``name``."""
    package = name if is_init else name.rpartition(".")[0]
    out = []
    for node in ast.walk(ast.parse(source)):
        if isinstance(node, ast.Import):
            out += [(node.lineno, a.name) for a in node.names if a.name.split(".")[0] == "tracelab"]
        elif isinstance(node, ast.ImportFrom):
            if node.level:
                base = package.split(".")
                base = base[: len(base) - node.level + 1]
                target = ".".join(base + ([node.module] if node.module else []))
            else:
                target = node.module or ""
            if target.split(".")[0] != "tracelab":
                continue
            if target == "tracelab":  # from tracelab import store -> tracelab.store
                out += [(node.lineno, f"tracelab.{a.name}" if _exists(a.name) else "tracelab")
                        for a in node.names]
            else:
                out.append((node.lineno, target))
    return out


def violations(source: str, name: str, is_init: bool = False) -> list[str]:
    me = _part(name)
    bad = []
    for line, target in _imports(source, name, is_init):
        other = _part(target)
        if other == me or other not in LAYERS or me not in LAYERS:
            continue
        if LAYERS[other] > LAYERS[me] or (
                LAYERS[other] == LAYERS[me] and (me, other) not in SIBLINGS_ALLOWED):
            bad.append(f"line {line}: {me} (layer {LAYERS[me]}) imports {target} "
                       f"(layer {LAYERS[other]})")
    return bad


MODULES = sorted(PACKAGE.rglob("*.py"))


def test_every_part_has_a_layer() -> None:
    parts = {_part(_module_name(p)) for p in MODULES}
    missing = sorted(parts - set(LAYERS))
    assert not missing, f"add these to LAYERS in tests/test_layers.py: {missing}"


@pytest.mark.parametrize("path", MODULES, ids=lambda p: str(p.relative_to(PACKAGE.parent)))
def test_imports_point_down(path: Path) -> None:
    bad = violations(path.read_text(encoding="utf-8"), _module_name(path),
                     path.name == "__init__.py")
    assert not bad, f"{path.relative_to(PACKAGE.parent)}: " + "; ".join(bad)


@pytest.mark.parametrize("source,name,expected", [
    ("from ..store import dataset\n", "tracelab.physics.x", 1),  # relative, upward
    ("import tracelab.cli\n", "tracelab.format.x", 1),
    ("from tracelab import workflow\n", "tracelab.report.x", 1),
    ("def f():\n    from tracelab.simulate import scenario\n", "tracelab.analyses.x", 1),
    ("from tracelab.analyses.timing import timing\n", "tracelab.forensics.x", 0),
    ("from tracelab.format.grammar import MAGIC\nfrom . import crc\n", "tracelab.physics.x", 0),
    ("from tracelab import __version__\nfrom tracelab.errors import InputError\n",
     "tracelab.format.x", 0),
])
def test_checker(source: str, name: str, expected: int) -> None:
    assert len(violations(source, name)) == expected


#: Within format/: the reader's parts, lower numbers lower; the fast and exact paths stay
#: apart (neither may lean on the other), and only reader.py puts them together.
FORMAT_LAYERS: dict[str, int] = {
    "grammar": 0, "compression": 0, "writer": 1,
    "chunk": 2, "blocks": 2,
    "header": 3, "exact": 3, "fast": 3,
    "reader": 4, "__init__": 5,
}


@pytest.mark.parametrize("path", sorted((PACKAGE / "format").glob("*.py")), ids=lambda p: p.stem)
def test_reader_parts_point_down(path: Path) -> None:
    assert path.stem in FORMAT_LAYERS, f"add format/{path.name} to FORMAT_LAYERS"
    me = FORMAT_LAYERS[path.stem]
    for line, target in _imports(path.read_text(encoding="utf-8"), _module_name(path),
                                 path.name == "__init__.py"):
        if not target.startswith("tracelab.format."):
            continue
        other = FORMAT_LAYERS[target.split(".")[2]]
        assert other < me, f"format/{path.name}:{line} imports {target}"
