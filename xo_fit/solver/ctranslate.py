"""C text for a generated kernel: the restricted Python of the generated kernels, written out as C99.

The kernels that :mod:`xo_fit.solver.codegen` and :mod:`xo_fit.solver.fused` generate use a small part of
Python: assignments of float expressions, ``for`` loops over ``range``, ``if``/``else`` and conditional
expressions, comparisons, ``max``, ``abs``, ``sqrt``, ``float``, ``ln`` (:mod:`xo_fit.solver.vecmath`) and
indexing of C-contiguous float64 arrays. :func:`to_c` parses such a kernel (Python's ``ast``) and writes the
same computation in C, statement for statement, so that a C compiler can build it in a fraction of a second
(numba needs seconds for the same text: its type inference and lowering run in Python).

Semantics kept: ``max(a, b)`` is Python's (``b if b > a else a``: a NaN in ``a`` is kept), ``/`` is true
division, names bound by ``range`` loops and integer constants are 64-bit integers, every other name a double.
Anything outside the subset raises ``ValueError`` (the caller then uses numba).
"""

from __future__ import annotations

import ast

from ..constants import DB10

#: Bump when the C written for the same kernel text changes, so that cached builds are not reused.
VERSION = 4

#: C text of vecmath.ln: the same steps (exponent by bit cast, 2 atanh series) so that the loop vectorises.
LN_C = r"""
static inline double xo_ln(double x) {
    union { double d; long long i; } u;
    u.d = x;
    long long bits = u.i;
    long long e = (bits >> 52) - 1023;
    u.i = (bits & 4503599627370495LL) | 4607182418800017408LL;
    double m = u.d;
    int big = m > 1.4142135623730951;
    m = big ? m * 0.5 : m;
    double ef = big ? (double)(e + 1) : (double)e;
    double z = (m - 1.0) / (m + 1.0);
    double z2 = z * z;
    double p = 1.0 / 23.0;
    p = p * z2 + 1.0 / 21.0;
    p = p * z2 + 1.0 / 19.0;
    p = p * z2 + 1.0 / 17.0;
    p = p * z2 + 1.0 / 15.0;
    p = p * z2 + 1.0 / 13.0;
    p = p * z2 + 1.0 / 11.0;
    p = p * z2 + 1.0 / 9.0;
    p = p * z2 + 1.0 / 7.0;
    p = p * z2 + 1.0 / 5.0;
    p = p * z2 + 1.0 / 3.0;
    p = p * z2 + 1.0;
    return ef * 0.6931471805599453 + 2.0 * z * p;
}
static inline double xo_max(double a, double b) { return b > a ? b : a; }
"""

_BIN = {ast.Add: "+", ast.Sub: "-", ast.Mult: "*", ast.Div: "/"}
_CMP = {ast.Gt: ">", ast.Lt: "<", ast.GtE: ">=", ast.LtE: "<=", ast.Eq: "==", ast.NotEq: "!="}


def _scopes(body: list) -> dict[str, tuple]:
    """For every local name, the innermost loop whose body holds all its uses: a chain of loop node ids (the
    empty chain is the function). A loop's own index belongs to the block around the loop. Declaring each name
    in that block tells the C compiler that it dies with each pass of the loop, which the vectoriser needs."""
    seen: dict[str, tuple] = {}

    def note(name: str, chain: tuple) -> None:
        old = seen.get(name)
        if old is None:
            seen[name] = chain
        else:
            k = 0
            while k < min(len(old), len(chain)) and old[k] == chain[k]:
                k += 1
            seen[name] = old[:k]

    def walk(nodes, chain):
        for node in nodes:
            if isinstance(node, ast.For):
                for n in ast.walk(node.iter):
                    if isinstance(n, ast.Name):
                        note(n.id, chain)
                note(node.target.id, chain) if isinstance(node.target, ast.Name) else None
                walk(node.body, chain + (id(node),))
            elif isinstance(node, ast.If):
                for n in ast.walk(node.test):
                    if isinstance(n, ast.Name):
                        note(n.id, chain)
                walk(node.body, chain)
                walk(node.orelse, chain)
            else:
                for n in ast.walk(node):
                    if isinstance(n, ast.Name):
                        note(n.id, chain)

    walk(body, ())
    return seen


