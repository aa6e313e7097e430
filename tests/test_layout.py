"""The package's layout stays as the contributor guide draws it: no import circle between qcmon's modules, and no
module reaching into another's private parts.

Read from the source with :mod:`ast` (every import statement, also those inside functions, which run later but
still tie the two modules together; imports under ``if TYPE_CHECKING:`` are left out, as they never run). The cycle
check is the standard library's :class:`graphlib.TopologicalSorter`, which raises :class:`graphlib.CycleError` on a
circle (Python documentation, graphlib).
"""

from __future__ import annotations

import ast
import graphlib
import sys
from pathlib import Path

import pytest

import qcmon

PACKAGE_DIR = Path(qcmon.__file__).parent


def _module_name(path: Path) -> str:
    parts = list(path.relative_to(PACKAGE_DIR.parent).with_suffix("").parts)
    return ".".join(parts[:-1] if parts[-1] == "__init__" else parts)


def _modules() -> dict[str, Path]:
    return {_module_name(p): p for p in sorted(PACKAGE_DIR.rglob("*.py"))}


def _is_type_checking(test: ast.expr) -> bool:
    return (isinstance(test, ast.Name) and test.id == "TYPE_CHECKING") or (
        isinstance(test, ast.Attribute) and test.attr == "TYPE_CHECKING")


def _import_nodes(tree: ast.AST):
    """Import statements of a module, leaving out the bodies of ``if TYPE_CHECKING:``."""
    stack = [tree]
    while stack:
        node = stack.pop()
        if isinstance(node, (ast.Import, ast.ImportFrom)):
            yield node
            continue
        if isinstance(node, ast.If) and _is_type_checking(node.test):
            stack.extend(node.orelse)
            continue
        stack.extend(ast.iter_child_nodes(node))


def imports_of(name: str, path: Path, modules: dict[str, Path]) -> list[tuple[str, str | None, int]]:
    """``(module imported, name taken from it or None, line)`` for each of qcmon's modules that ``name`` imports.

    ``from package import sub`` counts as importing the module ``package.sub`` when there is one."""
    package = name if path.name == "__init__.py" else name.rpartition(".")[0]
    out = []
    for node in _import_nodes(ast.parse(path.read_text(encoding="utf-8"), filename=str(path))):
        if isinstance(node, ast.Import):
            out += [(a.name, None, node.lineno) for a in node.names if a.name.split(".")[0] == "qcmon"]
            continue
        if node.level:
            base = package.split(".")[: len(package.split(".")) - (node.level - 1)]
            source = ".".join(base + ([node.module] if node.module else []))
        else:
            source = node.module or ""
        if source.split(".")[0] != "qcmon":
            continue
        for alias in node.names:
            sub = f"{source}.{alias.name}"
            out.append((sub, None, node.lineno) if sub in modules else (source, alias.name, node.lineno))
    return out


def _private(part: str) -> bool:
    return part.startswith("_") and not (part.startswith("__") and part.endswith("__"))


def _graph() -> tuple[dict[str, Path], dict[str, set[str]]]:
    modules = _modules()
    graph = {name: set() for name in modules}
    for name, path in modules.items():
        for target, _, _ in imports_of(name, path, modules):
            if target != name:
                graph[name].add(target)
    return modules, graph


def find_cycle(graph: dict[str, set[str]]) -> list[str] | None:
    """A circle of imports in ``graph`` (module → modules it imports), or None."""
    try:
        tuple(graphlib.TopologicalSorter(graph).static_order())
    except graphlib.CycleError as err:
        return list(err.args[1])
    return None


def private_reaches(modules: dict[str, Path]) -> list[str]:
    """Each import of a private name (``_x``) from another module, and of a private module (``_x.py``) from outside
    the package that holds it, as ``"importer:line imports what"``."""
    bad = []
    for name, path in modules.items():
        for target, taken, line in imports_of(name, path, modules):
            if taken is not None and _private(taken):
                bad.append(f"{name}:{line} imports {taken} from {target}")
            parts = target.split(".")
            for i, part in enumerate(parts):
                if _private(part):
                    owner = ".".join(parts[:i])  # the package holding the private module
                    if not (name == owner or name.startswith(owner + ".")):
                        bad.append(f"{name}:{line} imports {target}, private to {owner}")
                    break
    return sorted(bad)


#: The rooms of the package from the bottom up (the contributor guide's diagram): a module imports from its own room
#: or from rooms on lower floors only, never sideways or up.
FLOORS: tuple[dict[str, tuple[str, ...]], ...] = (
    {"vocabulary": ("qcmon", "qcmon.frames", "qcmon.columns", "qcmon.events", "qcmon.status", "qcmon.errors")},
    {"metrics": ("qcmon.metrics",), "sources": ("qcmon.sources",), "simulate": ("qcmon.simulate",)},
    {"engine": ("qcmon.engine",), "thresholds": ("qcmon.thresholds", "qcmon.advice")},
    {"record": ("qcmon.record",)},
    {"monitor": ("qcmon.monitor",), "arguments": ("qcmon.arguments",)},
    {"ui": ("qcmon.ui",), "audit": ("qcmon.audit",)},
    {"entry": ("qcmon.cli", "qcmon.demo", "qcmon.__main__")},
)


