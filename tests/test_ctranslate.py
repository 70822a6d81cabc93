"""The C translator (xo_fit.solver.ctranslate): constructs whose C would compute something else are refused,
and random programs of the generated-code subset compute in C what they compute in Python.

The differential test runs 250 seeded random programs (float assignments and updates, range loops,
if/else, conditional expressions, max/abs/sqrt/ln/ln_floored, indexing of C-contiguous arrays) once through
the translator and the C compiler and once as Python on numpy float64 scalars (IEEE arithmetic, as C's
without contraction), with numba's ln and ln_floored; both must agree to 1e-12 relative. Needs a C compiler.
"""

from __future__ import annotations

import ctypes
import logging
import os

import numba
import numpy as np
import pytest

from xo_fit.solver import ctranslate, standalone
from xo_fit.solver.vecmath import ln, ln_floored

if standalone.compiler() is None:
    if os.environ.get("XO_FIT_REQUIRE_STANDALONE") == "1":
        raise RuntimeError("a C compiler is required (XO_FIT_REQUIRE_STANDALONE=1)")
    pytest.skip("no C compiler", allow_module_level=True)

HEAD = '@numba.njit(error_model="numpy")\ndef k(a, x, out):\n'
ARGS = [("a", 1), ("x", 0), ("out", 2)]

# each: a kernel body that Python (numba) runs one way and the C of a word-for-word translation another
REFUSED = {
    "negative literal index": "    out[0, 0] = a[-1]\n    return 0\n",  # C reads before the array
    "index less one": "    for i in range(3):\n        out[0, 0] = a[i - 1]\n    return 0\n",
    "range from a negative": "    for i in range(-1, 3):\n        out[0, 0] = a[i]\n    return 0\n",
    "name made negative": "    j = 0\n    j -= 1\n    out[0, 0] = a[j]\n    return 0\n",
    "comparison as an index": "    out[0, 0] = a[x > 0.0]\n    return 0\n",
    "integer /=": "    n = 7\n    n /= 2\n    out[0, 0] = float(n)\n    return 0\n",  # C truncates
    "integer /": "    out[0, 0] = 7 / 2\n    return 0\n",
    "index read after its loop": ("    for i in range(3):\n        out[0, 0] = a[i]\n    out[0, 1] = float(i)\n"
                                  "    return 0\n"),  # Python: 2, C: 3
    "index set before, read after": "    i = 0\n    for i in range(3):\n        out[0, 0] = a[i]\n"
                                    "    out[0, 1] = float(i)\n    return 0\n",
    "set in one branch": "    if x > 0.0:\n        y = 1.0\n    out[0, 0] = y\n    return 0\n",
    "carried, updated": "    for i in range(3):\n        if i == 0:\n            s = 0.0\n        s += a[i]\n"
                        "        out[0, i] = s\n    return 0\n",  # C declares s in the body: unset in pass 2
    "carried, read": "    for i in range(3):\n        if i > 0:\n            out[0, i] = s\n        s = a[i]\n"
                     "    return 0\n",
    "index assigned in its loop": "    for i in range(3):\n        i = 2\n        out[0, 0] = a[i]\n    return 0\n",
    "index reused in an inner loop": ("    for i in range(3):\n        for i in range(2):\n"
                                      "            out[0, 0] = a[i]\n    return 0\n"),
    "bound changed in the body": "    n = 3\n    for i in range(n):\n        n = 2\n        out[0, 0] = a[i]\n"
                                 "    return 0\n",  # Python reads range(n) once, C on every pass
    "index is its own bound": "    n = 3\n    for n in range(n):\n        out[0, 0] = a[n]\n    return 0\n",
    "no return": "    out[0, 0] = 1.0\n",
}


@pytest.mark.parametrize("case", sorted(REFUSED))
def test_constructs_c_would_mistranslate_are_refused(case):
    with pytest.raises(ValueError):
        ctranslate.to_c(HEAD + REFUSED[case], "k", ARGS)


