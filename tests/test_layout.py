"""The package's folders import one way, from the service and the command line down to the maps, with no circles.

Read from the source with ``ast`` (imports inside functions included, since
lazy imports are still dependencies); each folder's ``__init__`` says the
same in its docstring.
"""

from __future__ import annotations

import ast
from pathlib import Path

PACKAGE = Path(__file__).resolve().parents[1] / "service" / "veil"

# Bottom first: a module may import its own layer's folder and the layers below it, never one above.
LAYERS: list[set[str]] = [
    {"errors", "progress", "defaults"},
    {"samples"},
    {"maps"},
    {"erasers"},
    {"audit"},
    {"checks"},
    {"registry"},
    {"reporting"},
    {"fitting", "cleaning", "patrol"},
    {"server"},
    {"cli"},
    {"demo", "__init__", "__main__"},
]
LAYER_OF = {area: level for level, areas in enumerate(LAYERS) for area in areas}


def module_name(path: Path) -> str:
    parts = path.relative_to(PACKAGE.parent).with_suffix("").parts
    return ".".join(parts[:-1] if parts[-1] == "__init__" else parts)


def area_of(module: str) -> str:
    parts = module.split(".")
    return parts[1] if len(parts) > 1 else "__init__"


def imports_of(path: Path, module: str) -> set[str]:
    """Every ``veil`` module ``path`` imports, resolved to the module (not the name) it takes."""
    found: set[str] = set()
    package = module if path.name == "__init__.py" else module.rsplit(".", 1)[0]
    for node in ast.walk(ast.parse(path.read_text(), filename=str(path))):
        if isinstance(node, ast.Import):
            found.update(alias.name for alias in node.names if alias.name.split(".")[0] == "veil")
        elif isinstance(node, ast.ImportFrom):
            base = node.module or ""
            if node.level:
                anchor = package.split(".")[: len(package.split(".")) - node.level + 1]
                base = ".".join([*anchor, base] if base else anchor)
            if base.split(".")[0] != "veil":
                continue
            for alias in node.names:
                candidate = f"{base}.{alias.name}"
                found.add(candidate if candidate in MODULES else base)
    return found - {module}


MODULES = {module_name(path): path for path in PACKAGE.rglob("*.py")}
GRAPH = {module: imports_of(path, module) for module, path in MODULES.items()}


def test_every_folder_is_in_a_layer() -> None:
    assert {area_of(module) for module in MODULES} <= set(LAYER_OF)


def test_imports_never_run_back_up() -> None:
    upward = [
        f"{module} imports {target}"
        for module, targets in GRAPH.items()
        for target in targets
        if LAYER_OF[area_of(target)] > LAYER_OF[area_of(module)]
    ]
    assert upward == []


def test_there_are_no_import_circles() -> None:
    # Tarjan's strongly connected components: any component of more than one module is a circle.
    index: dict[str, int] = {}
    low: dict[str, int] = {}
    stack: list[str] = []
    on_stack: set[str] = set()
    circles: list[list[str]] = []

    def visit(node: str) -> None:
        index[node] = low[node] = len(index)
        stack.append(node)
        on_stack.add(node)
        for target in GRAPH.get(node, set()):
            if target not in MODULES:
                continue
            if target not in index:
                visit(target)
                low[node] = min(low[node], low[target])
            elif target in on_stack:
                low[node] = min(low[node], index[target])
        if low[node] == index[node]:
            component = []
            while True:
                member = stack.pop()
                on_stack.discard(member)
                component.append(member)
                if member == node:
                    break
            if len(component) > 1:
                circles.append(sorted(component))

    for module in sorted(MODULES):
        if module not in index:
            visit(module)
    assert circles == []


def test_every_folder_says_what_it_holds_and_what_it_may_import() -> None:
    for init in PACKAGE.glob("*/__init__.py"):
        docstring = ast.get_docstring(ast.parse(init.read_text())) or ""
        assert "may import" in docstring.lower(), f"{init.parent.name}/__init__.py does not say what it may import"
