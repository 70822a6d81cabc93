"""The kernels' IR (xo_fit.solver.ir) and its two printers: what would compute differently in Python and in C
is refused when a kernel is made; the Python printer's text parses back into the IR's grouping [SRC: Python's
own parser, ``ast``]; and random programs of the IR (double and integer names, loops, branches, conditionals,
max/abs/sqrt/ln/ln_floored/**, array indexing) compute in C (ir_c, built by the C compiler) what their Python
text (ir_python) computes, run as plain Python on numpy's float64 (IEEE arithmetic, as C's without
contraction) and, for some, compiled by numba: agreement to 1e-12 relative, NaN where NaN, special values
(NaN, inf, 0, negative, subnormal) reaching every function. The C half needs a C compiler.
"""

from __future__ import annotations

import ast
import ctypes
import importlib.util
import os
import sys

import numba
import numpy as np
import pytest

from xo_fit.solver import ir, ir_c, ir_python, standalone
from xo_fit.solver.ir import (Array, Function, Return, assign, f8, i8, let, loop, select, update, when)
from xo_fit.solver.ir_kernel import Kernel
from xo_fit.solver.vecmath import ln, ln_floored

A_LEN, B_SHAPE, OUT_SHAPE = 8, (6, 8), (2, 16)
A, B, OUT = Array("a", 1), Array("b", 2), Array("out", 2)
X, Y, N = f8("x"), f8("y"), i8("n")
PARAMS = (A, B, X, Y, OUT)
LITERALS = (0.0, 1.0, -1.0, 0.5, 2.0, 3.25, -0.75, 1e-3, 1e3, 1e300, 1e-300, 7.0, -2.5)


def _kernel(body) -> Kernel:
    return Kernel(Function("k", PARAMS, tuple(body) + (Return(ir.Const(0)),)))


def _for(var, hi, body, lo=None, declare=True):
    return loop(var, lo, hi, body, declare)


VI, VJ, VM, VS, VT = i8("i"), i8("j"), i8("m"), f8("s"), f8("t")
# each: a kernel that Python (numba) would run one way and C another, or that cannot be written in one of them
REFUSED = {  # name: (why, body)
    "negative literal index": ("non-negative", lambda: [OUT.store((0, 0), A[-1])]),  # C reads before the array
    "index less one": ("non-negative", lambda: [_for(VI, 3, [OUT.store((0, 0), A[VI - 1])])]),
    "range from a negative": ("non-negative", lambda: [_for(VI, 3, [OUT.store((0, 0), A[VI])], lo=-1)]),
    "name made negative": ("non-negative", lambda: [let(VM, 0), update(VM, 1, "-"), OUT.store((0, 0), A[VM])]),
    "integer /=": ("on an integer", lambda: [let(VM, 7), update(VM, 2, "/")]),  # C truncates
    "float into an integer": ("on an integer", lambda: [let(VM, 7), update(VM, 0.5)]),
    "index read after its loop": ("not declared", lambda: [_for(VI, 3, [OUT.store((0, 0), A[VI])]),
                                                           OUT.store((0, 1), ir.to_float(VI))]),
    "index set before, read after": ("before it is set", lambda: [  # Python: 2, C: 3
        let(VM, 0), _for(VM, 3, [OUT.store((0, 0), A[VM])], declare=False), OUT.store((0, 1), ir.to_float(VM))]),
    "set in one branch": ("not declared", lambda: [when(X > 0.0, [let(VS, 1.0)]), OUT.store((0, 0), VS)]),
    "set in both branches apart": ("not declared", lambda: [when(X > 0.0, [let(VS, 1.0)], [let(VS, 2.0)]),
                                                            OUT.store((0, 0), VS)]),
    "carried, updated": ("not declared", lambda: [_for(VI, 3, [when(VI.eq(0), [let(VS, 0.0)]), update(VS, A[VI])])]),
    "carried, read": ("not declared", lambda: [_for(VI, 3, [when(VI > 0, [OUT.store((0, 0), VS)]), let(VS, A[VI])])]),
    "declared in a loop, read after": ("not declared", lambda: [_for(VI, 3, [let(VS, A[VI])]), OUT.store((0, 0), VS)]),
    "declared twice in sight": ("declared again", lambda: [let(VS, 1.0), _for(VI, 3, [let(VS, A[VI])])]),
    "two types": ("an integer and a float", lambda: [_for(VI, 3, [let(VS, A[VI])]), _for(VJ, 3, [let(i8("s"), VJ)])]),
    "index assigned in its loop": ("loop whose index", lambda: [let(VM, 0),
                                                                _for(VM, 3, [assign(VM, 2)], declare=False)]),
    "index reused in an inner loop": ("declared again", lambda: [_for(VI, 3, [_for(VI, 2, [update(VM, 1)])])]),
    "bound changed in the body": ("range bound", lambda: [let(VM, 3), _for(VI, VM, [assign(VM, 2)])]),  # read once
    "index is its own bound": ("own range", lambda: [let(VM, 3), _for(VM, VM, [], declare=False)]),
    "assignment to a parameter": ("parameter", lambda: [assign(X, 1.0)]),
    "a name C uses": ("not a name", lambda: [let(f8("double"), 1.0)]),
    "a dimension's name": ("not a name", lambda: [let(i8("b_d1"), 1)]),
    "another array of that name": ("not an array parameter", lambda: [OUT.store((0, 0), Array("a", 2)[0, 0])]),
}


