"""The generated kernels' intermediate representation: typed expressions and statements that one printer writes
as Python for numba (:mod:`xo_fit.solver.ir_python`) and another as C (:mod:`xo_fit.solver.ir_c`).

Expressions: names (:class:`Var`, typed ``F8`` double or ``I8`` 64-bit integer), constants (:class:`Const`, an
``int`` or a ``float``; :class:`Named`, a module-level float such as ``DB10``), ``+ - * /``, ``**``, unary
minus, comparisons and ``not`` (type ``B1``: only tested, never stored or computed with), a conditional
(:func:`select`), calls of a fixed set of functions (``max``, ``abs``, ``sqrt``, ``ln``, ``ln_floored``,
``float``), array elements with explicit indices (``arr[i, j]``: :class:`Load`) and array dimensions
(``arr.shape(k)``: :class:`Dim`). Python's operators build them (``a * b - c``), in Python's own grouping.

Statements: :class:`Let` declares a name in the block it stands in and sets it (a C declaration with its
initial value), :class:`Assign` sets a name declared before, :class:`Update` is ``name op= value``,
:class:`Store` writes (or adds to) an array element, :class:`For` is a counted loop over ``range`` (its index
declared by the loop, or an integer name declared before), :class:`If` has an optional else, :class:`Return`
ends the function. A :class:`Function` has typed parameters (float scalars, C-contiguous float64 arrays of a
given number of dimensions) and the fastmath set its compilers use; a :class:`xo_fit.solver.ir_kernel.Kernel`
is a function with the comment lines and module constants its Python text starts with.

A kernel is checked when it is made (:mod:`xo_fit.solver.ir_kernel`): a name read where it may be unset,
declared twice in sight of itself or holding two types, an index not provably non-negative, integer division,
a loop's index or bound changed in its body raise ValueError then, whichever printer comes later. What passes
computes the same in both printers' languages (tests/test_ir.py runs random kernels through both).
"""

from __future__ import annotations

import math
import numbers
from dataclasses import dataclass, field

from xo_fit.constants import DB10 as _DB10

F8 = "f8"  #: a double
I8 = "i8"  #: a 64-bit integer
B1 = "b1"  #: a condition: the value of a comparison or ``not``

#: The functions a kernel may call, by name, with their number of arguments.
FUNCTIONS = {"max": 2, "abs": 1, "sqrt": 1, "ln": 1, "ln_floored": 1, "float": 1}


def _set(obj, name: str, value) -> None:
    object.__setattr__(obj, name, value)


class Expr:
    """An expression; Python's arithmetic operators and ``< <= > >=`` on it build new ones."""

    __slots__ = ()
    __array_ufunc__ = None  # numpy's numbers and arrays leave the operators to the expression
    ty: str

    def __add__(self, o):
        return Bin("+", self, wrap(o))

    def __radd__(self, o):
        return Bin("+", wrap(o), self)

    def __sub__(self, o):
        return Bin("-", self, wrap(o))

    def __rsub__(self, o):
        return Bin("-", wrap(o), self)

    def __mul__(self, o):
        return Bin("*", self, wrap(o))

    def __rmul__(self, o):
        return Bin("*", wrap(o), self)

    def __truediv__(self, o):
        return Bin("/", self, wrap(o))

    def __rtruediv__(self, o):
        return Bin("/", wrap(o), self)

    def __pow__(self, o):
        return Bin("**", self, wrap(o))

    def __neg__(self):
        return Neg(self)

    def __lt__(self, o):
        return Cmp("<", self, wrap(o))

    def __le__(self, o):
        return Cmp("<=", self, wrap(o))

    def __gt__(self, o):
        return Cmp(">", self, wrap(o))

    def __ge__(self, o):
        return Cmp(">=", self, wrap(o))

    def eq(self, o) -> Cmp:
        """``self == o`` (B1); a method, as ``==`` on expressions compares them by identity."""
        return Cmp("==", self, wrap(o))

    def ne(self, o) -> Cmp:
        """``self != o`` (B1); a method, as :meth:`eq`."""
        return Cmp("!=", self, wrap(o))


def _value(e: Expr, what: str) -> Expr:
    """``e`` if it is a number (not a condition), else ValueError."""
    if not isinstance(e, Expr):
        raise ValueError(f"{what}: {e!r} is not an expression")
    if e.ty == B1:
        raise ValueError(f"{what}: a condition used as a number")
    return e


