"""The layout rules of the contributor guide ("Layout"), checked on the code itself.

Every module under recon/ is parsed with ``ast`` (nothing is imported or run) and each of its import
statements, at module level or inside a function, is resolved to the module it names. Then:

- imports run one way: a stage imports only stages at or below its own rank in ``ORDER`` (and the
  simulator only ``core`` and ``field``);
- another package is reached only through its public face (``recon.<package>``, its ``__init__``),
  never through one of its modules, and never for a name with a leading underscore;
- no module imports a name with a leading underscore from another module (what is private is
  private to its module; a name two modules share is public within the package);
- module files have plain names (no leading underscore);
- there is no import cycle between modules;
- no module is longer than ``MAX_MODULE_LINES`` and no function longer than ``MAX_FUNCTION_LINES``
  (docstring not counted).
"""

from __future__ import annotations

import ast
from pathlib import Path

import pytest

PACKAGE = Path(__file__).resolve().parents[1] / "recon"

# The data flow, lowest first: a stage may import the stages before it, never those after.
ORDER = ["core", "config", "load", "clean", "orbit", "field", "calibrate", "estimate", "judge", "report",
         "pipeline", "fleet", "cli"]
# Side branches, what they may import, and who may import them (the command line offers the demo).
SIDE = {"simulate": {"core", "field", "simulate"}}
SIDE_USERS = {"simulate": {"cli"}}
# The package's own face (lazy public API) and ``python -m recon`` stand above everything.
TOP = {"__init__", "__main__"}
# Sizes the contributor guide asks for: a module does one job, a function one named step.
MAX_MODULE_LINES = 400
MAX_FUNCTION_LINES = 80


def _modules() -> dict[str, Path]:
    """Dotted module name under recon (``judge.dipole.solve``, ``core``) -> file."""
    out = {}
    for p in sorted(PACKAGE.rglob("*.py")):
        parts = list(p.relative_to(PACKAGE).with_suffix("").parts)
        if parts[-1] == "__init__":
            parts = parts[:-1] or ["__init__"]
        out[".".join(parts)] = p
    return out


MODULES = _modules()


def _is_package(name: str) -> bool:
    return name != "__init__" and MODULES.get(name, Path()).name == "__init__.py"


def _stage(module: str) -> str:
    return module.split(".")[0]


def _imports(module: str, path: Path) -> list[tuple[int, str, str | None]]:
    """(line, target module, imported name or None) for every recon import in one module."""
    tree = ast.parse(path.read_text(encoding="utf-8"))
    here = module.split(".") if _is_package(module) or module == "__init__" else module.split(".")[:-1]
    if module == "__init__":
        here = []
    out = []
    for node in ast.walk(tree):
        if isinstance(node, ast.Import):
            for a in node.names:
                if a.name == "recon" or a.name.startswith("recon."):
                    out.append((node.lineno, a.name[len("recon."):] if "." in a.name else "__init__", None))
        elif isinstance(node, ast.ImportFrom):
            if node.level == 0:
                if not (node.module == "recon" or (node.module or "").startswith("recon.")):
                    continue
                base = node.module.split(".")[1:]
            else:
                base = here[:len(here) - (node.level - 1)] + (node.module.split(".") if node.module else [])
            target = ".".join(base) or "__init__"
            for a in node.names:
                sub = f"{target}.{a.name}" if target != "__init__" else a.name
                if sub in MODULES:  # "from package import submodule"
                    out.append((node.lineno, sub, None))
                else:
                    out.append((node.lineno, target, a.name))
    return out


IMPORTS = {m: _imports(m, p) for m, p in MODULES.items()}


def _rank(stage: str) -> int:
    return ORDER.index(stage)


def test_every_module_belongs_to_a_known_stage():
    stages = {_stage(m) for m in MODULES}
    unknown = stages - set(ORDER) - set(SIDE) - TOP
    assert not unknown, f"modules outside the layout's stages: {sorted(unknown)}"


def test_imports_run_one_way():
    bad = []
    for mod, imps in IMPORTS.items():
        src = _stage(mod)
        if src in TOP:
            continue
        for line, target, _ in imps:
            dst = _stage(target)
            if dst == src:
                continue
            if src in SIDE:
                ok = dst in SIDE[src]
            elif dst in SIDE:
                ok = src in SIDE_USERS[dst]
            else:
                ok = dst in ORDER and _rank(dst) <= _rank(src)
            if not ok:
                bad.append(f"recon/{MODULES[mod].relative_to(PACKAGE)}:{line} ({src}) imports {target} ({dst})")
    assert not bad, "imports that run against the data flow:\n" + "\n".join(bad)