@pytest.mark.parametrize("case", sorted(REFUSED))
def test_kernels_python_and_c_would_read_differently_are_refused(case):
    why, body = REFUSED[case]
    with pytest.raises(ValueError, match=why):
        _kernel(body())


@pytest.mark.parametrize("build", [
    lambda: A[X > 0.0],  # a comparison as an index
    lambda: A[0.5],  # a float index
    lambda: ir.Const(7) / ir.Const(2),  # integer division
    lambda: ir.maximum(N, 1),  # Python's max of integers is an integer
    lambda: (X > 0.0) + 1.0,  # a condition in arithmetic
    lambda: ir.Const(float("inf")),
])
def test_expressions_without_one_meaning_are_refused(build):
    with pytest.raises(ValueError):
        build()


def test_a_kernel_must_end_in_its_return():
    with pytest.raises(ValueError):
        Kernel(Function("k", PARAMS, (OUT.store((0, 0), 1.0),)))
    with pytest.raises(ValueError):
        Kernel(Function("k", PARAMS, (Return(ir.Const(0)), Return(ir.Const(1)))))


def test_what_the_generated_kernels_use_is_accepted():
    # names set before a loop and updated in it, a name declared again in a later loop, an integer name reused
    # as a loop's index (and set again before it is read), non-negative index arithmetic, a choice of indices
    c = i8("c")
    body = [let(N, A.shape(0)), let(VS, 0.0), let(c, 0),
            _for(VI, N, [let(VT, A[VI]), when(VT < 0.0, [assign(VT, -VT)]),
                        let(VJ, select(VI < 2, VI + 1, 0)), update(VS, VT * A[VJ] + OUT[0, 2 * VI + 1])]),
            _for(VI, 2, [let(VT, B[VI, VI])], lo=1), _for(c, 2, [update(VS, A[c])], lo=1, declare=False), assign(c, 1),
            OUT.store((0, c), VS)]
    k = Kernel(Function("k", PARAMS, tuple(body) + (Return(N),)))
    assert "k_packed" in ir_c.text(k) and "def k(a, b, x, y, out):" in ir_python.text(k)


# ---------------------------------------------------------------- the Python text parses into the IR's grouping

