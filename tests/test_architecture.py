"""Who may import whom: an allow-list of module groups, checked on every import form.

``GROUPS`` below is the one table. Each group lists its modules by dotted name (``"bench.store"``
is that module only, ``"bench.analysis.*"`` the package and everything under it) and the groups
it may import; a group may always import its own modules, and an entry with a dot in
``may import`` names a single module instead of a group (the simulator may read TOML through
``bench.tomlsource`` without being allowed the sequence and bench-file models). Groups are
listed from the bottom up: a group may only name groups above it in the table, so lower layers
never import higher ones. Nothing imports ``cli``.

The table describes the target shape. Modules that do not exist yet are fine; every module that
exists must belong to exactly one group. ``docs/architecture.md`` carries the same table,
rendered by :func:`render_table`; after editing ``GROUPS`` regenerate it with::

    python tests/test_architecture.py --write-docs

Module names follow the installed layout: ``drivers/`` installs as ``bench.drivers`` and
``sequences/`` as ``bench.demo`` (the ``package-dir`` mapping in ``pyproject.toml``).
"""

from __future__ import annotations

import ast
import sys
import tomllib
from collections import deque
from pathlib import Path

import pytest

ROOT = Path(__file__).resolve().parents[1]
DOCS = ROOT / "docs" / "architecture.md"
BEGIN = ("<!-- import rules: generated from GROUPS in tests/test_architecture.py by "
         "`python tests/test_architecture.py --write-docs`; do not edit by hand -->")
END = "<!-- end of import rules -->"

LEAVES = ("root", "errors", "units", "physics", "stagelimits", "sweepsettings")

#: group -> (modules, groups (or single modules) it may import), bottom layer first.
GROUPS: dict[str, tuple[tuple[str, ...], tuple[str, ...]]] = {
    "root": (("bench", "bench.demo.*"), ()),
    "errors": (("bench.errors",), ()),
    "units": (("bench.units",), ("errors",)),
    "physics": (("bench.physics",), ("units", "errors")),
    "stagelimits": (("bench.stagelimits",), ("errors",)),
    "sweepsettings": (("bench.sweepsettings",), ()),
    "protocol": (("bench.ieee488", "bench.wire", "bench.visawire", "bench.serialwire", "bench.framing",
                  "bench.transports"), LEAVES),
    "files": (("bench.tomlsource", "bench.benchfile", "bench.provenance"), LEAVES),
    "drivers": (("bench.drivers.*",), ("protocol", "files", *LEAVES)),
    "analysis": (("bench.analysis.*",), ("files", *LEAVES)),
    "store": (("bench.store",), LEAVES),
    "output helpers": (("bench.plots", "bench.htmlkit", "bench.cautions"), ("analysis", "store", *LEAVES)),
    "planning": (("bench.planning",), ("files", *LEAVES)),
    "steps": (("bench.steps.*", "bench.sequence"),
              ("planning", "output helpers", "store", "analysis", "files", *LEAVES)),
    "engine": (("bench.planner", "bench.preflight", "bench.instruments", "bench.session",
                "bench.executor", "bench.runner", "bench.progress"),
               ("steps", "planning", "drivers", "protocol", "store", "analysis", "files",
                *LEAVES)),
    "outputs": (("bench.report", "bench.compare", "bench.export", "bench.rejudge"),
                ("steps", "output helpers", "store", "analysis", "files", *LEAVES)),
    "sim": (("bench.sim.*",),
            ("errors", "units", "physics", "bench.tomlsource", "bench.ieee488")),
    "simbench": (("bench.simbench",), ("sim", "files", *LEAVES)),
    "use cases": (("bench.app",),
                  ("simbench", "outputs", "engine", "steps", "planning", "output helpers",
                   "store", "analysis", "drivers", "files", "protocol", *LEAVES)),
    "cli": (("bench.cli.*", "bench.__main__"), ("use cases", *LEAVES)),
}


# --------------------------------------------------------------------------- import extractor


def _relative_base(module: str, is_package: bool, level: int) -> str:
    """The package a relative import of ``level`` dots starts from."""
    parts = module.split(".")
    keep = len(parts) - level + (1 if is_package else 0)
    if keep < 1:
        raise ValueError(f"relative import beyond the top package in {module}")
    return ".".join(parts[:keep])


