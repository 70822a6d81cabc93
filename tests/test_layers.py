"""The package's layers as a tested contract (DEVELOPERS.md, "The map").

Every import of an xo_fit module, at module level or inside a function, goes from a layer to the same layer or
a lower one; the imports form no cycle; no module takes a private name (a leading underscore) from another.
"""

from __future__ import annotations

import ast
from pathlib import Path

ROOT = Path(__file__).resolve().parents[1]

#: lowest first; a module may import from its own layer and the ones before it
LAYERS: list[tuple[str, ...]] = [
    ("xo_fit.errors", "xo_fit.units", "xo_fit.constants", "xo_fit.config", "xo_fit.grid", "xo_fit.series"),
    ("xo_fit.job",),
    ("xo_fit.io",),
    ("xo_fit.physics",),
    ("xo_fit.solver",),
    ("xo_fit.model",),
    ("xo_fit.search",),
    ("xo_fit.stages",),
    ("xo_fit.output",),
    ("xo_fit.api",),
    ("xo_fit.batch",),
    ("xo_fit.demo", "xo_fit.cli", "xo_fit.__main__"),
]


def _layer(mod: str) -> int:
    for i, prefixes in enumerate(LAYERS):
        if any(mod == p or mod.startswith(p + ".") for p in prefixes):
            return i
    raise AssertionError(f"{mod} belongs to no layer: add it to LAYERS and to DEVELOPERS.md's map")


def _modules() -> dict[str, Path]:
    pkg = ROOT / "xo_fit"
    return {".".join(p.relative_to(ROOT).with_suffix("").parts).removesuffix(".__init__"): p
            for p in pkg.rglob("*.py")}


def _imports(mod: str, path: Path, modules: dict[str, Path]):
    """(target module, names taken, line) for every import of an xo_fit module, TYPE_CHECKING blocks left out."""
    is_pkg = path.name == "__init__.py"
    here = mod.split(".") if is_pkg else mod.split(".")[:-1]
    tree = ast.parse(path.read_text(encoding="utf-8"))
    typing_only = {id(n) for block in ast.walk(tree) if isinstance(block, ast.If)
                   and getattr(block.test, "id", None) == "TYPE_CHECKING" for n in ast.walk(block)}
    for node in ast.walk(tree):
        if id(node) in typing_only:
            continue
        if isinstance(node, ast.ImportFrom):
            base = here[: len(here) - node.level + 1] if node.level else []
            stem = ".".join(base + ([node.module] if node.module else [])) if node.level else (node.module or "")
            for a in node.names:
                sub = f"{stem}.{a.name}"
                if sub in modules:
                    yield sub, [], node.lineno
                elif stem in modules:
                    yield stem, [a.name], node.lineno
        elif isinstance(node, ast.Import):
            for a in node.names:
                if a.name in modules:
                    yield a.name, [], node.lineno


def test_every_import_goes_down_the_layers():
    modules = _modules()
    wrong = []
    for mod, path in modules.items():
        if mod == "xo_fit":  # the package's lazy attribute access to the API
            continue
        for target, _, line in _imports(mod, path, modules):
            if target != "xo_fit" and _layer(target) > _layer(mod):
                wrong.append(f"{path.relative_to(ROOT)}:{line}: {mod} imports {target} from a higher layer")
    assert not wrong, "\n".join(wrong)


def test_no_private_name_crosses_a_module():
    modules = _modules()
    wrong = []
    for mod, path in modules.items():
        for target, names, line in _imports(mod, path, modules):
            for n in names:
                if n.startswith("_") and not n.startswith("__") and target != mod:
                    wrong.append(f"{path.relative_to(ROOT)}:{line}: {mod} takes {target}.{n}")
        # attribute access through an imported module: module._name
        tree = ast.parse(path.read_text(encoding="utf-8"))
        aliases = {}
        for node in ast.walk(tree):
            if isinstance(node, ast.ImportFrom) and node.module is not None or isinstance(node, ast.ImportFrom):
                for a in node.names:
                    for target, _, _ in _imports(mod, path, modules):
                        if target.endswith("." + a.name):
                            aliases[a.asname or a.name] = target
        for node in ast.walk(tree):
            if (isinstance(node, ast.Attribute) and isinstance(node.value, ast.Name) and node.value.id in aliases
                    and node.attr.startswith("_") and not node.attr.startswith("__")):
                wrong.append(f"{path.relative_to(ROOT)}:{node.lineno}: {mod} uses {aliases[node.value.id]}.{node.attr}")
        # a private member of another object (net._check_values): only an object's own methods reach its
        # privates (self._x, cls._x); os._exit is the standard library's documented exit after a fork
        for node in ast.walk(tree):
            if (isinstance(node, ast.Attribute) and node.attr.startswith("_") and not node.attr.startswith("__")
                    and not (isinstance(node.value, ast.Name) and node.value.id in ("self", "cls", "os"))):
                wrong.append(f"{path.relative_to(ROOT)}:{node.lineno}: {mod} reaches {ast.unparse(node)}")
    assert not wrong, "\n".join(sorted(set(wrong)))


def test_the_package_has_no_import_cycle():
    """Imports (module level and inside functions) of xo_fit's modules form no cycle: the tree reads top-down."""
    modules = _modules()
    graph: dict[str, set[str]] = {m: set() for m in modules}
    for mod, path in modules.items():
        for target, _, _ in _imports(mod, path, modules):
            if target != mod and target != "xo_fit":
                graph[mod].add(target)
    seen: dict[str, int] = {}
    stack: list[str] = []

    def visit(m: str) -> None:
        seen[m] = 1
        stack.append(m)
        for n in sorted(graph[m]):
            if seen.get(n) == 1:
                raise AssertionError("import cycle: " + " -> ".join(stack[stack.index(n):] + [n]))
            if n not in seen:
                visit(n)
        stack.pop()
        seen[m] = 2

    for m in sorted(graph):
        if m not in seen:
            visit(m)


def test_no_module_is_too_long():
    """No hand-written module over ~500 lines (DEVELOPERS.md: small modules with one job each)."""
    long = {m: n for m, p in _modules().items() if (n := len(p.read_text(encoding="utf-8").splitlines())) > 520}
    assert not long, long


def test_imports_are_absolute():
    """Every import names its module from ``xo_fit`` (DEVELOPERS.md): a relative import hides the layer it
    reaches into from a reader and from grep."""
    relative = [f"{m}:{node.lineno}" for m, p in _modules().items()
                for node in ast.walk(ast.parse(p.read_text(encoding="utf-8")))
                if isinstance(node, ast.ImportFrom) and node.level]
    assert not relative, relative


def test_no_function_is_too_long():
    """No hand-written function over ~80 lines of code, its docstring aside (DEVELOPERS.md: split long ones
    into named steps)."""
    long = {}
    for m, p in _modules().items():
        for node in ast.walk(ast.parse(p.read_text(encoding="utf-8"))):
            if isinstance(node, (ast.FunctionDef, ast.AsyncFunctionDef)):
                first = node.body[0]
                doc = (first.end_lineno - first.lineno + 1 if isinstance(first, ast.Expr)
                       and isinstance(first.value, ast.Constant) and isinstance(first.value.value, str) else 0)
                if (n := node.end_lineno - node.lineno + 1 - doc) > 85:
                    long[f"{m}.{node.name}"] = n
    assert not long, long
