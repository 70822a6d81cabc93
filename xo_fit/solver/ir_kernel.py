"""A kernel of the IR (:mod:`xo_fit.solver.ir`), checked when it is made.

The checks make sure that a kernel computes the same in Python (numba) and in C, so that neither printer has
to infer anything: every name is declared (:class:`~xo_fit.solver.ir.Let`, a loop's index) in sight of every
read and keeps one type in the whole function; no read can see a name unset on some path (a name declared in
one branch of an ``if`` or inside a loop is out of sight after it; an integer name reused as a loop's index is
unset after that loop, where C leaves it one past the end and Python at the last value); no statement sets a
loop's index or a name its ``range`` bound reads inside the loop (Python reads the bound once, C on every
pass); no parameter is assigned; an integer is not divided; the function ends in its one ``return`` of an
integer; and every array index is provably non-negative (Python's ``a[-1]`` is the last element, C's is
outside the array): it is built from non-negative integer constants, array dimensions, and integer names
whose every assignment is such a sum, product or choice (a loop's index: its start), by the greatest such set.
Out-of-range positive indices are not checked (numba does not check them either). Any breach raises
ValueError naming the name and what was expected.
"""

from __future__ import annotations

import keyword
from dataclasses import dataclass

from xo_fit.solver.ir import (B1, DB10, F8, FUNCTIONS, I8, Array, Assign, Bin, Call, Cmp, Const, Dim, Expr, For,
                              Function, If, Let, Load, Named, Neg, Not, Return, Select, Stmt, Store, Update, Var)

#: Names no kernel may declare: Python's keywords and the names its text imports or calls, C's keywords and
#: what its text includes or defines.
RESERVED = frozenset(keyword.kwlist) | frozenset(FUNCTIONS) | {
    "numba", "range", "DB10", "auto", "break", "case", "char", "const", "continue", "default", "do", "double",
    "enum", "extern", "goto", "inline", "int", "long", "register", "restrict", "short", "signed", "sizeof",
    "static", "struct", "switch", "typedef", "union", "unsigned", "void", "volatile", "while", "pow", "fabs",
    "exp", "log", "INFINITY", "NAN", "intptr_t", "main"}
FASTMATH = ("contract", "reassoc")


@dataclass(frozen=True, eq=False)
class Kernel:
    """A checked function (:func:`check`) with what its Python text starts with: comment lines (without the
    ``#``) and the module constants it reads by name (``DB10`` is imported). Making one raises ValueError where
    the check fails."""

    function: Function
    comments: tuple[str, ...] = ()
    constants: tuple[Named, ...] = ()

    def __post_init__(self) -> None:
        check(self.function, self.constants)

    @property
    def name(self) -> str:
        """The function's name: what its Python module defines (its C library's entry: ``<name>_packed``)."""
        return self.function.name


def check(fn: Function, constants: tuple[Named, ...] = ()) -> None:
    """Raise ValueError unless ``fn`` computes the same in Python and in C (the module docstring).

    ``constants``: the module constants (:class:`~xo_fit.solver.ir.Named`) ``fn`` may read besides ``DB10``.
    """
    _Checker(fn, constants).run()


def _name_ok(name: str, taken: set[str]) -> None:
    if not name.isidentifier() or name.startswith("_") or name in RESERVED or name in taken:
        raise ValueError(f"'{name}' is not a name a kernel may declare")


def nonneg(e, nn: set[str]) -> bool:
    """Whether an integer expression is provably >= 0, the names in ``nn`` being so."""
    if isinstance(e, Const):
        return e.ty == I8 and e.value >= 0
    if isinstance(e, Var):
        return e.name in nn
    if isinstance(e, Dim):
        return True
    if isinstance(e, Bin) and e.op in ("+", "*"):
        return nonneg(e.a, nn) and nonneg(e.b, nn)
    if isinstance(e, Select):
        return nonneg(e.a, nn) and nonneg(e.b, nn)
    return False