def _tree(e):
    """An IR expression as nested tuples."""
    if isinstance(e, ir.Const):
        return ("c", e.value)
    if isinstance(e, (ir.Var, ir.Named)):
        return ("n", e.name)
    if isinstance(e, ir.Load):
        return ("[]", e.array.name, *map(_tree, e.index))
    if isinstance(e, ir.Neg):  # a minus on a literal reads as a negative literal, as Python's parser gives it
        literal = isinstance(e.a, ir.Const) and not str(e.a.value).startswith("-")
        return ("c", -e.a.value) if literal else ("neg", _tree(e.a))
    if isinstance(e, (ir.Bin, ir.Cmp)):
        return (e.op, _tree(e.a), _tree(e.b))
    if isinstance(e, ir.Not):
        return ("not", _tree(e.a))
    if isinstance(e, ir.Select):
        return ("?", _tree(e.cond), _tree(e.a), _tree(e.b))
    return ("call", e.fn, *map(_tree, e.args))


_OPS = {ast.Add: "+", ast.Sub: "-", ast.Mult: "*", ast.Div: "/", ast.Pow: "**", ast.Lt: "<", ast.LtE: "<=",
        ast.Gt: ">", ast.GtE: ">=", ast.Eq: "==", ast.NotEq: "!="}


def _parsed(node):
    """A Python expression's syntax tree (Python's parser) as the same nested tuples; a literal's minus folded
    into it, as the printer writes negative constants."""
    if isinstance(node, ast.Constant):
        return ("c", node.value)
    if isinstance(node, ast.Name):
        return ("n", node.id)
    if isinstance(node, ast.Subscript):
        idx = node.slice.elts if isinstance(node.slice, ast.Tuple) else [node.slice]
        return ("[]", node.value.id, *map(_parsed, idx))
    if isinstance(node, ast.UnaryOp) and isinstance(node.op, ast.USub):
        if isinstance(node.operand, ast.Constant):
            return ("c", -node.operand.value)
        return ("neg", _parsed(node.operand))
    if isinstance(node, ast.UnaryOp):
        return ("not", _parsed(node.operand))
    if isinstance(node, ast.BinOp):
        return (_OPS[type(node.op)], _parsed(node.left), _parsed(node.right))
    if isinstance(node, ast.Compare):
        assert len(node.ops) == 1  # never a chain
        return (_OPS[type(node.ops[0])], _parsed(node.left), _parsed(node.comparators[0]))
    if isinstance(node, ast.IfExp):
        return ("?", _parsed(node.test), _parsed(node.body), _parsed(node.orelse))
    return ("call", node.func.id, *map(_parsed, node.args))


def _random_expr(rng, depth: int):
    roll = rng.random()
    if depth <= 0 or roll < 0.15:
        return [X, Y, A[int(rng.integers(3))], ir.Const(float(rng.choice([2.0, -1.5, 0.25]))), ir.DB10][
            int(rng.integers(5))]
    a, b = _random_expr(rng, depth - 1), _random_expr(rng, depth - 1)
    if roll < 0.7:
        return ir.Bin(str(rng.choice(["+", "-", "*", "/", "**"])), a, b)
    if roll < 0.8:
        return -a
    if roll < 0.9:
        cond = ir.Cmp(str(rng.choice(["<", ">=", "=="])), a, b)
        return select(ir.Not(cond) if rng.random() < 0.3 else cond, b, a)
    return ir.maximum(a, b) if rng.random() < 0.5 else ir.sqrt(a)


def test_the_python_text_parses_back_into_the_ir_s_grouping():
    rng = np.random.default_rng(7)
    for _ in range(3000):
        e = _random_expr(rng, int(rng.integers(1, 6)))
        text = ir_python.expression(e)
        assert _parsed(ast.parse(text, mode="eval").body) == _tree(e), text
    # the forms the generated kernels use, written as their hand-written text was
    w, iw, ss, zi, inv = f8("w"), f8("iw"), f8("ss"), f8("zi"), f8("inv")
    assert ir_python.expression(-iw * ss) == "-iw * ss"
    assert ir_python.expression(ir.signed_sum([(-1, zi * inv), (1, w)])) == "-zi * inv + w"
    assert ir_python.expression(w * ss - iw * ss + 0.0 * (zi + inv)) == "w * ss - iw * ss + 0.0 * (zi + inv)"
    assert ir_python.expression(2.0 * w / (ss * ss) * 3.0 - -60.0) == "2.0 * w / (ss * ss) * 3.0 - -60.0"


