"""The text of generated kernels: named temporaries, complex arithmetic written out in real and imaginary
parts, a minimum-degree elimination order, and batched reciprocals (Montgomery's trick)."""

from __future__ import annotations




def render(terms: list[tuple[int, str]]) -> str:
    """Render signed terms [(+1, "a"), (-1, "b * c")] as "a - b * c"."""
    expr = ""
    for sign, term in terms:
        if not expr:
            expr = term if sign > 0 else f"-{term}"
        else:
            expr += f" + {term}" if sign > 0 else f" - {term}"
    return expr


class Emitter:
    """Emits straight-line real arithmetic for complex values kept as (re, im) names; None is a zero part."""

    def __init__(self) -> None:
        self.lines: list[str] = []
        self.count = 0

    def let(self, expr: str, stem: str = "t") -> str:
        self.count += 1
        name = f"{stem}{self.count}"
        self.lines.append(f"{name} = {expr}")
        return name

    def _pair(self, re_terms: list, im_terms: list, stem: str) -> tuple:
        return (self.let(render(re_terms), stem + "r") if re_terms else None,
                self.let(render(im_terms), stem + "i") if im_terms else None)

    def sum(self, terms: list[tuple[int, tuple]], stem: str = "a") -> tuple:
        """Sum of sign * value over terms; returns a complex pair (names or None)."""
        return self._pair([(s, v[0]) for s, v in terms if v[0]], [(s, v[1]) for s, v in terms if v[1]], stem)

    @staticmethod
    def _products(x: tuple, y: tuple, sign: int) -> tuple[list, list]:
        """Signed terms of sign * x * y, real and imaginary."""
        xr, xi = x
        yr, yi = y
        re = [(sign, f"{xr} * {yr}")] if xr and yr else []
        re += [(-sign, f"{xi} * {yi}")] if xi and yi else []
        im = [(sign, f"{xr} * {yi}")] if xr and yi else []
        im += [(sign, f"{xi} * {yr}")] if xi and yr else []
        return re, im

    def mul(self, x: tuple, y: tuple, stem: str = "m") -> tuple:
        return self._pair(*self._products(x, y, 1), stem)

    def fms(self, acc: tuple, x: tuple, y: tuple, stem: str = "a") -> tuple:
        """acc - x * y, one expression per part (so the compiler can contract it to fused multiply-adds)."""
        re, im = self._products(x, y, -1)
        if not re and not im:
            return acc
        re = ([(1, acc[0])] if acc[0] else []) + re
        im = ([(1, acc[1])] if acc[1] else []) + im
        return self._pair(re, im, stem)


def elimination_order(nodes: list[str], adj: dict[str, set[str]], rhs: set[str], dissipative: set[str]) -> list[str]:
    """Greedy minimum-degree elimination order with fill-in; ties: no RHS first, dissipative first, by name."""
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


def batch_reciprocal(e: Emitter, dens: list[str], traps: list[str], stem: str) -> list[str]:
    """Reciprocals of several independent reals with one division (Montgomery's trick, tree-shaped).

    The values are multiplied pairwise up a balanced tree, the root is
    inverted once, and the inverse is pushed back down (1/(ab) * b = 1/a), so
    n reciprocals cost one division and about 3n multiplications with a
    dependency depth of only 2 log2(n) multiplications: the kernel is bound
    by latency, not by arithmetic. ``traps`` receives a name that is NaN when
    the product over- or underflowed, so that the point is solved again by
    the dense path instead of silently returning zeros.
    """
    if len(dens) == 1:
        inv = e.let(f"1.0 / {dens[0]}", stem)
        traps.append(e.let(f"{dens[0]} * {inv}", stem + "t"))
        return [inv]
    # build the tree bottom-up: levels[0] = leaves
    levels = [list(dens)]
    while len(levels[-1]) > 1:
        prev = levels[-1]
        nxt = [e.let(f"{prev[i]} * {prev[i + 1]}", stem + "c") if i + 1 < len(prev) else prev[i]
               for i in range(0, len(prev), 2)]
        levels.append(nxt)
    root = levels[-1][0]
    inv = e.let(f"1.0 / {root}", stem + "n")
    traps.append(e.let(f"{root} * {inv}", stem + "t"))
    invs = [inv]
    for depth in range(len(levels) - 2, -1, -1):
        prev = levels[depth]
        down = []
        for i in range(0, len(prev), 2):
            parent = invs[i // 2]
            if i + 1 < len(prev):
                down.append(e.let(f"{parent} * {prev[i + 1]}", stem + "r"))
                down.append(e.let(f"{parent} * {prev[i]}", stem + "r"))
            else:
                down.append(parent)
        invs = down
    return invs