class _Checker:
    def __init__(self, fn: Function, constants: tuple[Named, ...]) -> None:
        self.fn = fn
        self.named = {c.name: c.value for c in constants}
        self.named[DB10.name] = DB10.value
        self.arrays: dict[str, Array] = {}
        self.scalars: set[str] = set()
        taken: set[str] = set(self.named)
        for p in fn.params:
            _name_ok(p.name, taken)
            taken.add(p.name)
            if isinstance(p, Array) and p.ndim >= 1:
                self.arrays[p.name] = p
            elif isinstance(p, Var) and p.ty == F8:
                self.scalars.add(p.name)
            else:
                raise ValueError(f"parameter '{p.name}': a float (Var of F8) or an array")
        # a C array's dimensions are passed (or defined) as NAME_dK: no local may take those names
        self.taken = taken | {f"{a.name}_d{k}" for a in self.arrays.values() for k in range(a.ndim)}
        self.scopes: list[set[str]] = [set()]
        self.types: dict[str, str] = {}  # every local name's one type
        self.unset: set[str] = set()  # declared names that this path may have left unset
        self.frozen: dict[str, str] = {}  # name -> why no statement here may set it
        self.int_defs: dict[str, list] = {}  # integer name -> what it is set to: (op, expression)
        self.indexes: list = []

    def run(self) -> None:
        fn = self.fn
        _name_ok(fn.name, set())
        if not set(fn.fastmath) <= set(FASTMATH):
            raise ValueError(f"fastmath {fn.fastmath}: only {FASTMATH}")
        if not fn.body or not isinstance(fn.body[-1], Return):
            raise ValueError(f"'{fn.name}' must end in a return")
        self.block(fn.body[:-1])
        if self.read(fn.body[-1].value).ty != I8:
            raise ValueError(f"'{fn.name}' must return an integer")
        self.check_indexes()

    def visible(self, name: str) -> bool:
        return any(name in s for s in self.scopes)

    def read(self, e):
        """Check every read in expression ``e``; returns ``e``."""
        for x in walk(e):
            if isinstance(x, Var):
                if x.name in self.scalars:
                    if x.ty != F8:
                        raise ValueError(f"parameter '{x.name}' read as {x.ty}")
                elif not self.visible(x.name):
                    raise ValueError(f"'{x.name}' is read where it is not declared")
                elif x.name in self.unset:
                    raise ValueError(f"'{x.name}' may be read before it is set on this path")
                elif self.types[x.name] != x.ty:
                    raise ValueError(f"'{x.name}' is {self.types[x.name]}, read as {x.ty}")
            elif isinstance(x, Named):
                if self.named.get(x.name) != x.value:
                    raise ValueError(f"constant '{x.name}' is not among the kernel's (or has another value)")
            elif isinstance(x, (Load, Dim)):
                if self.arrays.get(x.array.name) != x.array:
                    raise ValueError(f"'{x.array.name}' is not an array parameter of {x.array.ndim} dimensions")
                if isinstance(x, Load):
                    self.indexes += [(x.array.name, k, i) for k, i in enumerate(x.index)]
            elif not isinstance(x, (Const, Bin, Cmp, Neg, Not, Select, Call)):
                raise ValueError(f"{type(x).__name__} is not an expression")
        return e

    def target(self, var: Var, declare: bool) -> None:
        """Checks for setting ``var`` (declared here when ``declare``)."""
        name = var.name
        if name in self.scalars or name in self.arrays or name in self.named:
            raise ValueError(f"assignment to parameter or constant '{name}'")
        if declare:
            if self.visible(name):
                raise ValueError(f"'{name}' is declared again in sight of its declaration")
            _name_ok(name, self.taken)
            if self.types.setdefault(name, var.ty) != var.ty:
                raise ValueError(f"'{name}' holds an integer and a float")
            self.scopes[-1].add(name)
            return
        if not self.visible(name):
            raise ValueError(f"'{name}' is set where it is not declared")
        if self.types[name] != var.ty:
            raise ValueError(f"'{name}' is {self.types[name]}, set as {var.ty}")
        if name in self.frozen:
            raise ValueError(f"'{name}' is set inside the loop whose {self.frozen[name]} it is")

    def block(self, body: tuple[Stmt, ...]) -> None:
        for s in body:
            self.stmt(s)

    def inner(self, body: tuple[Stmt, ...], names: set[str]) -> None:
        """A nested block with its own declarations (``names`` declared on entry)."""
        self.scopes.append(set(names))
        self.block(body)
        self.scopes.pop()

    def stmt(self, s: Stmt) -> None:
        if isinstance(s, (Let, Assign)):
            if self.read(s.value).ty != s.var.ty:
                raise ValueError(f"'{s.var.name}' ({s.var.ty}) set to a {s.value.ty} value")
            self.target(s.var, isinstance(s, Let))
            self.unset.discard(s.var.name)
            if s.var.ty == I8:
                self.int_defs.setdefault(s.var.name, []).append(("=", s.value))
        elif isinstance(s, Update):
            self.update(s)
        elif isinstance(s, Store):
            if s.op not in ("", "+", "-", "*", "/"):
                raise ValueError(f"store with {s.op!r}=")
            self.read(s.target)
            self.read(s.value)
        elif isinstance(s, For):
            self.loop(s)
        elif isinstance(s, If):
            if self.read(s.cond).ty != B1:
                raise ValueError("an if's test must be a comparison")
            before = set(self.unset)
            self.inner(s.body, set())
            then, self.unset = self.unset, before
            self.inner(s.orelse, set())
            self.unset |= then
        elif isinstance(s, Return):
            raise ValueError("a return before the function's end")
        else:
            raise ValueError(f"{type(s).__name__} is not a statement")

    def update(self, s: Update) -> None:
        if s.op not in ("+", "-", "*", "/"):
            raise ValueError(f"'{s.var.name}' {s.op}=")
        self.read(s.value)
        self.read(s.var)  # declared, set on every path here
        self.target(s.var, False)
        if s.var.ty == I8 and (s.op == "/" or s.value.ty != I8):
            raise ValueError(f"'{s.var.name}' {s.op}= {s.value.ty} on an integer")
        if s.var.ty == I8:
            self.int_defs.setdefault(s.var.name, []).append((s.op + "=", s.value))

    def loop(self, s: For) -> None:
        var = s.var
        for e in (s.lo, s.hi):
            if e is not None and self.read(e).ty != I8:
                raise ValueError(f"range of a float (loop over '{var.name}')")
        if var.ty != I8:
            raise ValueError(f"loop index '{var.name}' must be an integer")
        bound = {x.name for e in (s.lo, s.hi) if e is not None for x in _names(e)}
        if var.name in bound:
            raise ValueError(f"loop index '{var.name}' in its own range")
        if declare := s.declare:
            if self.visible(var.name):
                raise ValueError(f"loop index '{var.name}' is declared again in sight of its declaration")
            _name_ok(var.name, self.taken)
            if self.types.setdefault(var.name, I8) != I8:
                raise ValueError(f"'{var.name}' holds an integer and a float")
        else:
            self.target(var, False)
        self.int_defs.setdefault(var.name, []).append(("range", s.lo if s.lo is not None else Const(0)))
        before_unset, before_frozen = set(self.unset), dict(self.frozen)
        self.unset.discard(var.name)
        self.frozen.update(dict.fromkeys(bound, "range bound"))
        self.frozen[var.name] = "index"
        self.inner(s.body, {var.name} if declare else set())
        self.frozen = before_frozen
        self.unset = before_unset | ({var.name} if not declare else set())

    def check_indexes(self) -> None:
        """Raise unless every index is provably non-negative (by the greatest set of such integer names)."""
        nn = {n for n, t in self.types.items() if t == I8}

        def ok(d) -> bool:
            op, e = d
            return op in ("=", "range", "+=", "*=") and nonneg(e, nn)

        changed = True
        while changed:
            bad = {n for n in nn if not all(ok(d) for d in self.int_defs.get(n, ()))}
            nn -= bad
            changed = bool(bad)
        for name, k, e in self.indexes:
            if not nonneg(e, nn):
                raise ValueError(f"index {k} of '{name}' is not provably non-negative")