def test_other_packages_are_reached_through_their_face():
    bad = []
    for mod, imps in IMPORTS.items():
        src = _stage(mod)
        for line, target, name in imps:
            dst = _stage(target)
            if dst == src or dst in TOP:
                continue
            where = f"recon/{MODULES[mod].relative_to(PACKAGE)}:{line}"
            face = target == dst
            # "from recon.core import frames": a module the face lists in __all__ counts as a name of the face
            if not face and not (target.count(".") == 1 and target.split(".")[1] in _face_names(dst)):
                bad.append(f"{where} imports {target} instead of the face recon.{dst}")
            elif name is not None and name.startswith("_") and not _dunder(name):
                bad.append(f"{where} imports the private name {name} from recon.{dst}")
            elif name is not None and name not in _face_names(dst):
                bad.append(f"{where} imports {name}, which recon.{dst} does not list in __all__")
    assert not bad, "\n".join(bad)


def _dunder(name: str) -> bool:
    """``__version__`` and its kind are public by convention, not private."""
    return name.startswith("__") and name.endswith("__")


def _face_names(stage: str) -> set[str]:
    path = MODULES.get(stage)
    if path is None:
        return set()
    tree = ast.parse(path.read_text(encoding="utf-8"))
    for node in tree.body:
        if isinstance(node, ast.Assign) and any(isinstance(t, ast.Name) and t.id == "__all__" for t in node.targets):
            return {ast.literal_eval(e) for e in node.value.elts}
    return set()


def test_each_package_face_declares_all():
    missing = [s for s in sorted({_stage(m) for m in MODULES}) if _is_package(s) and not _face_names(s)]
    assert not missing, f"packages whose __init__ has no __all__: {missing}"


def test_no_private_name_crosses_a_module():
    bad = []
    for mod, imps in IMPORTS.items():
        for line, target, name in imps:
            if name is not None and name.startswith("_") and not _dunder(name):
                bad.append(f"recon/{MODULES[mod].relative_to(PACKAGE)}:{line} imports {name} from {target}")
    assert not bad, "private names used outside their module:\n" + "\n".join(bad)


def test_module_files_have_plain_names():
    bad = [str(p.relative_to(PACKAGE)) for p in MODULES.values()
           if p.stem.startswith("_") and p.stem not in ("__init__", "__main__")]
    assert not bad, f"modules named as private: {bad}"


def test_no_import_cycle():
    graph = {m: {t for _, t, _ in imps if t in MODULES and t != m} for m, imps in IMPORTS.items()}
    # a package's face importing its own modules is how a face works; a module importing its own
    # package's face would close a loop through it, and is caught here like any other cycle
    index, low, stack, on, cycles, counter = {}, {}, [], set(), [], [0]

    def visit(v):
        index[v] = low[v] = counter[0]
        counter[0] += 1
        stack.append(v)
        on.add(v)
        for w in sorted(graph[v]):
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
                cycles.append(sorted(comp))

    for v in sorted(graph):
        if v not in index:
            visit(v)
    assert not cycles, f"import cycles: {cycles}"


def _function_lengths(path: Path):
    tree = ast.parse(path.read_text(encoding="utf-8"))
    for node in ast.walk(tree):
        if isinstance(node, ast.FunctionDef | ast.AsyncFunctionDef):
            n = node.end_lineno - node.lineno + 1
            body = node.body
            if body and isinstance(body[0], ast.Expr) and isinstance(getattr(body[0], "value", None), ast.Constant) \
                    and isinstance(body[0].value.value, str):
                n -= body[0].end_lineno - body[0].lineno + 1
            yield node.name, node.lineno, n


@pytest.mark.parametrize("module", sorted(MODULES))
def test_module_and_function_sizes(module):
    path = MODULES[module]
    lines = len(path.read_text(encoding="utf-8").splitlines())
    assert lines <= MAX_MODULE_LINES, f"recon/{path.relative_to(PACKAGE)} has {lines} lines (> {MAX_MODULE_LINES})"
    long = [f"{name} (line {line}): {n} lines" for name, line, n in _function_lengths(path) if n > MAX_FUNCTION_LINES]
    assert not long, f"recon/{path.relative_to(PACKAGE)}: functions over {MAX_FUNCTION_LINES} lines: {long}"
