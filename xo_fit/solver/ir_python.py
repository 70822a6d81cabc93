"""A kernel of the IR written as Python for numba: the module numba compiles (:func:`text`).

Expressions are written with the fewest parentheses Python's grammar needs, so that the text parses back into
the IR's own grouping (``a - b * c``, ``(a + b) * c``, ``-a * b`` is ``(-a) * b``); chains of ``+ -`` and of
``* /`` are written without recursion. Every name is a Python local; the checks of
:mod:`xo_fit.solver.ir_kernel` make the C printer's block-scoped declarations mean the same.
"""

from __future__ import annotations

from xo_fit.solver.ir import (DB10, I8, Assign, Bin, Call, Cmp, Const, Dim, For, Function, If, Let, Load, Named,
                              Neg, Not, Return, Select, Store, Update, Var)
from xo_fit.solver.ir_kernel import Kernel, expressions, walk

#: Binding strength of each form: a conditional 0, not 1, comparisons 2, + - 3, * / 4, unary minus 5, ** 6,
#: names, constants, calls and elements 7.
_ARITH = {"+": 3, "-": 3, "*": 4, "/": 4}
#: The imports of a kernel that calls sqrt, ln or ln_floored or reads DB10.
IMPORTS = ("from math import sqrt", "from xo_fit.solver.vecmath import ln, ln_floored, DB10")


def text(kernel: Kernel) -> str:
    """The Python module of ``kernel``: its comments, the imports it needs, its constants and the function under
    ``@numba.njit`` (cached, numpy's error model, the function's fastmath set, without the GIL)."""
    fn = kernel.function
    lines = [f"# {c}" for c in kernel.comments] + ["import numba"]
    if _uses_math(fn.body):
        lines += IMPORTS
    if kernel.constants:
        lines += [""] + [f"{c.name} = {c.value!r}" for c in kernel.constants]
    fast = "fastmath={" + ", ".join(f'"{m}"' for m in fn.fastmath) + "}, " if fn.fastmath else ""
    lines += ["", "", f'@numba.njit(cache=True, error_model="numpy", {fast}nogil=True)']
    return "\n".join(lines + function_text(fn).splitlines()) + "\n"


def function_text(fn: Function, literal: str | None = None) -> str:
    """The ``def`` of ``fn`` alone. ``literal``: a function name each float constant is wrapped in (the tests
    run the text as plain Python on numpy's float64 that way, where a division by zero gives inf as in C)."""
    out = [f"def {fn.name}({', '.join(p.name for p in fn.params)}):"]
    _Writer(literal).block(fn.body, 1, out)
    return "\n".join(out) + "\n"


def expression(e, literal: str | None = None) -> str:
    """The Python text of one expression."""
    return _Writer(literal).expr(e)[0]


def _uses_math(body) -> bool:
    return any((isinstance(x, Call) and x.fn in ("sqrt", "ln", "ln_floored")) or (isinstance(x, Named)
                                                                                 and x.name == DB10.name)
               for e in expressions(body) for x in walk(e))


class _Writer:
    def __init__(self, literal: str | None) -> None:
        self.literal = literal

    def block(self, body, depth: int, out: list[str]) -> None:
        ind = "    " * depth
        if not body:
            out.append(ind + "pass")
        for s in body:
            if isinstance(s, (Let, Assign)):
                out.append(f"{ind}{s.var.name} = {self.expr(s.value)[0]}")
            elif isinstance(s, Update):
                out.append(f"{ind}{s.var.name} {s.op}= {self.expr(s.value)[0]}")
            elif isinstance(s, Store):
                out.append(f"{ind}{self.expr(s.target)[0]} {s.op}= {self.expr(s.value)[0]}")
            elif isinstance(s, For):
                hi = self.expr(s.hi)[0]
                rng = f"range({hi})" if s.lo is None else f"range({self.expr(s.lo)[0]}, {hi})"
                out.append(f"{ind}for {s.var.name} in {rng}:")
                self.block(s.body, depth + 1, out)
            elif isinstance(s, If):
                out.append(f"{ind}if {self.expr(s.cond)[0]}:")
                self.block(s.body, depth + 1, out)
                if s.orelse:
                    out.append(f"{ind}else:")
                    self.block(s.orelse, depth + 1, out)
            elif isinstance(s, Return):
                out.append(f"{ind}return {self.expr(s.value)[0]}")
            else:
                raise ValueError(f"{type(s).__name__} is not a statement")

    def operand(self, e, prec: int, strict: bool) -> str:
        """``e`` as an operand of a form of strength ``prec``: in parentheses where it binds less (or, when
        ``strict``, no more) strongly."""
        t, p = self.expr(e)
        return f"({t})" if p < prec or (strict and p == prec) else t

    def expr(self, e) -> tuple[str, int]:
        """(text, binding strength) of an expression."""
        if isinstance(e, Const):
            t = repr(e.value)
            if e.ty != I8 and self.literal:
                return f"{self.literal}({t})", 7
            return t, 5 if t.startswith("-") else 7
        if isinstance(e, (Var, Named)):
            return e.name, 7
        if isinstance(e, Dim):
            return f"{e.array.name}.shape[{e.axis}]", 7
        if isinstance(e, Load):
            return f"{e.array.name}[{', '.join(self.expr(i)[0] for i in e.index)}]", 7
        if isinstance(e, Call):
            return f"{e.fn}({', '.join(self.expr(a)[0] for a in e.args)})", 7
        if isinstance(e, Bin) and e.op in _ARITH:
            prec = _ARITH[e.op]
            chain = []
            while isinstance(e, Bin) and _ARITH.get(e.op) == prec:
                chain.append(e)
                e = e.a
            t = self.operand(e, prec, False)
            for node in reversed(chain):
                t += f" {node.op} {self.operand(node.b, prec, True)}"
            return t, prec
        if isinstance(e, Bin):  # **: right-associative, binds more strongly than a unary minus on its left
            return f"{self.operand(e.a, 6, True)} ** {self.operand(e.b, 5, False)}", 6
        if isinstance(e, Neg):
            return f"-{self.operand(e.a, 5, False)}", 5
        if isinstance(e, Cmp):
            return f"{self.operand(e.a, 2, True)} {e.op} {self.operand(e.b, 2, True)}", 2
        if isinstance(e, Not):
            return f"not {self.operand(e.a, 1, False)}", 1
        if isinstance(e, Select):
            return (f"{self.operand(e.a, 0, True)} if {self.operand(e.cond, 0, True)} else "
                    f"{self.operand(e.b, 0, True)}"), 0
        raise ValueError(f"{type(e).__name__} is not an expression")
