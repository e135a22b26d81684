"""Direction of imports (docs/architecture.md) and the public error tree.

The rules come from the project's design brief: the simulator is the other side of the wire and
never imports the drivers or the run engine; units, errors and physics are leaves; drivers reach
instruments only through transports; analysis never talks to instruments.
"""

import ast
from pathlib import Path

import pytest

ROOT = Path(__file__).resolve().parents[1]


def module_files():
    for path in sorted((ROOT / "bench").rglob("*.py")):
        rel = path.relative_to(ROOT / "bench").with_suffix("")
        yield "bench." + ".".join(rel.parts).removesuffix(".__init__"), path
    for path in sorted((ROOT / "drivers").rglob("*.py")):
        rel = path.relative_to(ROOT / "drivers").with_suffix("")
        yield "bench.drivers." + ".".join(rel.parts).removesuffix(".__init__"), path


def imports_of(path):
    tree = ast.parse(path.read_text(encoding="utf-8"))
    out = set()
    for node in ast.walk(tree):
        if isinstance(node, ast.Import):
            out.update(a.name for a in node.names)
        elif isinstance(node, ast.ImportFrom) and node.module and node.level == 0:
            out.add(node.module)
    return {m for m in out if m.startswith("bench")}


FORBIDDEN = [
    # (module prefix, forbidden import prefixes)
    ("bench.sim", ("bench.drivers", "bench.run", "bench.runner", "bench.station", "bench.app", "bench.cli",
                   "bench.store", "bench.analysis", "bench.report")),
    ("bench.units", ("bench.drivers", "bench.sim", "bench.run", "bench.store", "bench.analysis",
                     "bench.physics", "bench.sequence", "bench.transports")),
    ("bench.errors", ("bench.",)),
    ("bench.physics", ("bench.drivers", "bench.sim", "bench.run", "bench.store", "bench.analysis")),
    ("bench.drivers", ("bench.run", "bench.runner", "bench.sim", "bench.store", "bench.analysis",
                       "bench.app", "bench.cli", "bench.report")),
    ("bench.transports", ("bench.drivers", "bench.run", "bench.sim", "bench.store", "bench.analysis")),
    # the transport layers: byte wires know nothing of framing, framing nothing of schemes
    ("bench.wire", ("bench.drivers", "bench.run", "bench.sim", "bench.store", "bench.analysis",
                    "bench.framing", "bench.transports", "bench.visawire", "bench.serialwire")),
    ("bench.visawire", ("bench.drivers", "bench.run", "bench.sim", "bench.store", "bench.analysis",
                        "bench.framing", "bench.transports", "bench.ieee488")),
    ("bench.serialwire", ("bench.drivers", "bench.run", "bench.sim", "bench.store", "bench.analysis",
                          "bench.framing", "bench.transports", "bench.ieee488")),
    ("bench.framing", ("bench.drivers", "bench.run", "bench.sim", "bench.store", "bench.analysis",
                       "bench.transports", "bench.visawire", "bench.serialwire")),
    ("bench.analysis", ("bench.drivers", "bench.run", "bench.runner", "bench.sim", "bench.transports",
                        "bench.app", "bench.cli", "bench.station")),
    ("bench.store", ("bench.drivers", "bench.run", "bench.sim", "bench.transports", "bench.analysis")),
    ("bench.sequence", ("bench.drivers", "bench.run", "bench.sim", "bench.store", "bench.transports")),
    ("bench.planner", ("bench.drivers", "bench.run", "bench.sim", "bench.store", "bench.transports")),
    ("bench.report", ("bench.drivers", "bench.run", "bench.sim", "bench.transports")),
]


@pytest.mark.parametrize("prefix, banned", FORBIDDEN, ids=[f[0] for f in FORBIDDEN])
def test_import_direction(prefix, banned):
    offenders = []
    for name, path in module_files():
        if name != prefix and not name.startswith(prefix + "."):
            continue
        for imp in imports_of(path):
            if imp == name:
                continue
            if any(imp == b.rstrip(".") or imp.startswith(b if b.endswith(".") else b + ".") or imp == b
                   for b in banned):
                offenders.append(f"{name} imports {imp}")
    assert offenders == []


def test_error_tree_public_names():
    import bench.errors as errors

    assert set(errors.__all__) == {
        "AnalysisError", "BenchError", "BlockFormatError", "ConfigError", "InstrumentError", "PlanError",
        "ProfileMismatchError", "ReplyFormatError", "ReplyTimeoutError", "SafetyLimitError", "StoreError",
        "TransportError", "UnitError",
    }
    for name in errors.__all__:
        assert issubclass(getattr(errors, name), errors.BenchError)
    assert errors.ConfigError.exit_code == 2


def test_one_line_server_serves_every_simulated_dialect():
    # G-code, the positioner line protocol and SCPI are all served by bench/sim/lineserver.py:
    # no other simulator module opens sockets, servers or pseudo-terminals of its own
    owners = set()
    for name, path in module_files():
        if not name.startswith("bench.sim."):
            continue
        tree = ast.parse(path.read_text(encoding="utf-8"))
        for node in ast.walk(tree):
            names = [a.name for a in node.names] if isinstance(node, ast.Import) else (
                [node.module] if isinstance(node, ast.ImportFrom) and node.module else [])
            if any(n in ("socket", "socketserver", "pty", "tty", "select") for n in names):
                owners.add(name)
    assert owners == {"bench.sim.lineserver"}


SIM_MAY_IMPORT = ("bench.sim", "bench.physics", "bench.units", "bench.errors", "bench.tomlsource", "bench.ieee488")


def test_the_simulator_imports_only_its_allowed_leaves():
    # the other side of the wire knows the physics and the wire formats, nothing of the tool
    offenders = []
    for name, path in module_files():
        if not name.startswith("bench.sim."):
            continue
        for node in ast.walk(ast.parse(path.read_text(encoding="utf-8"))):
            if isinstance(node, ast.Import):
                names = [a.name for a in node.names]
            elif isinstance(node, ast.ImportFrom) and node.module == "bench":
                names = [f"bench.{a.name}" for a in node.names]
            elif isinstance(node, ast.ImportFrom) and node.module:
                names = [node.module]
            else:
                continue
            offenders += [f"{name} imports {n}" for n in names if n.startswith("bench")
                          and not any(n == a or n.startswith(a + ".") for a in SIM_MAY_IMPORT)]
    assert offenders == []
