"""Every public function and class of the package has a docstring; the public API's are numpydoc with units and shapes.

Sources: the numpydoc docstring standard (its "Style guide": the "Parameters" and "Returns" sections, one entry
``name : type`` per parameter, the description indented below) [SRC], parsed here by numpydoc's own
``docscrape`` rather than by a parser of ours; the project's conventions for what the entries say (DEVELOPERS.md,
"Conventions": SI inside, frequency axis last, so a number states its unit and an array its shape) [CP].
"""

from __future__ import annotations

import ast
import inspect
import re
from pathlib import Path

import pytest
from numpydoc.docscrape import ClassDoc, FunctionDoc

import xo_fit
import xo_fit.api

ROOT = Path(__file__).resolve().parents[1]

#: Files whose docstrings are still being written (by whoever edits them now): the checks skip exactly these.
#: Empty this set as each is finished; a path ending in "/" stands for every file in that folder.
PENDING: set[str] = set()

#: The units a public number may state (SI, with dB and degrees at the edges), or "dimensionless".
UNITS = r"(Hz|s|ms|V|A|W|ohms?|F|H|m|mm|m\^2|m\^3|m/s|kg|K|Pa|N|dB|deg|degrees|rad)"
STATED_UNIT = re.compile(rf"dimensionless|\[\s*{UNITS}\s*\]|\(\s*{UNITS}\s*\)|\bin {UNITS}(?![\w^/])")
#: An array's shape as the docs write it: ``(F,)``, ``(N, F)``, ``(D, A, F)``.
SHAPE = re.compile(r"\((?:\s*\w+\s*,)+\s*\w*\s*\)")
NUMERIC = re.compile(r"\b(int|float|complex|number)\b")
ARRAY = re.compile(r"\b(ndarray|array|array_like|ArrayLike)\b")


def _pending(rel: str) -> bool:
    return any(rel == p or (p.endswith("/") and rel.startswith(p)) for p in PENDING)


def _is_overload_or_accessor(node: ast.FunctionDef | ast.AsyncFunctionDef) -> bool:
    """An ``@overload`` stub (the implementation carries the docstring) or a property's setter/deleter."""
    for d in node.decorator_list:
        name = d.attr if isinstance(d, ast.Attribute) else getattr(d, "id", "")
        if name in ("overload", "setter", "deleter"):
            return True
    return False


def _public_definitions(path: Path):
    """(line, qualified name, node) of the public module-level functions and classes in a source file, and of
    the public methods and properties defined in those classes' bodies."""
    tree = ast.parse(path.read_text(encoding="utf-8"))
    defs = (ast.FunctionDef, ast.AsyncFunctionDef, ast.ClassDef)
    for node in tree.body:
        if not isinstance(node, defs) or node.name.startswith("_"):
            continue
        if isinstance(node, ast.ClassDef):
            yield node.lineno, node.name, node
            for m in node.body:
                if isinstance(m, defs[:2]) and not m.name.startswith("_") and not _is_overload_or_accessor(m):
                    yield m.lineno, f"{node.name}.{m.name}", m
        elif not _is_overload_or_accessor(node):
            yield node.lineno, node.name, node


def test_every_public_function_and_class_has_a_docstring():
    missing, seen = [], 0
    for path in sorted((ROOT / "xo_fit").rglob("*.py")):
        rel = path.relative_to(ROOT).as_posix()
        if _pending(rel):
            continue
        for line, name, node in _public_definitions(path):
            seen += 1
            if not (ast.get_docstring(node) or "").strip():
                missing.append(f"{rel}:{line} {name}")
    assert seen > 300, f"found only {seen} public definitions: the walk misses files"
    assert not missing, f"{len(missing)} public definitions without a docstring:\n" + "\n".join(missing)


def _api_objects():
    """Every function and class the package exports (xo_fit.__all__ and xo_fit.api.__all__), with the file it
    is defined in."""
    names = sorted(set(xo_fit.__all__) | set(xo_fit.api.__all__))
    out = []
    for name in names:
        obj = getattr(xo_fit, name, None) or getattr(xo_fit.api, name)
        if inspect.isfunction(obj) or inspect.isclass(obj):
            rel = Path(inspect.getsourcefile(obj)).resolve().relative_to(ROOT).as_posix()
            out.append((name, obj, rel))
    return out