def test_a_division_where_numba_would_raise_is_refused():
    # without error_model="numpy", numba raises ZeroDivisionError where C gives inf
    src = "@numba.njit\ndef k(a, x, out):\n    out[0, 0] = x / 2.0\n    return 0\n"
    with pytest.raises(ValueError, match="error_model"):
        ctranslate.to_c(src, "k", ARGS)
    ctranslate.to_c(src.replace("njit", 'njit(error_model="numpy")'), "k", ARGS)


def test_what_the_generated_kernels_use_is_accepted():
    # reads that are set on every path, loop indices reused by later loops, a name set before a loop and
    # reused as its index, non-negative index arithmetic
    body = ("    n = a.shape[0]\n    s = 0.0\n    c = 0\n    for i in range(n):\n"
            "        if a[i] > 0.0:\n            t = a[i]\n        else:\n            t = -a[i]\n"
            "        j = i + 1 if i < 2 else 0\n        s += t * a[j] + out[0, 2 * i + 1]\n"
            "    for i in range(1, 2):\n        c = i\n        s += a[c]\n    out[0, 0] = s\n    return n\n")
    text = ctranslate.to_c(HEAD + body, "k", ARGS)
    assert "k_packed" in text


def test_a_kernel_too_deep_to_translate_runs_on_numba_and_is_logged(tmp_path, caplog):
    # 3,000 terms in one sum: Python's parser itself gives up (RecursionError); numba takes the kernel
    src = ('import numba\n\n\n@numba.njit(error_model="numpy")\ndef k(a, out):\n    n = a.shape[0]\n'
           "    out[0] = " + " + ".join(["a[0]"] * 3000) + "\n    return n\n")
    calls = []

    def fallback():
        calls.append(1)
        return lambda a, out: -1

    k = standalone.load(tmp_path, src, "k", "i8(f8[::1], f8[::1])", fallback)
    with caplog.at_level(logging.WARNING, logger="xo_fit"):
        assert k(np.ones(3), np.zeros(1)) == -1
    assert calls == [1] and k.backend == "numba"
    assert any("runs on numba" in r.getMessage() and "too deeply" in r.getMessage() for r in caplog.records)
    assert not list(tmp_path.iterdir())  # nothing built, no note, no temporary file


def test_a_refused_construct_runs_on_numba(tmp_path, caplog):
    src = "import numba\n\n\n" + HEAD + REFUSED["negative literal index"]
    k = standalone.load(tmp_path, src, "k", "i8(f8[::1], f8, f8[:,::1])", lambda: (lambda *a: 7))
    with caplog.at_level(logging.WARNING, logger="xo_fit"):
        assert k(np.ones(3), 1.0, np.zeros((1, 1))) == 7
    assert k.backend == "numba" and "not provably non-negative" in caplog.text


# ---------------------------------------------------------------- differential: random programs, C against Python

A_LEN, B_SHAPE, OUT_SHAPE = 8, (6, 8), (2, 16)
LITERALS = (0.0, 1.0, -1.0, 0.5, 2.0, 3.25, -0.75, 1e-3, 1e3, 1e300, 1e-300, 7.0, -2.5)