class _Writer:
    def __init__(self, arrays: dict[str, int], scalars: list[str], constants: dict[str, str],
                 scopes: dict[str, tuple], fixed: dict[str, int]) -> None:
        self.arrays = arrays  # name -> ndim
        self.fixed = fixed  # "name_dK" -> a dimension known when the C is written
        self.scalars = set(scalars)
        self.constants = constants  # module-level names -> C literal
        self.scopes = scopes
        self.ints: set[str] = set()
        self.doubles: set[str] = set()
        self.lines: list[str] = []
        self.chain: tuple = ()

    def block(self, body: list, ind: str) -> None:
        """The statements of one block, its own names declared at its top."""
        start = len(self.lines)
        before_i, before_d = set(self.ints), set(self.doubles)
        for s in body:
            self.stmt(s, ind)
        mine = {n for n, c in self.scopes.items() if c == self.chain}
        decl = []
        ints = sorted(mine & (self.ints - before_i))
        dbls = sorted(mine & (self.doubles - before_d))
        if ints:
            decl.append(f"{ind}long long " + ", ".join(ints) + ";")
        for i in range(0, len(dbls), 16):
            decl.append(f"{ind}double " + ", ".join(dbls[i:i + 16]) + ";")
        self.lines[start:start] = decl

    # ------------------------------------------------------------------ expressions: (text, is_int)

    def expr(self, node) -> tuple[str, bool]:
        if isinstance(node, ast.Constant):
            if isinstance(node.value, bool) or not isinstance(node.value, (int, float)):
                raise ValueError(f"constant {node.value!r}")
            if isinstance(node.value, int):
                return f"{node.value}LL", True
            return _double(node.value), False
        if isinstance(node, ast.Name):
            if node.id in self.constants:
                return self.constants[node.id], False
            if node.id in self.ints:
                return node.id, True
            if node.id in self.doubles or node.id in self.scalars:
                return node.id, False
            raise ValueError(f"name '{node.id}' used before it is set")
        if isinstance(node, ast.BinOp) and isinstance(node.op, ast.Pow):
            return f"pow({_dbl(self.expr(node.left))}, {_dbl(self.expr(node.right))})", False
        if isinstance(node, ast.BinOp) and type(node.op) in _BIN:
            (a, ia), (b, ib) = self.expr(node.left), self.expr(node.right)
            if isinstance(node.op, ast.Div) and ia and ib:
                a, ia = f"(double)({a})", False
            return f"({a} {_BIN[type(node.op)]} {b})", ia and ib
        if isinstance(node, ast.UnaryOp):
            a, ia = self.expr(node.operand)
            if isinstance(node.op, ast.USub):
                return f"(-{a})", ia
            if isinstance(node.op, ast.Not):
                return f"(!{a})", True
            raise ValueError("unary operator")
        if isinstance(node, ast.Compare) and len(node.ops) == 1 and type(node.ops[0]) in _CMP:
            (a, _), (b, _) = self.expr(node.left), self.expr(node.comparators[0])
            return f"({a} {_CMP[type(node.ops[0])]} {b})", True
        if isinstance(node, ast.IfExp):
            (c, _), (a, ia), (b, ib) = self.expr(node.test), self.expr(node.body), self.expr(node.orelse)
            if ia != ib:
                a, b = (f"(double)({a})" if ia else a), (f"(double)({b})" if ib else b)
            return f"({c} ? {a} : {b})", ia and ib
        if isinstance(node, ast.Call) and isinstance(node.func, ast.Name) and not node.keywords:
            args = [self.expr(a) for a in node.args]
            name = node.func.id
            if name == "max" and len(args) == 2:
                return f"xo_max({_dbl(args[0])}, {_dbl(args[1])})", False
            if name == "abs" and len(args) == 1:
                return f"fabs({_dbl(args[0])})", False
            if name == "sqrt" and len(args) == 1:
                return f"sqrt({_dbl(args[0])})", False
            if name == "ln" and len(args) == 1:
                return f"xo_ln({_dbl(args[0])})", False
            if name == "float" and len(args) == 1:
                return _dbl(args[0]), False
            raise ValueError(f"call of {name}")
        if isinstance(node, ast.Subscript):
            return self.element(node), False
        raise ValueError(f"expression {type(node).__name__}")

    def element(self, node: ast.Subscript) -> str:
        if not isinstance(node.value, ast.Name):
            raise ValueError("subscript of an expression (only array arguments are indexed; name.shape[k] is "
                             "read on its own line)")
        name = node.value.id
        if name not in self.arrays:
            raise ValueError(f"'{name}' is not an array argument")
        idx = node.slice.elts if isinstance(node.slice, ast.Tuple) else [node.slice]
        if len(idx) != self.arrays[name]:
            raise ValueError(f"'{name}' indexed with {len(idx)} indices")
        parts = []
        for i in idx:
            text, is_int = self.expr(i)
            if not is_int:
                raise ValueError(f"'{name}' indexed by a float")
            parts.append(text)
        flat = parts[0]
        for k, p in enumerate(parts[1:], start=1):
            flat = f"({flat}) * {self.dim(name, k)} + {p}"
        return f"{name}[{flat}]"

    # ------------------------------------------------------------------ statements

    def target(self, node, is_int: bool) -> str:
        if isinstance(node, ast.Name):
            if node.id in self.scalars or node.id in self.arrays or node.id in self.constants:
                raise ValueError(f"assignment to argument '{node.id}'")
            if is_int and node.id not in self.doubles:
                self.ints.add(node.id)
            elif node.id in self.ints:
                raise ValueError(f"'{node.id}' holds an integer and a float")
            else:
                self.doubles.add(node.id)
            return node.id
        if isinstance(node, ast.Subscript):
            return self.element(node)
        raise ValueError("assignment target")

    def dim(self, name: str, k: int) -> str:
        """Dimension k of array ``name``: a constant where it is fixed (the compiler then knows every stride, so
        rows of one array are seen not to overlap and no run-time alias checks are needed), else the argument."""
        fixed = self.fixed.get(f"{name}_d{k}")
        return f"{fixed}LL" if fixed is not None else f"{name}_d{k}"

    def shape(self, node) -> str | None:
        """``name.shape[k]`` as its C dimension, else None."""
        if (isinstance(node, ast.Subscript) and isinstance(node.value, ast.Attribute) and node.value.attr == "shape"
                and isinstance(node.value.value, ast.Name) and node.value.value.id in self.arrays
                and isinstance(node.slice, ast.Constant) and isinstance(node.slice.value, int)):
            return self.dim(node.value.value.id, node.slice.value)
        return None

    def stmt(self, node, ind: str) -> None:
        out = self.lines
        if isinstance(node, ast.Assign) and len(node.targets) == 1:
            dim = self.shape(node.value)
            text, is_int = (dim, True) if dim else self.expr(node.value)
            out.append(f"{ind}{self.target(node.targets[0], is_int)} = {text};")
        elif isinstance(node, ast.AugAssign) and type(node.op) in _BIN:
            text, is_int = self.expr(node.value)
            tgt = node.target
            if isinstance(tgt, ast.Name) and tgt.id not in self.ints | self.doubles:
                raise ValueError(f"'{tgt.id}' updated before it is set")
            name = self.target(tgt, is_int and isinstance(tgt, ast.Name) and tgt.id in self.ints)
            out.append(f"{ind}{name} {_BIN[type(node.op)]}= {text};")
        elif isinstance(node, ast.For):
            it = node.iter
            if not (isinstance(node.target, ast.Name) and isinstance(it, ast.Call) and isinstance(it.func, ast.Name)
                    and it.func.id == "range" and 1 <= len(it.args) <= 2 and not node.orelse):
                raise ValueError("loop other than for NAME in range(...)")
            bounds = [self.expr(a) for a in it.args]
            if not all(i for _, i in bounds):
                raise ValueError("range of floats")
            lo, hi = ("0LL", bounds[0][0]) if len(bounds) == 1 else (bounds[0][0], bounds[1][0])
            var = self.target(node.target, True)
            out.append(f"{ind}for ({var} = {lo}; {var} < {hi}; {var}++) {{")
            outer = self.chain
            self.chain = outer + (id(node),)
            self.block(node.body, ind + "    ")
            self.chain = outer
            out.append(f"{ind}}}")
        elif isinstance(node, ast.If):
            cond, _ = self.expr(node.test)
            out.append(f"{ind}if ({cond}) {{")
            for s in node.body:
                self.stmt(s, ind + "    ")
            if node.orelse:
                out.append(f"{ind}}} else {{")
                for s in node.orelse:
                    self.stmt(s, ind + "    ")
            out.append(f"{ind}}}")
        elif isinstance(node, ast.Return):
            text, is_int = self.expr(node.value)
            if not is_int:
                raise ValueError("the kernel must return an integer")
            out.append(f"{ind}return {text};")
        elif isinstance(node, (ast.Pass, ast.Expr)) and not (isinstance(node, ast.Expr)
                                                              and not isinstance(node.value, ast.Constant)):
            pass
        else:
            raise ValueError(f"statement {type(node).__name__}")


