"""The network drawn as a schematic (schemdraw), one ladder per way; None where no ladder layout is found.

Each driver's way is laid out as a ladder: the series parts from "in" to the
driver's hot terminal along the top, at each node the parts (or two-part
chains, such as a Zobel's R and C) that go down to "0", and the driver last.
A netlist that is no set of such ladders (a driver between two hot nodes, a
part between two ways, a bridge) returns None, and the report shows its
netlist table instead.
"""

from __future__ import annotations

from collections import deque

from xo_fit.constants import GROUND_NODE, SOURCE_NODE


def ladders(job) -> list[dict] | None:
    """Per driver: {"driver", "series": [(part, from node, to node)], "shunts": {node: [[part, ...], ...]}}, or
    None when some part does not fit a ladder."""
    parts = {p.name: p for p in job.parts}
    used: set[str] = set()
    out = []
    at: dict[str, list[str]] = {}
    for p in job.parts:
        for n in p.nodes:
            at.setdefault(n, []).append(p.name)
    for d in (p for p in job.parts if p.type == "driver"):
        if GROUND_NODE not in d.nodes:
            return None
        hot = d.nodes[0] if d.nodes[1] == GROUND_NODE else d.nodes[1]
        # the series path in -> hot through valued parts, never through "0"
        prev: dict[str, tuple[str, str] | None] = {SOURCE_NODE: None}
        queue = deque([SOURCE_NODE])
        while queue and hot not in prev:
            n = queue.popleft()
            for name in at.get(n, []):
                p = parts[name]
                if p.type == "driver" or name in used:
                    continue
                other = p.nodes[1] if p.nodes[0] == n else p.nodes[0]
                if other == GROUND_NODE or other in prev:
                    continue
                prev[other] = (name, n)
                queue.append(other)
        if hot not in prev:
            return None
        series = []
        n = hot
        while (step := prev[n]) is not None:
            name, frm = step
            series.append((name, frm, n))
            n = frm
        series.reverse()
        used.update(name for name, _, _ in series)
        used.add(d.name)
        shunts: dict[str, list[list[str]]] = {}
        for _, _, node in series:
            for name in at.get(node, []):
                p = parts[name]
                if name in used or p.type == "driver":
                    continue
                other = p.nodes[1] if p.nodes[0] == node else p.nodes[0]
                if other == GROUND_NODE:
                    shunts.setdefault(node, []).append([name])
                    used.add(name)
                    continue
                chain = [name]  # a chain down to ground through nodes no other part touches
                while other != GROUND_NODE and len(at.get(other, [])) == 2:
                    nxt = next(x for x in at[other] if x not in chain)
                    q = parts[nxt]
                    if q.type == "driver" or nxt in used:
                        break
                    chain.append(nxt)
                    other = q.nodes[1] if q.nodes[0] == other else q.nodes[0]
                if other == GROUND_NODE:
                    shunts.setdefault(node, []).append(chain)
                    used.update(chain)
        out.append({"driver": d, "series": series, "shunts": shunts})
    if used != set(parts):
        return None
    return out


def draw(job, values: dict[str, float]) -> bytes | None:
    """The schematic as PNG bytes, or None when the netlist is no set of ladders."""
    layout = ladders(job)
    if layout is None:
        return None
    import matplotlib

    matplotlib.use("Agg")
    import schemdraw
    import schemdraw.elements as elm

    from xo_fit.units import format_value

    schemdraw.use("matplotlib")
    kinds = {"R": elm.Resistor, "L": elm.Inductor2, "C": elm.Capacitor}
    parts = {p.name: p for p in job.parts}

    def label(name: str) -> str:
        p = parts[name]
        return f"{name}\n{format_value(values[name], p.unit)}" if name in values else name

    d = schemdraw.Drawing(show=False)
    d.config(fontsize=9, unit=2.5)
    y = 0.0
    for way in layout:
        x = 0.0
        d.add(elm.Dot(open=True).at((x, y)).label(SOURCE_NODE, "left"))
        depth = 2
        for name, _, node in way["series"]:
            d.add(kinds[parts[name].type]().endpoints((x, y), (x + 3, y)).label(label(name)))
            x += 3
            for chain in way["shunts"].get(node, []):
                yy = y
                for part in chain:
                    element = kinds[parts[part].type]().endpoints((x, yy), (x, yy - 2.5))
                    d.add(element.label(label(part), "bot", ofst=0.3))
                    yy -= 2.5
                d.add(elm.Ground().at((x, yy)))
                depth = max(depth, len(chain))
                d.add(elm.Line().endpoints((x, y), (x + 1.5, y)))
                x += 1.5
        drv = way["driver"]
        inverted = drv.nodes[0] == GROUND_NODE
        d.add(elm.Line().endpoints((x, y), (x + 0.6, y)))
        d.add(elm.Speaker().at((x + 0.6, y)).right().label(f"{drv.name}\n{'(inverted)' if inverted else ''}",
                                                            "right"))
        y -= 2.5 * depth + 3.5
    data = d.get_imagedata("png")
    figure = getattr(getattr(d, "fig", None), "fig", None)  # schemdraw's matplotlib figure, kept by pyplot
    if figure is not None:
        import matplotlib.pyplot as plt

        plt.close(figure)  # else every report leaves one open (matplotlib warns after 20)
    return data