def _returns_something(fn) -> bool:
    """Whether a function returns a value: a ``return <value>`` in its own body (not in a nested function)."""
    src = inspect.getsource(fn)
    tree = ast.parse(src[len(src) - len(src.lstrip()):] if src[:1].isspace() else src)
    top = tree.body[0]

    def walk(node):
        for child in ast.iter_child_nodes(node):
            if isinstance(child, (ast.FunctionDef, ast.AsyncFunctionDef, ast.Lambda, ast.ClassDef)):
                continue
            if isinstance(child, ast.Return) and child.value is not None:
                if not (isinstance(child.value, ast.Constant) and child.value.value is None):
                    return True
            if walk(child):
                return True
        return False

    return walk(top)


def _entry_problems(where: str, entry, annotation: str = "") -> list[str]:
    """A numpydoc entry (name, type, description lines) of a number that states no unit, or of an array that
    states no shape."""
    text = entry.type + " " + " ".join(entry.desc)
    kinds = f"{entry.type} {annotation}"
    problems = []
    if ARRAY.search(kinds) and not SHAPE.search(text):
        problems.append(f"{where}: {entry.name} is an array: state its shape, e.g. (F,) or (N, F)")
    elif NUMERIC.search(kinds) and not STATED_UNIT.search(text):
        problems.append(f"{where}: {entry.name} is a number: state its unit, e.g. 'in Hz', '(ohm)', or "
                        "'dimensionless'")
    return problems


def _function_problems(where: str, fn, skip_first: bool = False) -> list[str]:
    doc = FunctionDoc(fn)
    if not doc["Summary"]:
        return [f"{where}: no summary line"]
    params = [p for p in inspect.signature(fn).parameters.values()
              if p.kind not in (p.VAR_POSITIONAL, p.VAR_KEYWORD)]
    if skip_first:
        params = params[1:]
    documented = {name.strip(): e for e in doc["Parameters"] for name in e.name.split(",")}
    problems = []
    if params and not doc["Parameters"]:
        problems.append(f"{where}: no Parameters section")
    for p in params:
        if p.name not in documented:
            problems.append(f"{where}: parameter {p.name} not in the Parameters section")
        else:
            annotation = p.annotation if isinstance(p.annotation, str) else ""
            problems += _entry_problems(where, documented[p.name], annotation)
    if _returns_something(fn):
        if not doc["Returns"]:
            problems.append(f"{where}: returns a value but has no Returns section")
        for e in doc["Returns"]:
            problems += _entry_problems(where, e)
    return problems


def _class_problems(where: str, cls) -> list[str]:
    doc = ClassDoc(cls, config={"show_class_members": False})
    if not doc["Summary"]:
        return [f"{where}: no summary line"]
    problems = []
    try:
        params = [p for p in inspect.signature(cls).parameters.values()
                  if p.kind not in (p.VAR_POSITIONAL, p.VAR_KEYWORD)]
    except (TypeError, ValueError):
        params = []
    documented = {name.strip(): e for e in [*doc["Parameters"], *doc["Attributes"]] for name in e.name.split(",")}
    for p in params:
        if p.name not in documented:
            problems.append(f"{where}: constructor parameter {p.name} not in its Parameters (or Attributes) section")
        else:
            problems += _entry_problems(where, documented[p.name], p.annotation if isinstance(p.annotation, str)
                                        else "")
    for name, member in vars(cls).items():
        if not name.startswith("_") and inspect.isfunction(member):
            problems += _function_problems(f"{where}.{name}", member, skip_first=True)
    return problems


def test_the_public_api_is_numpydoc_with_units_and_shapes():
    objects = _api_objects()
    assert {"load_job", "fit", "snap", "spread", "prune", "fit_driver", "XoFitError"} <= {n for n, _, _ in objects}
    problems = []
    for name, obj, rel in objects:
        if _pending(rel):
            continue
        if inspect.isclass(obj):
            problems += _class_problems(name, obj)
        else:
            problems += _function_problems(name, obj)
    assert not problems, f"{len(problems)} problems:\n" + "\n".join(problems)