def _join(base: str, name: str | None) -> str:
    return f"{base}.{name}" if base and name else (base or name or "")


def _from_sites(node: ast.ImportFrom, module: str, is_package: bool) -> list[str]:
    base = node.module or ""
    if node.level:
        base = _join(_relative_base(module, is_package, node.level), node.module)
    names = [alias.name for alias in node.names if alias.name != "*"]
    return [_join(base, name) for name in names] or [base]


def _literal(node: ast.AST | None) -> str | None:
    return node.value if isinstance(node, ast.Constant) and isinstance(node.value, str) else None


def _call_sites(node: ast.Call, module: str, is_package: bool) -> list[str]:
    """``importlib.import_module("x")``, ``import_module(".x", "pkg")``, ``__import__("x")``."""
    func = node.func
    name = func.attr if isinstance(func, ast.Attribute) else getattr(func, "id", None)
    if name not in ("import_module", "__import__") or not node.args:
        return []
    target = _literal(node.args[0])
    if target is None:
        return []
    keywords = {k.arg: k.value for k in node.keywords}
    if name == "import_module" and target.startswith("."):
        package = _literal(node.args[1] if len(node.args) > 1 else keywords.get("package"))
        if package is None:
            return []
        level = len(target) - len(target.lstrip("."))
        return [_join(_relative_base(package, True, level), target.lstrip(".") or None)]
    fromlist = node.args[3] if name == "__import__" and len(node.args) > 3 else keywords.get("fromlist")
    extra = [_literal(e) for e in getattr(fromlist, "elts", [])]
    return [target] + [_join(target, e) for e in extra if e]


def import_sites(source: str, module: str, is_package: bool = False) -> list[tuple[str, int]]:
    """Every import in ``source`` as (absolute dotted name, line), in any form and any scope.

    ``from a import b`` gives ``a.b``: a module or a name defined in ``a``; :func:`resolve`
    decides which.
    """
    sites: list[tuple[str, int]] = []
    for node in ast.walk(ast.parse(source)):
        if isinstance(node, ast.Import):
            names = [alias.name for alias in node.names]
        elif isinstance(node, ast.ImportFrom):
            names = _from_sites(node, module, is_package)
        elif isinstance(node, ast.Call):
            names = _call_sites(node, module, is_package)
        else:
            continue
        sites.extend((name, node.lineno) for name in names)
    return sorted(set(sites), key=lambda site: (site[1], site[0]))


def extract_imports(source: str, module: str, is_package: bool = False) -> set[str]:
    """The absolute dotted names ``source`` imports (see :func:`import_sites`)."""
    return {name for name, _ in import_sites(source, module, is_package)}


def resolve(name: str, known: set[str] | dict[str, Path]) -> str | None:
    """The known module ``name`` refers to (its longest known prefix), or None."""
    parts = name.split(".")
    for end in range(len(parts), 0, -1):
        candidate = ".".join(parts[:end])
        if candidate in known:
            return candidate
    return None


# --------------------------------------------------------------------------- the project's modules


def package_dirs() -> dict[str, Path]:
    """Installed package name -> source folder, from pyproject's ``package-dir`` mapping."""
    config = tomllib.loads((ROOT / "pyproject.toml").read_text(encoding="utf-8"))
    mapping = config["tool"]["setuptools"].get("package-dir", {})
    return {"bench": ROOT / "bench", **{pkg: ROOT / folder for pkg, folder in mapping.items()}}


def project_modules() -> dict[str, Path]:
    """Every module of the installed ``bench`` package -> its source file."""
    modules: dict[str, Path] = {}
    for package, folder in package_dirs().items():
        for path in sorted(folder.rglob("*.py")):
            if "__pycache__" in path.parts:
                continue
            rel = path.relative_to(folder).with_suffix("").parts
            parts = rel[:-1] if rel[-1] == "__init__" else rel
            modules[".".join((package, *parts))] = path
    return modules