# ---------------------------------------------------------------- differential: random programs, C against Python

class _Program:
    """One random kernel ``NAME(a, b, x, y, out)`` of the IR, valid by construction."""

    def __init__(self, rng: np.random.Generator, name: str) -> None:
        self.rng, self.name = rng, name
        self.floats: list[str] = []  # double names in sight (all set)
        self.ints: dict[str, int | None] = {"n": None}  # integer names in sight -> largest value + 1 (None: any)
        self.active: list[str] = []  # loop indices of the loops around here
        self.count = 0

    def pick(self, options):
        return options[int(self.rng.integers(len(options)))]

    def fresh(self, stem: str) -> str:
        self.count += 1
        return f"{stem}{self.count}"

    def index(self, size: int):
        """An index expression provably in [0, size)."""
        rng = self.rng
        ok = [v for v, top in self.ints.items() if top is not None and top <= size]
        if ok and rng.random() < 0.6:
            v = i8(self.pick(ok))
            room = size - self.ints[v.name]
            if room > 0 and rng.random() < 0.4:
                return v + int(rng.integers(0, room + 1))
            if 2 * self.ints[v.name] - 1 <= size and rng.random() < 0.3:
                return 2 * v
            return v
        return ir.Const(int(rng.integers(size)))

    def leaf(self):
        rng = self.rng
        roll = rng.random()
        if roll < 0.2:
            return ir.Const(self.pick(LITERALS) if rng.random() < 0.6 else float(np.round(rng.normal(), 3)))
        if roll < 0.4 and self.floats:
            return f8(self.pick(self.floats))
        if roll < 0.5:
            return self.pick([X, Y])
        if roll < 0.65:
            return A[self.index(A_LEN)]
        if roll < 0.8:
            return B[self.index(B_SHAPE[0]), self.index(B_SHAPE[1])]
        if roll < 0.85:
            return OUT[0, self.index(OUT_SHAPE[1])]
        if roll < 0.88:
            return ir.DB10
        v = i8(self.pick(sorted(self.ints)))
        return ir.to_float(v) if rng.random() < 0.5 else v * float(np.round(rng.normal(), 2))

    def expr(self, depth: int):
        rng = self.rng
        if depth <= 0 or rng.random() < 0.25:
            return self.leaf()
        roll = rng.random()
        if roll < 0.45:
            return ir.Bin(self.pick(["+", "-", "*", "/"]), self.expr(depth - 1), self.expr(depth - 1))
        if roll < 0.5:
            return -self.expr(depth - 1)
        if roll < 0.53:
            return self.expr(depth - 1) ** ir.Const(self.pick([2.0, 0.5, 3.0, -1.0]))
        if roll < 0.6:
            return ir.maximum(self.expr(depth - 1), self.expr(depth - 1))
        if roll < 0.85:
            fn = self.pick(["abs", "sqrt", "ln", "ln_floored"])
            return ir.Call(fn, (self.expr(depth - 1),))
        return select(self.cond(depth - 1), self.expr(depth - 1), self.expr(depth - 1))

    def cond(self, depth: int):
        c = ir.Cmp(self.pick(["<", ">", "<=", ">=", "==", "!="]), self.expr(min(depth, 1)), self.expr(min(depth, 1)))
        return ir.Not(c) if self.rng.random() < 0.2 else c

    def int_expr(self) -> tuple:
        """A non-negative integer expression and its largest value + 1."""
        rng = self.rng
        ok = [v for v in self.active if self.ints[v] is not None]
        if ok and rng.random() < 0.6:
            v = self.pick(ok)
            c = int(rng.integers(0, 3))
            return i8(v) + c, self.ints[v] + c
        if ok and rng.random() < 0.3:
            v, c = self.pick(ok), int(rng.integers(4))
            return select(self.cond(1), i8(v), ir.Const(c)), max(self.ints[v], c + 1)
        c = int(rng.integers(0, 5))
        return ir.Const(c), c + 1

    def block(self, depth: int, count: int) -> list:
        floats, ints = list(self.floats), dict(self.ints)
        out = [s for _ in range(count) for s in self.stmt(depth)]
        self.floats = floats  # what the block declared is out of sight after it
        self.ints = {k: v for k, v in self.ints.items() if k in ints}
        return out

    def stmt(self, depth: int) -> list:
        rng = self.rng
        roll = rng.random()
        if roll < 0.25 or not self.floats:
            e = self.expr(int(rng.integers(2, 4)))
            if rng.random() < 0.5 or not self.floats:
                v = self.fresh("v")
                self.floats.append(v)
                return [let(f8(v), e)]
            return [assign(f8(self.pick(self.floats)), e)]
        if roll < 0.37:
            return [update(f8(self.pick(self.floats)), self.expr(2), self.pick(["+", "-", "*", "/"]))]
        if roll < 0.47:
            e, top = self.int_expr()
            v = self.fresh("k")
            self.ints[v] = top
            return [let(i8(v), e)]
        if roll < 0.52:  # a counter: any value, never an index
            v = self.fresh("c")
            self.ints[v] = None
            return [let(i8(v), int(rng.integers(3))), update(i8(v), int(rng.integers(1, 3)))]
        if roll < 0.67:
            tgt = (int(rng.integers(2)), self.index(OUT_SHAPE[1]))
            return [OUT.store(tgt, self.expr(2), self.pick(["", "+"]))]
        if roll < 0.84 and depth < 3:
            return self.loop(depth)
        if depth < 3:
            c = self.cond(2)
            then = self.block(depth + 1, int(rng.integers(1, 3)))
            other = self.block(depth + 1, int(rng.integers(1, 3))) if rng.random() < 0.6 else []
            return [when(c, then, other)]
        return [OUT.store((1, 0), self.expr(2), "+")]

    def loop(self, depth: int) -> list:
        rng = self.rng
        free = [v for v in ("i", "j", "k") if v not in self.active and v not in self.ints]
        reuse = rng.random() < 0.2
        v = self.fresh("r") if reuse else self.pick(free)
        if rng.random() < 0.25:
            lo, hi, top = None, N, A_LEN
        else:
            lo_v = int(rng.integers(0, 3))
            top = int(rng.integers(lo_v, 5))
            lo, hi = (lo_v if lo_v or rng.random() < 0.7 else None), ir.Const(top)
        head = [let(i8(v), 0)] if reuse else []
        self.ints[v] = max(top, 1)
        self.active.append(v)
        body = self.block(depth + 1, int(rng.integers(1, 4)))
        self.active.pop()
        self.ints.pop(v)  # a reused name is unset after the loop: out of use
        return head + [loop(i8(v), lo, hi, body, declare=not reuse)]

    def build(self) -> Kernel:
        body = [let(N, A.shape(0))] + self.block(0, int(self.rng.integers(3, 8)))
        body += [OUT.store((0, 8 + t), f8(v)) for t, v in enumerate(self.floats[:8])]
        return Kernel(Function(self.name, PARAMS, tuple(body) + (Return(N),), fastmath=()))