@dataclass(frozen=True, eq=False, slots=True)
class Const(Expr):
    """A literal: an ``int`` is an I8 constant, a ``float`` an F8 one."""

    value: int | float
    ty: str = field(init=False)

    def __post_init__(self) -> None:
        v = self.value
        if isinstance(v, bool) or not isinstance(v, numbers.Real) or not math.isfinite(v):
            raise ValueError(f"constant {v!r}: a finite int or float")
        if isinstance(v, numbers.Integral):
            _set(self, "value", int(v))
            _set(self, "ty", I8)
        else:
            _set(self, "value", float(v))
            _set(self, "ty", F8)


@dataclass(frozen=True, eq=False, slots=True)
class Named(Expr):
    """A module-level float constant: Python reads it by name, C writes its value."""

    name: str
    value: float
    ty: str = field(init=False, default=F8)

    def __post_init__(self) -> None:
        _set(self, "value", float(self.value))


#: 10 / ln 10, as the generated kernels import it from :mod:`xo_fit.solver.vecmath`.
DB10 = Named("DB10", _DB10)


@dataclass(frozen=True, eq=False, slots=True)
class Var(Expr):
    """A scalar name of type F8 or I8 (a local, or a float parameter)."""

    name: str
    ty: str = F8

    def __post_init__(self) -> None:
        if self.ty not in (F8, I8):
            raise ValueError(f"'{self.name}': type {self.ty!r}")


def f8(name: str) -> Var:
    """A double name."""
    return Var(name, F8)


def i8(name: str) -> Var:
    """An integer name."""
    return Var(name, I8)


@dataclass(frozen=True, slots=True)
class Array:
    """A C-contiguous float64 array parameter of ``ndim`` dimensions; ``a[i, j]`` reads an element."""

    name: str
    ndim: int

    def __getitem__(self, index) -> Load:
        return Load(self, tuple(wrap(i) for i in (index if isinstance(index, tuple) else (index,))))

    def shape(self, axis: int) -> Dim:
        """Its dimension ``axis`` (0 first), an I8 expression (:class:`Dim`)."""
        return Dim(self, axis)

    def store(self, index, value, op: str = "") -> Store:
        """``a[index] = value`` (``op`` "+": ``a[index] += value``)."""
        return Store(self[index], wrap(value), op)


@dataclass(frozen=True, eq=False, slots=True)
class Dim(Expr):
    """Dimension ``axis`` of an array parameter (I8)."""

    array: Array
    axis: int
    ty: str = field(init=False, default=I8)

    def __post_init__(self) -> None:
        if not 0 <= self.axis < self.array.ndim:
            raise ValueError(f"'{self.array.name}' has no dimension {self.axis}")


@dataclass(frozen=True, eq=False, slots=True)
class Load(Expr):
    """An element of an array parameter: one I8 index per dimension."""

    array: Array
    index: tuple[Expr, ...]
    ty: str = field(init=False, default=F8)

    def __post_init__(self) -> None:
        if len(self.index) != self.array.ndim:
            raise ValueError(f"'{self.array.name}' indexed with {len(self.index)} indices")
        for i in self.index:
            if _value(i, f"index of '{self.array.name}'").ty != I8:
                raise ValueError(f"'{self.array.name}' indexed by a float")


@dataclass(frozen=True, eq=False, slots=True)
class Bin(Expr):
    """``a op b`` for op in ``+ - * / **``; ``/`` and ``**`` give F8 and refuse two integers."""

    op: str
    a: Expr
    b: Expr
    ty: str = field(init=False)

    def __post_init__(self) -> None:
        if self.op not in ("+", "-", "*", "/", "**"):
            raise ValueError(f"operator {self.op!r}")
        ints = _value(self.a, self.op).ty == I8 and _value(self.b, self.op).ty == I8
        if ints and self.op in ("/", "**"):
            raise ValueError(f"'{self.op}' of two integers")
        _set(self, "ty", I8 if ints else F8)


@dataclass(frozen=True, eq=False, slots=True)
class Neg(Expr):
    """``-a``."""

    a: Expr
    ty: str = field(init=False)

    def __post_init__(self) -> None:
        _set(self, "ty", _value(self.a, "-").ty)