def import_graph(modules: dict[str, Path]) -> dict[str, dict[str, int]]:
    """module -> {imported project module: first line}; imports of itself left out."""
    graph: dict[str, dict[str, int]] = {}
    for module, path in modules.items():
        edges: dict[str, int] = {}
        source = path.read_text(encoding="utf-8")
        for name, line in import_sites(source, module, path.name == "__init__.py"):
            target = resolve(name, modules)
            if target is not None and target != module:
                edges.setdefault(target, line)
        graph[module] = edges
    return graph


# --------------------------------------------------------------------------- groups and cycles


def _matches(module: str, entry: str) -> bool:
    if entry.endswith(".*"):
        package = entry[:-2]
        return module == package or module.startswith(package + ".")
    return module == entry


def groups_of(module: str) -> list[str]:
    """Every group whose module list matches ``module``."""
    return [group for group, (entries, _) in GROUPS.items()
            if any(_matches(module, entry) for entry in entries)]


def allowed(importer: str, imported: str) -> bool:
    """Whether ``importer`` may import ``imported`` under ``GROUPS``."""
    mine, theirs = groups_of(importer), groups_of(imported)
    if len(mine) != 1 or len(theirs) != 1:
        return False
    if mine == theirs:
        return True
    may = GROUPS[mine[0]][1]
    return theirs[0] in may or any(_matches(imported, entry) for entry in may if "." in entry)


def _strongly_connected(graph: dict[str, dict[str, int]]) -> list[list[str]]:
    """Tarjan's strongly connected components with more than one module or a self-loop."""
    index: dict[str, int] = {}
    low: dict[str, int] = {}
    stack: list[str] = []
    found: list[list[str]] = []

    def visit(node: str) -> None:
        index[node] = low[node] = len(index)
        stack.append(node)
        for nxt in sorted(graph.get(node, {})):
            if nxt not in index:
                visit(nxt)
                low[node] = min(low[node], low[nxt])
            elif nxt in stack:
                low[node] = min(low[node], index[nxt])
        if low[node] == index[node]:
            component = []
            while True:
                member = stack.pop()
                component.append(member)
                if member == node:
                    break
            if len(component) > 1 or node in graph.get(node, {}):
                found.append(sorted(component))

    for node in sorted(graph):
        if node not in index:
            visit(node)
    return found


def _shortest_cycle(graph: dict[str, dict[str, int]], start: str, members: set[str]) -> list[str]:
    """Breadth-first search from ``start`` back to itself inside one component."""
    previous: dict[str, str] = {}
    queue = deque([start])
    while queue:
        node = queue.popleft()
        for nxt in sorted(graph.get(node, {})):
            if nxt == start:
                path = [node]
                while path[-1] != start:
                    path.append(previous[path[-1]])
                return [*reversed(path), start]
            if nxt in members and nxt not in previous:
                previous[nxt] = node
                queue.append(nxt)
    return [start]


def find_cycles(graph: dict[str, dict[str, int]]) -> list[list[str]]:
    """Import cycles as paths that return to their start, until every module in one is shown.

    Each strongly connected component gives the shortest cycle through its first module, then
    through the first module not shown yet, and so on.
    """
    cycles = []
    for component in _strongly_connected(graph):
        members, shown = set(component), set()
        for start in component:
            if start not in shown:
                cycle = _shortest_cycle(graph, start, members)
                shown.update(cycle)
                cycles.append(cycle)
    return cycles


# --------------------------------------------------------------------------- the docs table


def render_table() -> str:
    """``GROUPS`` as the Markdown table that ``docs/architecture.md`` carries."""
    rows = ["| Layer (bottom first) | Modules | May import (besides itself) |",
            "|---|---|---|"]
    for group, (modules, may) in GROUPS.items():
        if set(LEAVES) <= set(may):
            may = tuple(m for m in may if m not in LEAVES) + ("leaves",)
        names = ", ".join(f"`{m}`" for m in modules)
        allowed_text = ", ".join(f"`{m}`" if "." in m else m for m in may) or "nothing"
        rows.append(f"| {group} | {names} | {allowed_text} |")
    note = (f"leaves = {', '.join(LEAVES)}. A group may always import its own modules; "
            "`name.*` is a package and everything under it; a module in `code` under "
            "\"May import\" is allowed alone, not its whole group. Nothing imports cli.")
    return "\n".join([BEGIN, *rows, "", note, END])