def _names(e) -> list[Var]:
    """The names an expression reads."""
    return [x for x in walk(e) if isinstance(x, Var)]


def children(x: Expr) -> tuple:
    """The sub-expressions of an expression."""
    if isinstance(x, (Bin, Cmp)):
        return (x.a, x.b)
    if isinstance(x, (Neg, Not)):
        return (x.a,)
    if isinstance(x, Select):
        return (x.cond, x.a, x.b)
    if isinstance(x, Call):
        return x.args
    if isinstance(x, Load):
        return x.index
    return ()


def walk(e: Expr):
    """Every expression in ``e``, ``e`` first (without recursion: chains of thousands of terms are fine)."""
    stack = [e]
    while stack:
        x = stack.pop()
        yield x
        stack.extend(children(x))


def expressions(body):
    """Every expression statements hold at their top (values, targets, bounds, tests), nested blocks included."""
    for s in body:
        if isinstance(s, (Let, Assign, Update)):
            yield s.value
        elif isinstance(s, Store):
            yield s.target
            yield s.value
        elif isinstance(s, For):
            yield from ([s.hi] if s.lo is None else [s.lo, s.hi])
            yield from expressions(s.body)
        elif isinstance(s, If):
            yield s.cond
            yield from expressions(s.body)
            yield from expressions(s.orelse)
        elif isinstance(s, Return):
            yield s.value