@numba.njit(error_model="numpy")
def _numba_ln(x):
    return ln(x)


@numba.njit(error_model="numpy")
def _numba_ln_floored(x):
    return ln_floored(x)


def _inputs(rng: np.random.Generator, special: bool) -> tuple:
    a = rng.normal(0.0, 2.0, A_LEN)
    b = rng.normal(0.0, 2.0, B_SHAPE)
    if special:  # zeros, negatives, NaN, inf, subnormal and huge values reach every function
        pool = np.array([0.0, -0.0, np.nan, np.inf, -np.inf, 5e-324, 1e300, -1e-300, 1.0])
        a[rng.integers(A_LEN, size=3)] = rng.choice(pool, 3)
        b.flat[rng.integers(b.size, size=6)] = rng.choice(pool, 6)
    return a, np.ascontiguousarray(b), float(rng.normal()), float(rng.choice([0.0, -1.5, 2.0, 1e-300]))


def _programs(count: int = 250) -> list[Kernel]:
    rng = np.random.default_rng(20240611)
    return [_Program(rng, f"p{p}").build() for p in range(count)]


def _reference(kernels: list[Kernel]) -> dict:
    """The Python text of each kernel run as plain Python: numpy float64 literals, numba's ln."""
    from xo_fit.constants import DB10

    ns = {"F": np.float64, "float": np.float64, "sqrt": np.sqrt, "ln": _numba_ln, "ln_floored": _numba_ln_floored,
          "DB10": np.float64(DB10)}
    for k in kernels:
        exec(compile(ir_python.function_text(k.function, literal="F"), k.name, "exec"), ns)
    return ns