#: Modules the import-based checks leave out: importing ``xo_fit.__main__`` runs the command line (it defines
#: nothing public; the AST-based check above still reads it).
NOT_IMPORTED = {"xo_fit/__main__.py"}


def _package_modules():
    """Every module of the package outside PENDING and NOT_IMPORTED, imported."""
    import importlib

    out = []
    for path in sorted((ROOT / "xo_fit").rglob("*.py")):
        rel = path.relative_to(ROOT).as_posix()
        if not _pending(rel) and rel not in NOT_IMPORTED:
            name = rel.removesuffix(".py").removesuffix("/__init__").replace("/", ".")
            out.append((rel, importlib.import_module(name)))
    return out


def test_numpydoc_sections_are_well_formed():
    """Wherever a docstring has numpydoc sections, they parse as the standard writes them: each entry
    ``name : type`` (a bare ``name:`` is not numpydoc), and a function's Parameters name exactly its
    parameters."""
    problems, seen = [], 0
    for rel, mod in _package_modules():
        for name, obj in vars(mod).items():
            if name.startswith("_") or getattr(obj, "__module__", None) != mod.__name__:
                continue
            members = [(name, obj)]
            if inspect.isclass(obj):
                members += [(f"{name}.{k}", v) for k, v in vars(obj).items()
                            if not k.startswith("_") and inspect.isfunction(v)]
            for qual, member in members:
                doc = member.__doc__ or ""
                if not re.search(r"^\s*(Parameters|Returns|Attributes)\n\s*-{3,}", doc, re.M):
                    continue
                seen += 1
                where = f"{rel} {qual}"
                if inspect.isclass(member):
                    parsed = ClassDoc(member, config={"show_class_members": False})
                    entries = [*parsed["Parameters"], *parsed["Attributes"]]
                else:
                    parsed = FunctionDoc(member)
                    entries = list(parsed["Parameters"])
                    params = [p for p in inspect.signature(member).parameters.values()
                              if p.name not in ("self", "cls")]
                    documented = {n.strip().lstrip("*") for e in entries for n in e.name.split(",")}
                    names = {p.name for p in params}
                    if entries or any(p.kind not in (p.VAR_POSITIONAL, p.VAR_KEYWORD) for p in params):
                        problems += [f"{where}: parameter {n} not documented" for n in sorted(names - documented)]
                        problems += [f"{where}: documents {n!r}, which is no parameter"
                                     for n in sorted(documented - names)]
                problems += [f"{where}: entry {e.name!r} has no type (write 'name : type')"
                             for e in entries if not e.type]
    assert seen > 50, f"found only {seen} docstrings with numpydoc sections"
    assert not problems, f"{len(problems)} problems:\n" + "\n".join(problems)


@pytest.mark.parametrize("text, numeric, array, ok", [
    # the checks themselves, on hand-written entries (the numpydoc standard's own form: name : type, description)
    ("f : float\n    The corner frequency in Hz.", True, False, True),
    ("f : float\n    The corner frequency.", True, False, False),
    ("n : int\n    How many draws (dimensionless).", True, False, True),
    ("z : ndarray\n    Impedance, complex, shape (F,), in ohm.", False, True, True),
    ("z : ndarray\n    Impedance, complex, in ohm.", False, True, False),
    ("h : ndarray\n    Responses (D, A, F).", False, True, True),
    ("c : float\n    Capacitance (F).", True, False, True),
    ("c : float\n    Capacitance (F,) of nothing.", True, False, False),
])
def test_the_unit_and_shape_checks_tell_good_entries_from_bad(text, numeric, array, ok):
    def f(x):
        return x

    f.__doc__ = "Summary.\n\nParameters\n----------\n" + text + "\n"
    entry = FunctionDoc(f)["Parameters"][0]
    assert bool(NUMERIC.search(entry.type)) == numeric and bool(ARRAY.search(entry.type)) == array
    assert (not _entry_problems("f", entry)) == ok
