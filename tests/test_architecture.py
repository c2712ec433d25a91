"""The layout's rules, read from the code's own import statements (no Django needed).

- The packages of the register (``models``, ``services``, ``field``, ``lead``, ``audit``,
  ``schedule``, ``api``, ``accounts``, ``management``) and its single modules, and the
  calcs packages (``adapter``, ``engine``), import each other without a cycle.
- Dependencies between the apps run one way: calcs reads the register; the register never
  imports calcs (it reaches it through ``register.calculations`` and task names).
- Nothing outside ``calcs/adapter`` imports ``calcs.engine``, except the engine itself and
  its command line (``python -m calcs``), which is pure like the engine.
- No star imports.

Function-level imports count as much as module-level ones: a cycle hidden inside a
function is still a cycle.
"""

from __future__ import annotations

import ast
import itertools
from pathlib import Path

ROOT = Path(__file__).resolve().parent.parent
SOURCES = ("register", "calcs", "config")
#: Packages that are one node of the graph each; any other module is a node of its own.
PACKAGES = (
    "register.models", "register.services", "register.field", "register.lead",
    "register.audit", "register.schedule", "register.api", "register.accounts",
    "register.management", "register.templatetags", "register.inbox", "calcs.adapter", "calcs.engine",
    "calcs.management",
)
ENGINE_USERS = ("calcs.adapter", "calcs.engine", "calcs.__main__")


def _modules() -> dict[str, Path]:
    found = {}
    for top in SOURCES:
        for path in (ROOT / top).rglob("*.py"):
            rel = path.relative_to(ROOT).with_suffix("")
            if "migrations" in rel.parts:
                continue
            parts = list(rel.parts)
            if parts[-1] == "__init__":
                parts = parts[:-1]
            found[".".join(parts)] = path
    return found


MODULES = _modules()


def _imports(name: str, path: Path) -> list[tuple[str, int, bool]]:
    """(imported module, line, is star import) for every import in the file."""
    tree = ast.parse(path.read_text(), filename=str(path))
    package = name if path.name == "__init__.py" else name.rpartition(".")[0]
    out = []
    for node in ast.walk(tree):
        if isinstance(node, ast.Import):
            out.extend((alias.name, node.lineno, False) for alias in node.names)
        elif isinstance(node, ast.ImportFrom):
            if node.level:
                base = package.split(".")
                base = base[: len(base) - (node.level - 1)]
                mod = ".".join(base + ([node.module] if node.module else []))
            else:
                mod = node.module or ""
            star = any(alias.name == "*" for alias in node.names)
            out.append((mod, node.lineno, star))
            for alias in node.names:  # "from register import services" imports a module
                if f"{mod}.{alias.name}" in MODULES:
                    out.append((f"{mod}.{alias.name}", node.lineno, False))
    return out


def _node(module: str) -> str | None:
    for pkg in PACKAGES:
        if module == pkg or module.startswith(pkg + "."):
            return pkg
    while module and module not in MODULES:
        module = module.rpartition(".")[0]
    return module or None


def _graph() -> dict[str, dict[str, list[str]]]:
    graph: dict[str, dict[str, list[str]]] = {}
    for name, path in MODULES.items():
        src = _node(name)
        for target, line, _star in _imports(name, path):
            dst = _node(target)
            if dst is None or dst == src or dst in ("register", "calcs"):
                continue
            graph.setdefault(src, {}).setdefault(dst, []).append(f"{path.relative_to(ROOT)}:{line}")
    return graph


def _cycles(graph) -> list[list[str]]:
    """Every elementary cycle found by depth-first search (enough to report one per loop)."""
    seen_cycles, state, stack = [], {}, []

    def visit(node):
        state[node] = "open"
        stack.append(node)
        for nxt in graph.get(node, {}):
            if state.get(nxt) == "open":
                seen_cycles.append(stack[stack.index(nxt):] + [nxt])
            elif nxt not in state:
                visit(nxt)
        stack.pop()
        state[node] = "done"

    for node in sorted(graph):
        if node not in state:
            visit(node)
    return seen_cycles


def test_the_tree_is_read():
    assert "register.models.design" in MODULES and "calcs.adapter.assessment" in MODULES
    graph = _graph()
    assert "register.models" in graph["register.lead"], "the reader must see the lead's imports"


def test_no_import_cycle_between_packages():
    graph = _graph()
    cycles = _cycles(graph)
    described = []
    for cycle in cycles:
        hops = [f"{a} -> {b} ({graph[a][b][0]})" for a, b in itertools.pairwise(cycle)]
        described.append("; ".join(hops))
    assert not cycles, "import cycles:\n" + "\n".join(described)


def test_the_register_never_imports_calcs():
    offenders = [f"{path.relative_to(ROOT)}:{line} imports {target}"
                 for name, path in MODULES.items() if name.startswith("register")
                 for target, line, _ in _imports(name, path)
                 if target == "calcs" or target.startswith("calcs.")]
    assert not offenders, "\n".join(offenders)


def test_only_the_adapter_imports_the_engine():
    offenders = [f"{path.relative_to(ROOT)}:{line} imports {target}"
                 for name, path in MODULES.items()
                 if not any(name == u or name.startswith(u + ".") for u in ENGINE_USERS)
                 for target, line, _ in _imports(name, path)
                 if target == "calcs.engine" or target.startswith("calcs.engine.")]
    assert not offenders, "\n".join(offenders)


def test_no_star_imports():
    """Settings modules layer on ``config.settings.base`` with a star import, Django's own
    convention for settings; nothing else may."""
    stars = [f"{path.relative_to(ROOT)}:{line}" for name, path in MODULES.items()
             if not name.startswith("config.settings.")
             for _target, line, star in _imports(name, path) if star]
    assert not stars, stars


def test_a_planted_cycle_is_found():
    """The checker itself: a two-node loop must be reported."""
    assert _cycles({"a": {"b": ["x"]}, "b": {"a": ["y"]}}) == [["a", "b", "a"]]