class _Program:
    """One random kernel ``def NAME(a, b, x, y, out)`` in the generated-code subset, as the kernel's text and as
    the reference's (the same with each float literal wrapped in F, numpy's float64, so that division by zero
    and overflow give inf and NaN as in C)."""

    def __init__(self, rng: np.random.Generator, name: str) -> None:
        self.rng, self.name = rng, name
        self.kernel: list[str] = []
        self.ref: list[str] = []
        self.floats: set[str] = set()  # float names set on every path to here
        self.loops: dict[str, int] = {"n": A_LEN}  # int names in scope -> their largest value + 1
        self.active: set[str] = set()  # loop indices of the loops around here
        self.count = 0

    def emit(self, ind: int, k: str, r: str | None = None) -> None:
        self.kernel.append("    " * ind + k)
        self.ref.append("    " * ind + (k if r is None else r))

    def pick(self, options):
        return options[int(self.rng.integers(len(options)))]

    def index(self, size: int) -> str:
        """An index expression provably in [0, size)."""
        rng = self.rng
        ok = [v for v, top in self.loops.items() if v in self.active and top <= size]
        roll = rng.random()
        if ok and roll < 0.5:
            v = self.pick(ok)
            room = size - self.loops[v]
            if room > 0 and rng.random() < 0.4:
                return f"{v} + {int(rng.integers(0, room + 1))}"
            if 2 * self.loops[v] - 1 <= size and rng.random() < 0.3:
                return f"2 * {v}"
            return v
        return str(int(rng.integers(size)))

    def leaf(self) -> tuple[str, str]:
        rng = self.rng
        roll = rng.random()
        if roll < 0.2:
            c = self.pick(LITERALS) if rng.random() < 0.6 else float(np.round(rng.normal(), 3))
            return repr(c), f"F({c!r})"
        if roll < 0.4 and self.floats:
            v = self.pick(sorted(self.floats))
            return v, v
        if roll < 0.5:
            return (v := self.pick(["x", "y"])), v
        if roll < 0.65:
            t = f"a[{self.index(A_LEN)}]"
            return t, t
        if roll < 0.8:
            t = f"b[{self.index(B_SHAPE[0])}, {self.index(B_SHAPE[1])}]"
            return t, t
        if roll < 0.85:
            t = f"out[0, {self.index(OUT_SHAPE[1])}]"
            return t, t
        ints = sorted(v for v in self.loops if v in self.active) or ["n"]
        v = self.pick(ints)
        if rng.random() < 0.5:
            return f"float({v})", f"float({v})"
        c = float(np.round(rng.normal(), 2))
        return f"({v} * {c!r})", f"({v} * F({c!r}))"

    def expr(self, depth: int) -> tuple[str, str]:
        rng = self.rng
        if depth <= 0 or rng.random() < 0.25:
            return self.leaf()
        roll = rng.random()
        if roll < 0.45:
            (a, ra), (b, rb) = self.expr(depth - 1), self.expr(depth - 1)
            op = self.pick(["+", "-", "*", "/"])
            return f"({a} {op} {b})", f"({ra} {op} {rb})"
        if roll < 0.5:
            a, ra = self.expr(depth - 1)
            return f"(-{a})", f"(-{ra})"
        if roll < 0.6:
            (a, ra), (b, rb) = self.expr(depth - 1), self.expr(depth - 1)
            return f"max({a}, {b})", f"max({ra}, {rb})"
        if roll < 0.85:
            fn = self.pick(["abs", "sqrt", "ln", "ln_floored"])
            a, ra = self.expr(depth - 1)
            return f"{fn}({a})", f"{fn}({ra})"
        (c, rc), (a, ra), (b, rb) = self.cond(depth - 1), self.expr(depth - 1), self.expr(depth - 1)
        return f"({a} if {c} else {b})", f"({ra} if {rc} else {rb})"

    def cond(self, depth: int) -> tuple[str, str]:
        (a, ra), (b, rb) = self.expr(min(depth, 1)), self.expr(min(depth, 1))
        op = self.pick(["<", ">", "<=", ">=", "==", "!="])
        return f"{a} {op} {b}", f"{ra} {op} {rb}"

    def block(self, ind: int, depth: int, count: int) -> None:
        for _ in range(count):
            self.stmt(ind, depth)

    def stmt(self, ind: int, depth: int) -> None:
        rng = self.rng
        roll = rng.random()
        if roll < 0.3 or not self.floats:
            v = f"v{self.count}" if rng.random() < 0.5 or not self.floats else self.pick(sorted(self.floats))
            self.count += 1
            e, r = self.expr(int(rng.integers(2, 4)))
            self.emit(ind, f"{v} = {e}", f"{v} = {r}")
            self.floats.add(v)
        elif roll < 0.45:
            v = self.pick(sorted(self.floats))
            op = self.pick(["+=", "-=", "*=", "/="])
            e, r = self.expr(2)
            self.emit(ind, f"{v} {op} {e}", f"{v} {op} {r}")
        elif roll < 0.65:
            row = int(rng.integers(2))
            tgt = f"out[{row}, {self.index(OUT_SHAPE[1])}]"
            e, r = self.expr(2)
            op = self.pick(["=", "+="])
            self.emit(ind, f"{tgt} {op} {e}", f"{tgt} {op} {r}")
        elif roll < 0.82 and depth < 3:
            free = [v for v in ("i", "j", "k") if v not in self.active]
            v = self.pick(free)
            if rng.random() < 0.25:
                head, top = "range(n)", A_LEN
            else:
                lo = int(rng.integers(0, 3))
                top = int(rng.integers(lo, 5))
                head = f"range({lo}, {top})" if rng.random() < 0.7 or lo else f"range({top})"
            self.emit(ind, f"for {v} in {head}:")
            before = set(self.floats)
            self.loops[v] = max(top, 1)
            self.active.add(v)
            self.block(ind + 1, depth + 1, int(rng.integers(1, 4)))
            self.active.discard(v)
            self.floats = before  # a name first set in the loop is unset after it (zero passes)
        elif depth < 3:
            c, rc = self.cond(2)
            self.emit(ind, f"if {c}:", f"if {rc}:")
            before = set(self.floats)
            self.block(ind + 1, depth + 1, int(rng.integers(1, 3)))
            then, self.floats = self.floats, set(before)
            if rng.random() < 0.6:
                self.emit(ind, "else:")
                self.block(ind + 1, depth + 1, int(rng.integers(1, 3)))
            self.floats &= then
        else:
            e, r = self.expr(2)
            self.emit(ind, f"out[1, 0] += {e}", f"out[1, 0] += {r}")

    def build(self) -> None:
        self.emit(0, '@numba.njit(error_model="numpy")', "")
        self.emit(0, f"def {self.name}(a, b, x, y, out):")
        self.emit(1, "n = a.shape[0]")
        self.block(1, 0, int(self.rng.integers(3, 8)))
        for t, v in enumerate(sorted(self.floats)[:8]):
            self.emit(1, f"out[0, {8 + t}] = {v}")
        self.emit(1, "return n")


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