@dataclass(frozen=True, eq=False, slots=True)
class Cmp(Expr):
    """``a op b`` for op in ``< <= > >= == !=`` (B1)."""

    op: str
    a: Expr
    b: Expr
    ty: str = field(init=False, default=B1)

    def __post_init__(self) -> None:
        if self.op not in ("<", "<=", ">", ">=", "==", "!="):
            raise ValueError(f"comparison {self.op!r}")
        _value(self.a, self.op), _value(self.b, self.op)


@dataclass(frozen=True, eq=False, slots=True)
class Not(Expr):
    """``not a`` of a condition (B1)."""

    a: Expr
    ty: str = field(init=False, default=B1)

    def __post_init__(self) -> None:
        if not isinstance(self.a, Expr) or self.a.ty != B1:
            raise ValueError("not of a number")


@dataclass(frozen=True, eq=False, slots=True)
class Select(Expr):
    """``a if cond else b`` (F8 unless both are I8)."""

    cond: Expr
    a: Expr
    b: Expr
    ty: str = field(init=False)

    def __post_init__(self) -> None:
        if not isinstance(self.cond, Expr) or self.cond.ty != B1:
            raise ValueError("a conditional's test must be a comparison")
        ints = _value(self.a, "if").ty == I8 and _value(self.b, "else").ty == I8
        _set(self, "ty", I8 if ints else F8)


@dataclass(frozen=True, eq=False, slots=True)
class Call(Expr):
    """A call of one of :data:`FUNCTIONS` (F8); ``max`` and ``abs`` take doubles only (on integers Python's
    would give an integer)."""

    fn: str
    args: tuple[Expr, ...]
    ty: str = field(init=False, default=F8)

    def __post_init__(self) -> None:
        if FUNCTIONS.get(self.fn) != len(self.args):
            raise ValueError(f"call of {self.fn} with {len(self.args)} arguments")
        for a in self.args:
            if _value(a, self.fn).ty != F8 and self.fn in ("max", "abs"):
                raise ValueError(f"{self.fn} of an integer")


def wrap(x) -> Expr:
    """An expression as it is, a Python number as a :class:`Const`."""
    if isinstance(x, Expr):
        return x
    if isinstance(x, numbers.Real) and not isinstance(x, bool):
        return Const(int(x) if isinstance(x, numbers.Integral) else float(x))
    raise ValueError(f"{x!r} is not an expression")


def maximum(a, b) -> Expr:
    """Python's ``max(a, b)``: ``b`` where ``b > a``, else ``a`` (a NaN in ``a`` is kept)."""
    return Call("max", (wrap(a), wrap(b)))


def absolute(a) -> Expr:
    """``abs(a)`` of a double (C's ``fabs``)."""
    return Call("abs", (wrap(a),))


def sqrt(a) -> Expr:
    """The square root of ``a`` (F8)."""
    return Call("sqrt", (wrap(a),))


def ln(a) -> Expr:
    """:func:`xo_fit.solver.vecmath.ln`: IEEE's log, vectorisable."""
    return Call("ln", (wrap(a),))


def ln_floored(a) -> Expr:
    """:func:`xo_fit.solver.vecmath.ln_floored`: for arguments floored at a positive normal number."""
    return Call("ln_floored", (wrap(a),))


def to_float(a) -> Expr:
    """``float(a)``: an integer as a double (C's cast)."""
    return Call("float", (wrap(a),))


def select(cond: Expr, a, b) -> Expr:
    """``a if cond else b`` (:class:`Select`); ``cond`` a comparison or ``not`` (B1)."""
    return Select(cond, wrap(a), wrap(b))


def negate_leading(term: Expr) -> Expr:
    """``-term`` as the text ``"-" + term`` reads: the minus on a product's leading factor (``-a * b``)."""
    if isinstance(term, Bin) and term.op in ("*", "/"):
        return Bin(term.op, negate_leading(term.a), term.b)
    return Neg(term)


def signed_sum(terms) -> Expr:
    """The sum of ``sign * term`` over ``terms`` [(+1 | -1, expression)], left to right: ``a - b * c + d``; a
    leading minus goes on the first term's leading factor."""
    out: Expr | None = None
    for sign, term in terms:
        term = wrap(term)
        if out is None:
            out = term if sign > 0 else negate_leading(term)
        else:
            out = out + term if sign > 0 else out - term
    if out is None:
        raise ValueError("a sum of no terms")
    return out


