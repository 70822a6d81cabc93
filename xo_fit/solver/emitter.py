"""The generated kernels' straight-line code, as IR (:mod:`xo_fit.solver.ir`): named temporaries, complex
arithmetic written out in real and imaginary parts, a minimum-degree elimination order, and batched reciprocals
(Montgomery's trick)."""

from __future__ import annotations

from xo_fit.solver.ir import Expr, Stmt, Var, f8, let, signed_sum


class Emitter:
    """Emits straight-line real arithmetic for complex values kept as (re, im) expressions; None is a zero part.
    Each value is a new double name declared where it is set (:class:`~xo_fit.solver.ir.Let`).

    Attributes
    ----------
    lines : list of Stmt
        The statements emitted so far, in order (a generator may take them and start a fresh list).
    count : int
        How many names it has made; each name ends in its number, so no two are alike.
    """

    def __init__(self) -> None:
        self.lines: list[Stmt] = []
        self.count = 0

    def let(self, expr: Expr, stem: str = "t") -> Var:
        """A new double name ``stem`` + its number, set to ``expr`` by a statement appended to :attr:`lines`."""
        self.count += 1
        name = f8(f"{stem}{self.count}")
        self.lines.append(let(name, expr))
        return name

    def _pair(self, re_terms: list, im_terms: list, stem: str) -> tuple:
        return (self.let(signed_sum(re_terms), stem + "r") if re_terms else None,
                self.let(signed_sum(im_terms), stem + "i") if im_terms else None)

    def sum(self, terms: list[tuple[int, tuple]], stem: str = "a") -> tuple:
        """Sum of sign * value over ``terms`` [(+1 | -1, (re, im))]; returns a complex pair (names, or None for
        a part with no terms)."""
        return self._pair([(s, v[0]) for s, v in terms if v[0] is not None],
                          [(s, v[1]) for s, v in terms if v[1] is not None], stem)

    @staticmethod
    def _products(x: tuple, y: tuple, sign: int) -> tuple[list, list]:
        """Signed terms of sign * x * y, real and imaginary."""
        xr, xi = x
        yr, yi = y
        re = [(sign, xr * yr)] if xr is not None and yr is not None else []
        re += [(-sign, xi * yi)] if xi is not None and yi is not None else []
        im = [(sign, xr * yi)] if xr is not None and yi is not None else []
        im += [(sign, xi * yr)] if xi is not None and yr is not None else []
        return re, im

    def mul(self, x: tuple, y: tuple, stem: str = "m") -> tuple:
        """The complex product x * y of two (re, im) pairs, as a pair of names (None for a zero part)."""
        return self._pair(*self._products(x, y, 1), stem)

    def fms(self, acc: tuple, x: tuple, y: tuple, stem: str = "a") -> tuple:
        """acc - x * y of (re, im) pairs, one expression per part (so the compiler can contract it to fused
        multiply-adds); ``acc`` itself when x * y is structurally zero."""
        re, im = self._products(x, y, -1)
        if not re and not im:
            return acc
        re = ([(1, acc[0])] if acc[0] is not None else []) + re
        im = ([(1, acc[1])] if acc[1] is not None else []) + im
        return self._pair(re, im, stem)


def elimination_order(nodes: list[str], adj: dict[str, set[str]], rhs: set[str], dissipative: set[str]) -> list[str]:
    """Greedy minimum-degree elimination order with fill-in; ties: no RHS first, dissipative first, by name.

    Parameters
    ----------
    nodes : list of str
        The unknown nodes.
    adj : dict
        Each node's neighbours in the matrix (node -> set of nodes); copied, not changed.
    rhs : set of str
        The nodes with a right-hand side; updated in place as elimination spreads it to their neighbours.
    dissipative : set of str
        The nodes preferred on a tie (the code generator passes those touching a driver, an R or a series
        chain: edges that usually dissipate).

    Returns
    -------
    list of str
        Every node of ``nodes`` once, in the order of elimination.
    """
    adj = {n: set(a) for n, a in adj.items()}
    left = list(nodes)
    order = []
    while left:
        best = min(left, key=lambda n: (len(adj[n]), n in rhs, n not in dissipative, n))
        nb = adj[best]
        for i in nb:
            adj[i] |= nb - {i}
            adj[i].discard(best)
        if best in rhs:
            rhs |= nb
        left.remove(best)
        order.append(best)
    return order


def batch_reciprocal(e: Emitter, dens: list[Expr], traps: list[Expr], stem: str) -> list[Expr]:
    """Reciprocals of several independent reals with one division (Montgomery's trick, tree-shaped).

    The values are multiplied pairwise up a balanced tree, the root is
    inverted once, and the inverse is pushed back down (1/(ab) * b = 1/a), so
    n reciprocals cost one division and about 3n multiplications with a
    dependency depth of only 2 log2(n) multiplications: the kernel is bound
    by latency, not by arithmetic. ``traps`` receives a name that is NaN when
    the product over- or underflowed, so that the point is solved again by
    the dense path instead of silently returning zeros.

    Parameters
    ----------
    e : Emitter
        Where the statements go.
    dens : list of Expr
        The values to invert (each a real expression, structurally non-zero).
    traps : list of Expr
        Appended to: the check name (root * 1/root, NaN or inf when the product over- or underflowed).
    stem : str
        The stem of the new names.

    Returns
    -------
    list of Expr
        1 / value for each of ``dens``, in order.
    """
    if len(dens) == 1:
        inv = e.let(1.0 / dens[0], stem)
        traps.append(e.let(dens[0] * inv, stem + "t"))
        return [inv]
    # build the tree bottom-up: levels[0] = leaves
    levels = [list(dens)]
    while len(levels[-1]) > 1:
        prev = levels[-1]
        nxt = [e.let(prev[i] * prev[i + 1], stem + "c") if i + 1 < len(prev) else prev[i]
               for i in range(0, len(prev), 2)]
        levels.append(nxt)
    root = levels[-1][0]
    inv = e.let(1.0 / root, stem + "n")
    traps.append(e.let(root * inv, stem + "t"))
    invs: list[Expr] = [inv]
    for depth in range(len(levels) - 2, -1, -1):
        prev = levels[depth]
        down: list[Expr] = []
        for i in range(0, len(prev), 2):
            parent = invs[i // 2]
            if i + 1 < len(prev):
                down.append(e.let(parent * prev[i + 1], stem + "r"))
                down.append(e.let(parent * prev[i], stem + "r"))
            else:
                down.append(parent)
        invs = down
    return invs