def write_docs() -> None:
    """Replace the generated block in ``docs/architecture.md`` (it must be there once)."""
    text = DOCS.read_text(encoding="utf-8")
    head, rest = text.split(BEGIN, 1)
    _, tail = rest.split(END, 1)
    DOCS.write_text(head + render_table() + tail, encoding="utf-8")


# --------------------------------------------------------------------------- tests: the extractor


@pytest.mark.parametrize("source, module, is_package, expected", [
    ("import bench.units\n", "bench.x", False, {"bench.units"}),
    ("import bench.units as u, os\n", "bench.x", False, {"bench.units", "os"}),
    ("from bench.units import parse, format_hz\n", "bench.x", False,
     {"bench.units.parse", "bench.units.format_hz"}),
    ("from bench import units\n", "bench.x", False, {"bench.units"}),
    ("from bench.units import *\n", "bench.x", False, {"bench.units"}),
    ("def f():\n    from bench import store\n    import bench.plots\n", "bench.x", False,
     {"bench.store", "bench.plots"}),
    ("class C:\n    def m(self):\n        if True:\n            import bench.errors\n", "bench.x",
     False, {"bench.errors"}),
    ("try:\n    import bench.progress\nexcept ImportError:\n    pass\n", "bench.x", False,
     {"bench.progress"}),
    ("from . import clock\n", "bench.sim.world", False, {"bench.sim.clock"}),
    ("from .state import SimState\n", "bench.sim.world", False, {"bench.sim.state.SimState"}),
    ("from .. import physics\n", "bench.sim.world", False, {"bench.physics"}),
    ("from ..analysis import peaks\n", "bench.sim.world", False, {"bench.analysis.peaks"}),
    ("from . import world\n", "bench.sim", True, {"bench.sim.world"}),
    ("from .. import errors\n", "bench.sim", True, {"bench.errors"}),
    ("import importlib\nm = importlib.import_module('bench.store')\n", "bench.x", False,
     {"importlib", "bench.store"}),
    ("from importlib import import_module\nimport_module('bench.cli')\n", "bench.x", False,
     {"importlib.import_module", "bench.cli"}),
    ("import importlib\nimportlib.import_module('.world', package='bench.sim')\n", "bench.x",
     False, {"importlib", "bench.sim.world"}),
    ("import importlib\nimportlib.import_module('..errors', 'bench.sim')\n", "bench.x", False,
     {"importlib", "bench.errors"}),
    ("__import__('bench.report')\n", "bench.x", False, {"bench.report"}),
    ("__import__('bench', fromlist=['plots'])\n", "bench.x", False, {"bench", "bench.plots"}),
    ("import importlib\nname = 'bench.x'\nimportlib.import_module(name)\n", "bench.y", False,
     {"importlib"}),
    ("text = 'import bench.cli'\n# import bench.cli\n", "bench.x", False, set()),
])
def test_extractor_counts_every_import_form(source, module, is_package, expected):
    assert extract_imports(source, module, is_package) == expected


def test_extractor_gives_lines():
    source = "import os\n\n\ndef f():\n    from bench import store\n"
    assert import_sites(source, "bench.x") == [("os", 1), ("bench.store", 5)]


def test_relative_import_beyond_the_top_is_refused():
    with pytest.raises(ValueError):
        extract_imports("from ... import x\n", "bench.sim", False)


def test_resolve_picks_the_longest_known_module():
    known = {"bench", "bench.units", "bench.sim", "bench.sim.world"}
    assert resolve("bench.units.parse", known) == "bench.units"
    assert resolve("bench.sim.world", known) == "bench.sim.world"
    assert resolve("bench.__version__", known) == "bench"
    assert resolve("numpy.linalg", known) is None


def test_cycles_are_found_with_their_path():
    graph = {"a": {"b": 1}, "b": {"c": 1}, "c": {"a": 1, "d": 1}, "d": {}, "e": {"e": 1}}
    assert find_cycles(graph) == [["a", "b", "c", "a"], ["e", "e"]]
    two_loops = {"app": {"cli": 1, "runner": 1}, "cli": {"app": 1}, "runner": {"app": 1}}
    assert find_cycles(two_loops) == [["app", "cli", "app"], ["runner", "app", "runner"]]
    assert find_cycles({"a": {"b": 1}, "b": {}}) == []