def total(terms) -> Expr:
    """``a + b + c`` left to right."""
    return signed_sum([(1, t) for t in terms])


class Stmt:
    """A statement: the base of :class:`Let`, :class:`Assign`, :class:`Update`, :class:`Store`, :class:`For`,
    :class:`If` and :class:`Return`."""

    __slots__ = ()


@dataclass(frozen=True, eq=False, slots=True)
class Let(Stmt):
    """Declare ``var`` in this block and set it to ``value`` (of the same type)."""

    var: Var
    value: Expr


@dataclass(frozen=True, eq=False, slots=True)
class Assign(Stmt):
    """Set ``var``, declared before, to ``value`` (of the same type)."""

    var: Var
    value: Expr


@dataclass(frozen=True, eq=False, slots=True)
class Update(Stmt):
    """``var op= value`` for op in ``+ - * /`` (``/`` not on an integer)."""

    var: Var
    op: str
    value: Expr


@dataclass(frozen=True, eq=False, slots=True)
class Store(Stmt):
    """``target = value``, or ``target op= value`` with ``op`` in ``+ - * /``."""

    target: Load
    value: Expr
    op: str = ""


@dataclass(frozen=True, eq=False, slots=True)
class For(Stmt):
    """``for var in range(lo, hi)`` (``lo`` None: ``range(hi)``, from 0). ``declare``: the loop declares its
    index (gone after the loop); else ``var`` is an integer name declared before (unset after the loop: C
    leaves it one past the end, Python at the last value)."""

    var: Var
    lo: Expr | None
    hi: Expr
    body: tuple[Stmt, ...]
    declare: bool = True


@dataclass(frozen=True, eq=False, slots=True)
class If(Stmt):
    """``if cond: body`` with an optional ``else: orelse``; each block declares its own names."""

    cond: Expr
    body: tuple[Stmt, ...]
    orelse: tuple[Stmt, ...] = ()


@dataclass(frozen=True, eq=False, slots=True)
class Return(Stmt):
    """The function's integer result: its last statement, and only there."""

    value: Expr


def let(var: Var, value) -> Let:
    """Declare ``var`` in this block, set to ``value`` (a number becomes a :class:`Const`): :class:`Let`."""
    return Let(var, wrap(value))


def assign(var: Var, value) -> Assign:
    """Set ``var``, declared before, to ``value``: :class:`Assign`."""
    return Assign(var, wrap(value))


def update(var: Var, value, op: str = "+") -> Update:
    """``var op= value`` (``+=`` unless ``op`` says otherwise): :class:`Update`."""
    return Update(var, op, wrap(value))


def loop(var: Var, lo, hi, body, declare: bool = True) -> For:
    """``for var in range(lo, hi)``; ``lo`` None writes ``range(hi)``."""
    return For(var, None if lo is None else wrap(lo), wrap(hi), tuple(body), declare)


def when(cond: Expr, body, orelse=()) -> If:
    """``if cond: body else: orelse`` (:class:`If`; no else when ``orelse`` is empty)."""
    return If(cond, tuple(body), tuple(orelse))


@dataclass(frozen=True, eq=False)
class Function:
    """``name(params)``: float scalars (:class:`Var` of F8) and arrays (:class:`Array`), in order; ``fastmath``:
    what the compilers may do (``"contract"``: fused multiply-adds; ``"reassoc"``: reorder sums); a float
    division by zero gives inf or NaN in both printers' languages (numba's ``error_model="numpy"``)."""

    name: str
    params: tuple
    body: tuple[Stmt, ...]
    fastmath: tuple[str, ...] = ("contract",)


class Declared:
    """What a generator has declared in one block: :meth:`set` declares a name the first time (:class:`Let`)
    and assigns it after (:class:`Assign`), for a name set again and again in that block."""

    def __init__(self) -> None:
        self.names: set[str] = set()

    def set(self, var: Var, value) -> Stmt:
        """``var = value`` in this block: a :class:`Let` the first time ``var`` is set here, an :class:`Assign`
        after."""
        if var.name in self.names:
            return Assign(var, wrap(value))
        self.names.add(var.name)
        return Let(var, wrap(value))
