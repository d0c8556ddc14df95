"""The layers of the package hold (read from every module's imports with ast, so they cannot drift):

* solver imports nothing of ours outside solver (its exception module is solver/errors.py);
* the wire package imports only itself and the exception module;
* clients import only the wire package, the exception module and other clients;
* the service core (everything in service/ but commands/ and bench/) imports solver and service, never
  clients, commands or benchmarks;
* nothing outside commands/ and bench/ imports them;
no module is longer than MAX_MODULE_LINES (one job a module), and the runtime's Service keeps a small
state (at most MAX_SERVICE_ATTRIBUTES set in __init__).
"""

from __future__ import annotations

import ast
from pathlib import Path

ROOT = Path(__file__).resolve().parents[1]
ERRORS = "twistrate.solver.errors"
#: The longest module we keep (one job a module, under about 450 lines).
MAX_MODULE_LINES = 450
#: Attributes Service.__init__ may set: threads, sockets and life cycle only; tick state is the pipeline's.
MAX_SERVICE_ATTRIBUTES = 25


def _module_name(path: Path) -> str:
    rel = path.relative_to(ROOT).with_suffix("")
    parts = list(rel.parts)
    if parts[-1] == "__init__":
        parts = parts[:-1]
    return "twistrate." + ".".join(parts)


def _modules() -> dict[str, Path]:
    out = {}
    for top in ("solver", "service", "clients"):
        for path in (ROOT / top).rglob("*.py"):
            if "__pycache__" not in path.parts:
                out[_module_name(path)] = path
    return out


def _imports(path: Path) -> set[str]:
    """Every twistrate module `path` imports (absolute imports; relative ones are banned by ruff)."""
    modules = _modules()
    found: set[str] = set()
    for node in ast.walk(ast.parse(path.read_text(), str(path))):
        if isinstance(node, ast.Import):
            found.update(a.name for a in node.names)
        elif isinstance(node, ast.ImportFrom) and node.module:
            submodules = {f"{node.module}.{a.name}" for a in node.names} & modules.keys()
            # `from pkg import module` imports the module (pkg's __init__ runs, but it is the module's layer
            # that counts); `from module import name` imports the module
            found.update(submodules or {node.module})
    # keep the names that are modules or packages of ours (from x import name: name may be a function)
    return {name for name in found if name.startswith("twistrate.") and name in modules}


def _within(name: str, *prefixes: str) -> bool:
    return any(name == p or name.startswith(p + ".") for p in prefixes)


def _violations(allowed) -> list[str]:
    bad = []
    for name, path in sorted(_modules().items()):
        for imported in sorted(_imports(path)):
            reason = allowed(name, imported)
            if reason:
                bad.append(f"{path.relative_to(ROOT)} imports {imported}: {reason}")
    return bad


def _rule(importer: str, imported: str) -> str | None:
    if _within(importer, "twistrate.solver"):
        return None if _within(imported, "twistrate.solver") else "solver imports only solver"
    if _within(importer, "twistrate.service.wire"):
        return None if _within(imported, "twistrate.service.wire", ERRORS) else \
            "the wire imports only itself and the exception module"
    if _within(importer, "twistrate.clients"):
        return None if _within(imported, "twistrate.service.wire", ERRORS, "twistrate.clients") else \
            "clients import only the wire package and the exception module"
    if _within(importer, "twistrate.service.commands", "twistrate.service.bench"):
        return None
    if _within(imported, "twistrate.clients"):
        return "the service core never imports clients"
    if _within(imported, "twistrate.service.commands", "twistrate.service.bench"):
        return "nothing imports the commands or the benchmarks"
    return None


def test_the_import_scan_sees_imports():
    # the scan is not vacuous: it finds known imports of each layer
    mods = _modules()
    assert "twistrate.service.wire" in _imports(mods["twistrate.service.wire.stream"]) or \
        "twistrate.service.wire.checks" in _imports(mods["twistrate.service.wire.stream"])
    assert ERRORS in _imports(mods["twistrate.service.wire.checks"])
    assert any(_within(i, "twistrate.solver") for i in _imports(mods["twistrate.service.runtime"]))
    assert _rule("twistrate.clients.link", "twistrate.solver.kinematics")
    assert _rule("twistrate.service.wire.stream", "twistrate.solver.resolve")
    assert _rule("twistrate.service.runtime", "twistrate.clients.link")
    assert _rule("twistrate.service.config", "twistrate.service.commands.serve")


def test_every_import_respects_the_layers():
    assert _violations(_rule) == []


def test_service_init_sets_few_attributes():
    tree = ast.parse((ROOT / "service" / "runtime.py").read_text())
    cls = next(n for n in tree.body if isinstance(n, ast.ClassDef) and n.name == "Service")
    init = next(n for n in cls.body if isinstance(n, ast.FunctionDef) and n.name == "__init__")
    names = {t.attr for node in ast.walk(init) if isinstance(node, (ast.Assign, ast.AnnAssign))
             for t in (node.targets if isinstance(node, ast.Assign) else [node.target])
             if isinstance(t, ast.Attribute) and isinstance(t.value, ast.Name) and t.value.id == "self"}
    assert 10 <= len(names) <= MAX_SERVICE_ATTRIBUTES, sorted(names)
def test_no_module_is_longer_than_the_limit():
    long = {str(p.relative_to(ROOT)): n for p in _modules().values()
            if (n := len(p.read_text().splitlines())) > MAX_MODULE_LINES}
    assert long == {}, f"modules over {MAX_MODULE_LINES} lines: {long}"


