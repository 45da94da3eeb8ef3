"""The package's layering, read from the source with Python's own parser (the ``ast`` module of the
standard library): no library module imports from a layer above its own, and no verb module imports
another verb module. The layers are the ones DEVELOPERS.md lists (our own rule, not an outside
reference; this test is what keeps the rule true).
"""

from __future__ import annotations

import ast
from pathlib import Path

SRC = Path(__file__).resolve().parents[1] / "src" / "kinecast"
# lowest first; a module may import from its own layer and those below
LAYERS = [
    {"errors", "fileio", "config", "heap"},
    {"frames", "render", "plots"},
    {"rigs", "model", "runfolder"},
    {"train"},
    {"forecast"},
    {"score"},
]
VERB_FILES = {"cli.py", "fill_cli.py", "config_cli.py"}


def layer_of(top: str) -> int | None:
    return next((i for i, names in enumerate(LAYERS) if top in names), None)


def imported_tops(path: Path, pkg: tuple | None = None) -> list[tuple[int, str]]:
    """(line, dotted kinecast name) of every kinecast import in ``path``, relative ones resolved
    against ``pkg`` (default: the package ``path`` sits in)."""
    pkg = path.relative_to(SRC).parts[:-1] if pkg is None else pkg
    out = []
    for node in ast.walk(ast.parse(path.read_text(encoding="utf-8"))):
        if isinstance(node, ast.ImportFrom):
            if node.level:
                base = list(pkg[:len(pkg) - (node.level - 1)])
                parts = base + (node.module.split(".") if node.module else [])
                names = [parts + [a.name] for a in node.names] if not parts else [parts]
            elif node.module and node.module.split(".")[0] == "kinecast":
                names = [node.module.split(".")[1:] or [a.name for a in node.names][:1]]
            else:
                continue
            out += [(node.lineno, ".".join(n)) for n in names if n]
        elif isinstance(node, ast.Import):
            out += [(node.lineno, a.name.split(".", 1)[1]) for a in node.names
                    if a.name.startswith("kinecast.")]
    return out


def module_files():
    return sorted(p for p in SRC.rglob("*.py") if p.name != "__main__.py")


def test_no_library_module_imports_from_a_higher_layer():
    bad = []
    for path in module_files():
        if path.name in VERB_FILES or path.parent == SRC and path.stem in ("__init__", "verbs"):
            continue  # verb modules and the package front sit above every library layer
        rel = path.relative_to(SRC)
        own = layer_of(rel.parts[0] if len(rel.parts) > 1 else rel.stem)
        assert own is not None, f"{rel} is in no layer of this test (add it to LAYERS and DEVELOPERS.md)"
        for line, name in imported_tops(path):
            other = layer_of(name.split(".")[0])
            if other is not None and other > own:
                bad.append(f"{rel}:{line} imports {name}")
    assert not bad, "imports from a higher layer:\n" + "\n".join(bad)


def test_no_verb_module_imports_another():
    bad = []
    for path in module_files():
        if path.name not in VERB_FILES or path.parent == SRC:
            continue  # the top-level cli.py wires the verbs together
        for line, name in imported_tops(path):
            if name.split(".")[-1] in {f[:-3] for f in VERB_FILES}:
                bad.append(f"{path.relative_to(SRC)}:{line} imports {name}")
    assert not bad, "verb modules importing verb modules:\n" + "\n".join(bad)


def test_the_checker_sees_upward_imports(tmp_path):
    # the checker itself can fail: relative and absolute imports are resolved to their kinecast names
    probe = tmp_path / "probe.py"
    probe.write_text("from ..score import verdict\nfrom .. import config\nimport kinecast.forecast.core\n"
                     "from . import stages\n", encoding="utf-8")
    assert imported_tops(probe, pkg=("train",)) == [
        (1, "score"), (2, "config"), (3, "forecast.core"), (4, "train")]