def _double(v: float) -> str:
    text = repr(float(v))
    if text in ("inf", "-inf", "nan"):
        return {"inf": "(1.0/0.0)", "-inf": "(-1.0/0.0)", "nan": "(0.0/0.0)"}[text]
    return text


def _dbl(arg: tuple[str, bool]) -> str:
    return f"(double)({arg[0]})" if arg[1] else arg[0]


def to_c(source: str, entry: str, args: list[tuple[str, int]], fixed: dict[str, int] | None = None) -> str:
    """C99 text of the function ``entry`` of a generated kernel.

    args: the function's parameters in order, each (name, ndim): ndim 0 for a float scalar, else a C-contiguous
    float64 array of that many dimensions, passed as a pointer followed by its dimensions (``name_d0`` ...).
    The library's entry point is ``ENTRY_packed(const long long *p, const double *s)``: ``p`` holds each
    array's address and its dimensions in that order, ``s`` the floats.
    fixed: dimensions written into the code as constants, by ``"name_dK"``; they are then not parameters, and
    the caller must pass arrays of exactly those dimensions.
    Module-level float constants of the source are inlined; imports are ignored. Raises ValueError for any
    construct outside the subset.
    """
    tree = ast.parse(source)
    constants: dict[str, str] = {"DB10": _double(DB10)}
    fn = None
    for node in tree.body:
        if isinstance(node, (ast.Import, ast.ImportFrom)):
            continue
        if isinstance(node, ast.Assign) and len(node.targets) == 1 and isinstance(node.targets[0], ast.Name):
            v = node.value
            neg = isinstance(v, ast.UnaryOp) and isinstance(v.op, ast.USub)
            c = v.operand if neg else v
            if not (isinstance(c, ast.Constant) and isinstance(c.value, float)):
                raise ValueError("module-level value other than a float")
            constants[node.targets[0].id] = _double(-c.value if neg else c.value)
        elif isinstance(node, ast.FunctionDef) and node.name == entry:
            fn = node
        elif isinstance(node, ast.Expr) and isinstance(node.value, ast.Constant):
            continue
        elif not isinstance(node, ast.FunctionDef):
            raise ValueError(f"module-level {type(node).__name__}")
    if fn is None:
        raise ValueError(f"no function '{entry}'")
    names = [a.arg for a in fn.args.args]
    if names != [n for n, _ in args]:
        raise ValueError(f"parameters {names} differ from {[n for n, _ in args]}")
    arrays = {n: k for n, k in args if k > 0}
    w = _Writer(arrays, [n for n, k in args if k == 0], constants, _scopes(fn.body), dict(fixed or {}))
    w.block(fn.body, "    ")
    params, unpack = [], []
    ip = ip_s = 0
    for n, k in args:
        if k == 0:
            params.append(f"double {n}")
            unpack.append(f"s[{ip_s}]")
            ip_s += 1
        else:
            params.append(f"double *restrict {n}")
            unpack.append(f"(double *)(intptr_t)p[{ip}]")
            ip += 1
            for i in range(k):
                if f"{n}_d{i}" not in w.fixed:
                    params.append(f"long long {n}_d{i}")
                    unpack.append(f"p[{ip}]")
                    ip += 1
    head = ["/* generated by xo_fit.solver.ctranslate from a generated kernel; do not edit */", "#include <math.h>",
            "#include <stdint.h>", LN_C, f"static inline long long {entry}({', '.join(params)}) {{"]
    # one entry point for ctypes: the pointers and dimensions in one int64 array, the floats in one double array
    # (a call then converts two arguments, not one per pointer and dimension)
    packed = [f"long long {entry}_packed(const long long *p, const double *s) {{",
              f"    return {entry}({', '.join(unpack)});", "}"]
    return "\n".join(head + w.lines + ["}", ""] + packed + [""])