def test_random_programs_compute_in_c_what_they_compute_in_python(tmp_path):
    rng = np.random.default_rng(20240611)
    programs = []
    for p in range(250):
        prog = _Program(rng, f"p{p}")
        prog.build()
        programs.append(prog)
    dims = [("a", 1), ("b", 2), ("x", 0), ("y", 0), ("out", 2)]
    texts = [ctranslate.to_c("import numba\n" + "\n".join(p.kernel) + "\n", p.name, dims, prelude=(i == 0))
             for i, p in enumerate(programs)]
    src = "\n".join(programs[0].kernel)
    lib = standalone._compile_into(tmp_path, "\n".join(texts), standalone.flags(src), standalone.compiler(),
                                   lambda data: tmp_path / "programs.so")
    handle = ctypes.CDLL(str(lib))
    ns = {"F": np.float64, "float": np.float64, "sqrt": np.sqrt, "ln": _numba_ln,
          "ln_floored": _numba_ln_floored}
    for p in programs:
        exec(compile("\n".join(p.ref) + "\n", p.name, "exec"), ns)
    checked = 0
    with np.errstate(all="ignore"):
        for i, p in enumerate(programs):
            fn = standalone.CKernel(handle, p.name, [1, 2, 0, 0, 2])
            for trial in range(3):
                a, b, x, y = _inputs(rng, special=trial == 2)
                out_c, out_py = np.zeros(OUT_SHAPE), np.zeros(OUT_SHAPE)
                assert fn(a, b, x, y, out_c) == ns[p.name](a, b, np.float64(x), np.float64(y), out_py) == A_LEN
                try:
                    np.testing.assert_allclose(out_c, out_py, rtol=1e-12, atol=0.0, equal_nan=True)
                except AssertionError:
                    raise AssertionError("program differs:\n" + "\n".join(p.kernel) + f"\n{texts[i]}") from None
                checked += np.isfinite(out_py).sum()
    assert checked > 5000  # the programs compute finite values, not only NaN