# --------------------------------------------------------------------------- tests: the table


def test_modules_follow_the_installed_layout():
    modules = project_modules()
    assert modules["bench.drivers.analyzer"] == ROOT / "drivers" / "analyzer.py"
    assert modules["bench.demo"] == ROOT / "sequences" / "__init__.py"
    assert modules["bench.sim.world"] == ROOT / "bench" / "sim" / "world.py"
    assert modules["bench"] == ROOT / "bench" / "__init__.py"


def test_the_table_only_looks_down():
    seen: set[str] = set()
    for group, (modules, may) in GROUPS.items():
        for target in may:
            named = target if "." not in target else (groups_of(target) or ["?"])[0]
            assert named in seen, f"{group} may import {target}, which is not below it"
        seen.add(group)
    assert not any("cli" in may for _, may in GROUPS.values())


def test_the_simulator_stays_on_its_side_of_the_wire():
    for module in ("bench.drivers.stage", "bench.run", "bench.executor", "bench.store",
                   "bench.analysis.peaks", "bench.sequence", "bench.benchfile", "bench.cli"):
        assert not allowed("bench.sim.world", module), module
    assert allowed("bench.sim.board", "bench.tomlsource")


def test_every_module_belongs_to_exactly_one_group():
    problems = [f"{module}: {', '.join(groups_of(module)) or 'no group'}"
                for module in project_modules() if len(groups_of(module)) != 1]
    assert problems == [], "\n".join(problems)


def test_no_import_cycle():
    cycles = [" -> ".join(cycle) for cycle in find_cycles(import_graph(project_modules()))]
    assert cycles == [], "import cycles:\n" + "\n".join(cycles)


def test_every_import_is_allowed_by_the_table():
    modules = project_modules()
    offenders = []
    for module, edges in import_graph(modules).items():
        for imported, line in sorted(edges.items(), key=lambda edge: (edge[1], edge[0])):
            if not allowed(module, imported):
                where = modules[module].relative_to(ROOT)
                offenders.append(f"{where}:{line}: {module} ({', '.join(groups_of(module))}) "
                                 f"imports {imported} ({', '.join(groups_of(imported))})")
    assert offenders == [], "imports the table does not allow:\n" + "\n".join(offenders)


def test_docs_carry_the_table():
    """docs/architecture.md holds exactly render_table().

    Regenerate after editing GROUPS: ``python tests/test_architecture.py --write-docs``
    """
    text = DOCS.read_text(encoding="utf-8")
    assert text.count(BEGIN) == 1 and text.count(END) == 1
    assert render_table() in text


def test_error_tree_public_names():
    import bench.errors as errors

    assert set(errors.__all__) == {
        "AnalysisError", "BenchError", "BlockFormatError", "ConfigError", "InstrumentError", "PlanError",
        "ReplyTimeoutError", "SafetyLimitError", "StoreError", "TransportError", "UnitError",
        "RunInterrupted", "OperatorStop", "ProfileMismatchError", "ReplyFormatError",
    }
    for name in errors.__all__:
        assert issubclass(getattr(errors, name), errors.BenchError)
    assert errors.ConfigError.exit_code == 2


def test_one_line_server_serves_every_simulated_dialect():
    # G-code, the positioner line protocol and SCPI are all served by bench/sim/lineserver.py:
    # no other simulator module opens sockets, servers or pseudo-terminals of its own
    owners = set()
    for name, path in project_modules().items():
        if not name.startswith("bench.sim."):
            continue
        tree = ast.parse(path.read_text(encoding="utf-8"))
        for node in ast.walk(tree):
            names = [a.name for a in node.names] if isinstance(node, ast.Import) else (
                [node.module] if isinstance(node, ast.ImportFrom) and node.module else [])
            if any(n in ("socket", "socketserver", "pty", "tty", "select") for n in names):
                owners.add(name)
    assert owners == {"bench.sim.lineserver"}




if __name__ == "__main__":
    if sys.argv[1:] != ["--write-docs"]:
        sys.exit("usage: python tests/test_architecture.py --write-docs")
    write_docs()
