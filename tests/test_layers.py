"""The package's imports point one way, down the layers DEVELOPERS.md draws; no module reaches into
another's private names. Read from the source with `ast` (function-level imports included), so a lazy
import cannot hide an arrow that runs back up."""
from __future__ import annotations

import ast
from pathlib import Path

import pytest

PACKAGE = Path(__file__).resolve().parent.parent / "nbkit"

# Lowest first. A module may import its own layer and the layers below it, never one above.
LAYERS = [
    ("nbkit.errors", "nbkit.version"),
    ("nbkit.measure",),
    ("nbkit.store",),
    ("nbkit.analyze",),
    ("nbkit.recording",),
    ("nbkit.record",),
    ("nbkit.replay",),
    ("nbkit.views",),
    ("nbkit.integrations",),         # the trainer callbacks: optional frameworks, imported at their top
    ("nbkit.demo",),
    ("nbkit",),                      # the facade: nbkit/__init__.py
    ("nbkit.commands",),
    ("nbkit.cli",),
]

# The only imports allowed inside a function: dependencies a user may not have, imported where used.
OPTIONAL_AT_CALL = {
    "torch.distributed.algorithms.ddp_comm_hooks.default_hooks":
        "a torch built without distributed support has no communication hooks",
}


def module_name(path: Path) -> str:
    parts = path.relative_to(PACKAGE.parent).with_suffix("").parts
    return ".".join(parts[:-1] if parts[-1] == "__init__" else parts)


def layer_of(module: str) -> int:
    best, depth = None, -1
    for index, prefixes in enumerate(LAYERS):
        for prefix in prefixes:
            if (module == prefix or module.startswith(prefix + ".")) and prefix.count(".") > depth:
                best, depth = index, prefix.count(".")
    assert best is not None, f"{module} is in no layer: add it to LAYERS and to DEVELOPERS.md"
    return best


def is_module(name: str) -> bool:
    path = PACKAGE.parent.joinpath(*name.split("."))
    return path.with_suffix(".py").is_file() or (path / "__init__.py").is_file()


def imports_of(path: Path, module: str):
    """(imported module, line, at module level?, private names taken) for every import in the file."""
    tree = ast.parse(path.read_text(), filename=str(path))
    package = module if path.name == "__init__.py" else module.rpartition(".")[0]
    nested = set()
    for node in ast.walk(tree):
        if isinstance(node, (ast.FunctionDef, ast.AsyncFunctionDef, ast.ClassDef, ast.Lambda)):
            nested.update(id(child) for child in ast.walk(node) if child is not node)
    for node in ast.walk(tree):
        top = id(node) not in nested
        if isinstance(node, ast.Import):
            for alias in node.names:
                yield alias.name, node.lineno, top, []
        elif isinstance(node, ast.ImportFrom):
            base = node.module or ""
            if node.level:
                base = ".".join(package.split(".")[:len(package.split(".")) - node.level + 1] + ([base] if base else []))
            for alias in node.names:
                full = f"{base}.{alias.name}"
                target = full if base.startswith("nbkit") and is_module(full) else base
                private = [alias.name] if alias.name.startswith("_") and not alias.name.startswith("__") else []
                yield target, node.lineno, top, private


def package_files() -> list[tuple[Path, str]]:
    return [(path, module_name(path)) for path in sorted(PACKAGE.rglob("*.py"))]


def upward_imports(files) -> list[str]:
    found = []
    for path, source in files:
        for target, line, _, _ in imports_of(path, source):
            if (target == "nbkit" or target.startswith("nbkit.")) and layer_of(target) > layer_of(source):
                found.append(f"{path.name}:{line} {source} -> {target}")
    return found


def hidden_imports(files) -> list[str]:
    return [f"{path.name}:{line} {source} imports {target} inside a function"
            for path, source in files for target, line, top, _ in imports_of(path, source)
            if not top and target not in OPTIONAL_AT_CALL]


def private_reach(files) -> list[str]:
    """`from nbkit.x import _y`, and `m._y` where `m` names an imported nbkit module."""
    found = [f"{path.name}:{line} {source} takes {private} from {target}"
             for path, source in files for target, line, _, private in imports_of(path, source)
             if private and target.startswith("nbkit")]
    for path, source in files:
        tree = ast.parse(path.read_text())
        modules = set()
        for node in ast.walk(tree):
            if isinstance(node, ast.Import):
                modules.update(a.asname for a in node.names if a.name.startswith("nbkit") and a.asname)
            elif isinstance(node, ast.ImportFrom) and (node.module or "").startswith("nbkit"):
                modules.update(a.asname or a.name for a in node.names if is_module(f"{node.module}.{a.name}"))
        for node in ast.walk(tree):
            if (isinstance(node, ast.Attribute) and isinstance(node.value, ast.Name) and node.value.id in modules
                    and node.attr.startswith("_") and not node.attr.startswith("__")):
                found.append(f"{path.name}:{node.lineno} {source} takes {node.attr} from module {node.value.id}")
    return found


def test_every_import_points_down_the_layers():
    found = upward_imports(package_files())
    assert not found, "imports that run back up the layers:\n" + "\n".join(found)


def test_function_level_imports_are_only_optional_dependencies():
    found = hidden_imports(package_files())
    assert not found, "\n".join(found)


def test_no_module_imports_a_private_name_of_another():
    found = private_reach(package_files())
    assert not found, "\n".join(found)


def test_the_import_graph_has_no_cycle():
    edges = {source: {t for t, _, top, _ in imports_of(path, source) if top and t.startswith("nbkit")}
             for path, source in package_files()}
    cycles, state = [], {}

    def visit(node, trail):
        state[node] = "open"
        for nxt in sorted(edges.get(node, ())):
            if state.get(nxt) == "open":
                cycles.append(" -> ".join(trail[trail.index(nxt):] + [nxt]))
            elif nxt in edges and nxt not in state:
                visit(nxt, trail + [nxt])
        state[node] = "done"

    for node in sorted(edges):
        if node not in state:
            visit(node, [node])
    assert not cycles, "\n".join(cycles)


@pytest.mark.parametrize("upward", ["nbkit.replay.loop", "nbkit.views.explorer"])
def test_the_check_sees_an_upward_import_even_inside_a_function(tmp_path, upward):
    probe = tmp_path / "probe.py"
    probe.write_text(f"from nbkit.store import layout\n\n\ndef f():\n    import {upward}\n"
                     "    from nbkit.record.recorder import _hidden\n    return layout._secret\n")
    files = [(probe, "nbkit.store.probe")]
    assert upward_imports(files) == [f"probe.py:5 nbkit.store.probe -> {upward}",
                                     "probe.py:6 nbkit.store.probe -> nbkit.record.recorder"]
    assert len(hidden_imports(files)) == 2
    assert private_reach(files) == ["probe.py:6 nbkit.store.probe takes ['_hidden'] from nbkit.record.recorder",
                                    "probe.py:7 nbkit.store.probe takes _secret from module layout"]