def _agree(got: np.ndarray, ref: np.ndarray, k: Kernel) -> None:
    try:
        np.testing.assert_allclose(got, ref, rtol=1e-12, atol=0.0, equal_nan=True)
    except AssertionError:
        raise AssertionError("program differs:\n" + ir_python.function_text(k.function)) from None


@pytest.mark.skipif(standalone.compiler() is None and os.environ.get("XO_FIT_REQUIRE_STANDALONE") != "1",
                    reason="no C compiler")
def test_random_programs_compute_in_c_what_their_python_computes(tmp_path):
    kernels = _programs()
    texts = [ir_c.text(k, prelude=(i == 0)) for i, k in enumerate(kernels)]
    lib = standalone.compile_into(tmp_path, "\n".join(texts), standalone.flags(()), standalone.compiler(),
                                  lambda data: tmp_path / "programs.so")
    handle = ctypes.CDLL(str(lib))
    ns = _reference(kernels)
    rng = np.random.default_rng(5)
    checked = 0
    with np.errstate(all="ignore"):
        for k in kernels:
            fn = standalone.CKernel(handle, k.name, [1, 2, 0, 0, 2])
            for trial in range(3):
                a, b, x, y = _inputs(rng, special=trial == 2)
                out_c, out_py = np.zeros(OUT_SHAPE), np.zeros(OUT_SHAPE)
                assert fn(a, b, x, y, out_c) == ns[k.name](a, b, np.float64(x), np.float64(y), out_py) == A_LEN
                _agree(out_c, out_py, k)
                checked += np.isfinite(out_py).sum()
    assert checked > 5000  # the programs compute finite values, not only NaN


def test_random_programs_compiled_by_numba_compute_what_their_python_computes(tmp_path):
    # the printed module as numba compiles it (imports, decorator), for a few of the programs
    kernels = _programs(6)
    ns = _reference(kernels)
    rng = np.random.default_rng(6)
    with np.errstate(all="ignore"):
        for k in kernels:
            path = tmp_path / f"{k.name}.py"
            path.write_text(ir_python.text(k))
            spec = importlib.util.spec_from_file_location(f"xo_ir_{k.name}", path)
            module = importlib.util.module_from_spec(spec)
            sys.modules[spec.name] = module
            spec.loader.exec_module(module)
            for trial in range(3):
                a, b, x, y = _inputs(rng, special=trial == 2)
                out_jit, out_py = np.zeros(OUT_SHAPE), np.zeros(OUT_SHAPE)
                x, y = np.float64(x), np.float64(y)
                assert getattr(module, k.name)(a, b, x, y, out_jit) == ns[k.name](a, b, x, y, out_py) == A_LEN
                _agree(out_jit, out_py, k)
