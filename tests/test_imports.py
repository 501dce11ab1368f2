"""The layering rules of DEVELOPERS.md, checked by parsing every module's imports with ``ast``.

* ``chainvigil.estimators`` imports no project module (pure numerics);
* ``chainvigil.storage`` imports nothing of chainvigil outside ``chainvigil.storage``;
* ``chainvigil.tui`` imports only ``chainvigil.storage.history`` (the reader) and itself;
* no module-level import cycle among project modules;
* nothing imports ``monitor``/``storage``/``tui``/``simulated_chains`` as top-level names.

Every import counts, including those inside functions, except for the cycle check, which follows
module-level imports only (an import inside a function runs later and cannot deadlock start-up).
"""
from __future__ import annotations

import ast
import functools
from pathlib import Path

import pytest

REPO = Path(__file__).resolve().parent.parent
PACKAGE_DIRS = {"chainvigil": REPO / "monitor", "chainvigil.storage": REPO / "storage",
                "chainvigil.tui": REPO / "tui", "chainvigil.simulated_chains": REPO / "simulated_chains"}
OLD_NAMES = ("monitor", "storage", "tui", "simulated_chains")


def _modules() -> dict[str, Path]:
    found = {}
    for package, folder in PACKAGE_DIRS.items():
        for path in sorted(folder.rglob("*.py")):
            rel = path.relative_to(folder).with_suffix("")
            parts = [p for p in rel.parts if p != "__init__"]
            name = ".".join([package, *parts])
            if package == "chainvigil" and parts and parts[0] in ("storage", "tui", "simulated_chains"):
                continue
            found[name] = path
    return found


MODULES = _modules()


def _statements(tree: ast.Module):
    """Every statement in the file, however deeply nested (in functions, classes, loops, ``with``,
    ``try``/``except``, ``match``).  An import is a statement, so the expressions (most of the
    tree) are not walked."""
    stack = list(tree.body)
    while stack:
        node = stack.pop()
        yield node
        for field in ("body", "orelse", "finalbody", "handlers", "cases"):
            children = getattr(node, field, None)
            if not isinstance(children, list):  # e.g. a lambda's body is one expression
                continue
            for child in children:
                stack.extend(child.body if isinstance(child, (ast.ExceptHandler, ast.match_case))
                             else [child])


def _module_level(tree: ast.Module):
    """The module-level statements, including those inside module-level if/try blocks."""
    stack = list(tree.body)
    while stack:
        node = stack.pop()
        yield node
        if isinstance(node, (ast.If, ast.Try)):
            stack.extend(node.body + node.orelse + getattr(node, "finalbody", [])
                         + [h for handler in getattr(node, "handlers", []) for h in handler.body])


def _plain(nodes) -> tuple:
    """Import statements as plain tuples ``(kind, line, module, level, names)``."""
    out = []
    for node in nodes:
        if isinstance(node, ast.Import):
            out.append(("import", node.lineno, None, 0, tuple(alias.name for alias in node.names)))
        elif isinstance(node, ast.ImportFrom):
            out.append(("from", node.lineno, node.module, node.level,
                        tuple(alias.name for alias in node.names)))
    return tuple(out)


@functools.lru_cache(maxsize=None)
def _import_statements(path: Path) -> tuple[tuple, tuple]:
    """(every import statement, the module-level ones) of the file as plain tuples.  Each file is
    parsed once per session and only these tuples are kept: a cache of the parsed trees (millions
    of objects) made every later garbage collection of the test session walk them all."""
    tree = ast.parse(path.read_bytes(), filename=str(path))
    return _plain(_statements(tree)), _plain(_module_level(tree))


def _imports(name: str, path: Path, module_level_only: bool = False) -> list[tuple[str, int]]:
    """(imported module, line) for every import in the file; relative imports resolved."""
    package = name if path.name == "__init__.py" else name.rsplit(".", 1)[0]
    every, module_level = _import_statements(path)
    out = []
    for kind, line, module, level, names in (module_level if module_level_only else every):
        if kind == "import":  # import a, b.c
            out += [(alias, line) for alias in names]
            continue
        if level:
            base = package.split(".")
            base = base[:len(base) - (level - 1)] if level > 1 else base
            mod = ".".join(base + ([module] if module else []))
        else:
            mod = module or ""
        out.append((mod, line))
        for alias in names:  # "from chainvigil import verdict" imports a module
            if f"{mod}.{alias}" in MODULES:
                out.append((f"{mod}.{alias}", line))
    return out


def _project(target: str) -> bool:
    return target == "chainvigil" or target.startswith("chainvigil.")


def _violations(prefix: str, allowed) -> list[str]:
    bad = []
    for name, path in MODULES.items():
        if not (name == prefix or name.startswith(prefix + ".")):
            continue
        for target, line in _imports(name, path):
            if _project(target) and not allowed(target):
                bad.append(f"{path.relative_to(REPO)}:{line} imports {target}")
    return bad