def room_of(module: str) -> tuple[int, str]:
    """``(floor, room)`` of a module: the room whose longest prefix it carries."""
    best = None
    for floor, rooms in enumerate(FLOORS):
        for room, prefixes in rooms.items():
            for prefix in prefixes:
                if module == prefix or (prefix != "qcmon" and module.startswith(prefix + ".")):
                    if best is None or len(prefix) > best[0]:
                        best = (len(prefix), floor, room)
    if best is None:
        raise LookupError(f"{module} is in no room of FLOORS: give it one (and a place in DEVELOPERS.md)")
    return best[1], best[2]


def upward_imports(graph: dict[str, set[str]]) -> list[str]:
    """Each import that goes sideways (another room on the same floor) or up, as ``"importer -> imported"``."""
    bad = []
    for name, targets in graph.items():
        floor, room = room_of(name)
        for target in targets:
            t_floor, t_room = room_of(target)
            if t_room != room and t_floor >= floor:
                bad.append(f"{name} ({room}) -> {target} ({t_room})")
    return sorted(bad)


def test_imports_go_down_the_floors_of_the_guide():
    _, graph = _graph()
    assert upward_imports(graph) == []
    # the rule at work: the engine may not use the record, nor the metrics the sources
    assert upward_imports({"qcmon.engine": {"qcmon.record.journal"}, "qcmon.metrics.focus": {"qcmon.sources"},
                           "qcmon.record.journal": {"qcmon.record.summary", "qcmon.events"}}) == [
        "qcmon.engine (engine) -> qcmon.record.journal (record)",
        "qcmon.metrics.focus (metrics) -> qcmon.sources (sources)"]


def test_the_package_has_no_import_circle():
    modules, graph = _graph()
    assert len(modules) > 50  # the walk found the package (a wrong root would pass on nothing)
    assert graph["qcmon.cli"]  # and the imports in it
    assert find_cycle(graph) is None, " -> ".join(find_cycle(graph))


def test_no_module_imports_private_parts_of_another():
    assert private_reaches(_modules()) == []


def test_the_checks_see_a_circle_and_a_private_import(tmp_path, monkeypatch):
    # The guard itself: a small package with both faults must be caught (a check that cannot fail is no check).
    pkg = tmp_path / "qcmon"
    (pkg / "inner").mkdir(parents=True)
    (pkg / "__init__.py").write_text("")
    (pkg / "a.py").write_text("def f():\n    from qcmon.b import g\n")  # inside a function: still a tie
    (pkg / "b.py").write_text("from qcmon import a\nfrom qcmon.inner._hidden import h\nfrom qcmon.a import _f\n")
    (pkg / "c.py").write_text("from typing import TYPE_CHECKING\nif TYPE_CHECKING:\n    from qcmon.d import x\n")
    (pkg / "d.py").write_text("from qcmon.c import y\n")
    (pkg / "inner" / "__init__.py").write_text("")
    (pkg / "inner" / "_hidden.py").write_text("")
    (pkg / "inner" / "user.py").write_text("from qcmon.inner import _hidden\nfrom ._hidden import h\n")
    monkeypatch.setattr(sys.modules[__name__], "PACKAGE_DIR", pkg)
    modules, graph = _graph()
    assert sorted(find_cycle(graph)[:-1]) == ["qcmon.a", "qcmon.b"]
    assert graph["qcmon.c"] == set()  # an import only for type checkers is no tie
    assert private_reaches(modules) == [
        "qcmon.b:2 imports qcmon.inner._hidden, private to qcmon.inner",
        "qcmon.b:3 imports _f from qcmon.a",
    ]


def test_pyproject_lists_every_package_and_bundles_the_profiles():
    # the package list is written out (the profiles map from thresholds/ onto qcmon.profiles), so a new package
    # folder must be added there or it would be missing from an installed qcmon
    try:
        import tomllib
    except ModuleNotFoundError:  # Python 3.10
        import tomli as tomllib
    root = PACKAGE_DIR.parent
    conf = tomllib.loads((root / "pyproject.toml").read_text())["tool"]["setuptools"]
    folders = {_module_name(p.parent / "__init__.py") for p in PACKAGE_DIR.rglob("__init__.py")}
    assert set(conf["packages"]) == folders | {"qcmon.profiles"}
    assert conf["package-dir"]["qcmon.profiles"] == "thresholds"
    assert "*.toml" in conf["package-data"]["qcmon.profiles"]
    assert sorted((root / "thresholds").glob("*.toml")), "no bundled profile in thresholds/"


def test_profiles_are_found_where_an_installed_package_keeps_them(tmp_path, monkeypatch):
    # an installed (not editable) qcmon has no thresholds/ beside the package, only qcmon/profiles/
    import qcmon.thresholds as th

    pkg = tmp_path / "site" / "qcmon"
    (pkg / "profiles").mkdir(parents=True)
    (pkg / "__init__.py").write_text("")
    monkeypatch.setattr(th.qcmon, "__file__", str(pkg / "__init__.py"))
    monkeypatch.delenv("QCMON_THRESHOLDS", raising=False)
    assert th.profile_dirs() == [pkg / "profiles"]