def test_the_module_list_is_complete():
    # Positive control: the walker sees the modules the rules are about.
    for name in ("chainvigil.service", "chainvigil.estimators.psis", "chainvigil.storage.history",
                 "chainvigil.tui.app", "chainvigil.rules", "chainvigil.ingest", "chainvigil.scorer_lifecycle",
                 "chainvigil.joint_passes", "chainvigil.mixing_schedule", "chainvigil.cadence",
                 "chainvigil.comparisons", "chainvigil.service_part"):
        assert name in MODULES, name


def test_estimators_import_no_project_module():
    assert _violations("chainvigil.estimators",
                       lambda t: t.startswith("chainvigil.estimators")) == []


def test_storage_imports_only_storage():
    assert _violations("chainvigil.storage", lambda t: t.startswith("chainvigil.storage")) == []


def test_tui_imports_only_the_history_reader():
    assert _violations("chainvigil.tui", lambda t: t.startswith("chainvigil.tui")
                       or t == "chainvigil.storage.history") == []


def test_the_checker_catches_a_violation(tmp_path):
    """Positive control: an estimator importing the service is reported."""
    fake = tmp_path / "bad.py"
    fake.write_text("import numpy\nfrom chainvigil.service import Service\n")
    found = [t for t, _ in _imports("chainvigil.estimators.bad", fake) if _project(t)]
    assert found == ["chainvigil.service"]


def test_the_checker_finds_imports_nested_anywhere(tmp_path):
    """Positive control for the statement walk: imports inside functions, classes, loops, ``with``,
    every part of ``try`` and ``match`` are found."""
    fake = tmp_path / "nested.py"
    fake.write_text(
        "class A:\n"
        "    def f(self):\n"
        "        for _ in ():\n"
        "            with open('x'):\n"
        "                import chainvigil.a\n"
        "        else:\n"
        "            import chainvigil.b\n"
        "async def g():\n"
        "    try:\n"
        "        import chainvigil.c\n"
        "    except ImportError:\n"
        "        import chainvigil.d\n"
        "    else:\n"
        "        import chainvigil.e\n"
        "    finally:\n"
        "        while True:\n"
        "            from chainvigil import f\n"
        "match 1:\n"
        "    case 1:\n"
        "        if True:\n"
        "            pass\n"
        "        else:\n"
        "            import chainvigil.g\n"
        "f = lambda: __import__('os')\n")
    found = sorted(t for t, _ in _imports("chainvigil.estimators.nested", fake) if _project(t))
    assert found == ["chainvigil", *(f"chainvigil.{x}" for x in "abcdeg")]


def test_no_old_top_level_names():
    bad = []
    for name, path in list(MODULES.items()) + [(f"tests.{p.stem}", p) for p in (REPO / "tests").glob("*.py")] \
            + [(f"bench.{p.stem}", p) for p in (REPO / "bench").glob("*.py")]:
        for target, line in _imports(name, path):
            if target.split(".")[0] in OLD_NAMES:
                bad.append(f"{path.relative_to(REPO)}:{line} imports {target}")
    assert bad == []


def _graph() -> dict[str, set]:
    graph = {}
    for name, path in MODULES.items():
        graph[name] = set()
        for target, _ in _imports(name, path, module_level_only=True):
            # a module's own parent package is already being imported (``from . import x`` takes
            # the submodule x), so it is not an edge
            if target in MODULES and target != name and not name.startswith(target + "."):
                graph[name].add(target)
            # importing a package runs its __init__: "chainvigil.x.y" implies "chainvigil.x"
            parts = target.split(".")
            for i in range(1, len(parts)):
                parent = ".".join(parts[:i])
                if parent in MODULES and parent != name and not name.startswith(parent + "."):
                    graph[name].add(parent)
    return graph


def _cycles(graph: dict[str, set]) -> list[list[str]]:
    """Strongly connected components with more than one module (Tarjan)."""
    index, low, stack, on, out, counter = {}, {}, [], set(), [], [0]

    def visit(v):
        index[v] = low[v] = counter[0]
        counter[0] += 1
        stack.append(v)
        on.add(v)
        for w in graph.get(v, ()):
            if w not in index:
                visit(w)
                low[v] = min(low[v], low[w])
            elif w in on:
                low[v] = min(low[v], index[w])
        if low[v] == index[v]:
            comp = []
            while True:
                w = stack.pop()
                on.discard(w)
                comp.append(w)
                if w == v:
                    break
            if len(comp) > 1:
                out.append(sorted(comp))

    for v in sorted(graph):
        if v not in index:
            visit(v)
    return out


def test_cycle_finder_finds_a_cycle():
    assert _cycles({"a": {"b"}, "b": {"c"}, "c": {"a"}, "d": {"a"}}) == [["a", "b", "c"]]


def test_no_module_level_import_cycles():
    assert _cycles(_graph()) == []


def test_cli_and_demo_do_not_import_each_other_in_a_circle():
    cli = {t for t, _ in _imports("chainvigil.cli", MODULES["chainvigil.cli"])}
    demo = {t for t, _ in _imports("chainvigil.demo", MODULES["chainvigil.demo"])}
    circle = "chainvigil.demo" in cli and "chainvigil.cli" in demo
    assert not circle, "cli and demo import each other"
