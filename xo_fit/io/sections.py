"""The sections of a result.json that the report, the export and --from read, checked for the shapes xo_fit writes.

A result may be edited by hand (or damaged); whatever it holds, reading it gives a result whose sections have the
documented shapes (docs/outputs.md) or a :class:`~xo_fit.errors.DataError` naming the file and the key, never a
traceback later in a plot, a table or a page.
"""

from __future__ import annotations

from pathlib import Path
from typing import Any

from xo_fit.errors import DataError, shown_path
from xo_fit.job.model import NAME_PATTERN, is_name

#: Texts in a result (a stage, a series, a path) longer than this are no xo_fit output.
MAX_TEXT = 4096


def _num(x: Any) -> bool:
    return isinstance(x, (int, float)) and not isinstance(x, bool)


def _text(x: Any) -> bool:
    return isinstance(x, str) and len(x) <= MAX_TEXT and "\x00" not in x


class _Check:
    def __init__(self, path: Path) -> None:
        self.path = path

    def want(self, ok: bool, key: str, expected: str) -> None:
        if not ok:
            raise DataError(f"expected {expected}", path=shown_path(self.path), key=shown_path(key)[:200])

    def table(self, doc: dict, key: str) -> dict | None:
        v = doc.get(key)
        self.want(v is None or isinstance(v, dict), key, "a table")
        return v


def _parts(c: _Check, parts: dict) -> None:
    for name, e in parts.items():
        c.want(is_name(name, NAME_PATTERN), f"parts.{name}", "a part name (a letter or _, then letters, digits, _, -)")
        for k in ("unit", "text", "limit", "series", "source", "inventory"):
            c.want(e.get(k) is None or _text(e[k]), f"parts.{name}.{k}", "a text")
        c.want(e.get("continuous") is None or _num(e["continuous"]), f"parts.{name}.continuous", "a number")
        comb = e.get("combination")
        if comb is not None:
            pieces = comb.get("parts") if isinstance(comb, dict) else None
            c.want(isinstance(comb, dict) and comb.get("connection") in ("series", "parallel")
                   and isinstance(pieces, list) and 1 <= len(pieces) <= 8
                   and all(isinstance(x, dict) and _text(x.get("text")) and _num(x.get("value")) for x in pieces),
                   f"parts.{name}.combination",
                   '{"connection": "series" or "parallel", "parts": [{"value": <number>, "text": <text>}, ...]}')


def _prune(c: _Check, pr: dict) -> None:
    steps = pr.get("steps")
    c.want(isinstance(steps, list) and len(steps) >= 1, "prune.steps", "a list of steps, step 0 first")
    assert isinstance(steps, list)  # want() raised otherwise
    for i, r in enumerate(steps):
        key = f"prune.steps[{i}]"
        c.want(isinstance(r, dict), key, "a table")
        c.want(isinstance(r.get("step"), int) and not isinstance(r["step"], bool) and r["step"] == i, f"{key}.step",
               f"the whole number {i}")
        c.want(isinstance(r.get("parts"), int) and not isinstance(r["parts"], bool) and r["parts"] >= 0,
               f"{key}.parts", "a whole number of parts")
        c.want(r.get("removed") == "" if i == 0 else is_name(r.get("removed"), NAME_PATTERN), f"{key}.removed",
               '"" (step 0)' if i == 0 else "the name of the part removed")
        c.want(r.get("how") in (("",) if i == 0 else ("open", "short")), f"{key}.how",
               '"" (step 0)' if i == 0 else '"open" or "short"')
        for k in ("cost", "rms_error_db", "max_error_db", "phase_mismatch_deg", "impedance_min_ohm"):
            c.want(k in r and (r[k] is None or _num(r[k])), f"{key}.{k}", "a number or null")
    chosen = pr.get("chosen_step")
    c.want(isinstance(chosen, int) and not isinstance(chosen, bool) and 0 <= chosen < len(steps), "prune.chosen_step",
           f"a step number from 0 to {len(steps) - 1}")
    c.want(_num(pr.get("max_increase")) and pr["max_increase"] >= 0, "prune.max_increase",
           "a number at least 0 (a share: 0.1 for 10 %)")


def _spread(c: _Check, sp: dict) -> None:
    y = sp.get("yield")
    c.want(isinstance(y, dict), "spread.yield", "a table")
    assert isinstance(y, dict)  # want() raised otherwise
    for k in ("within_band", "meeting_limits"):
        c.want(_num(y.get(k)) and 0 <= y[k] <= 1, f"spread.yield.{k}", "a share from 0 to 1")
    sens = sp.get("sensitivity")
    c.want(isinstance(sens, list), "spread.sensitivity", "a list")
    assert isinstance(sens, list)  # want() raised otherwise
    for i, r in enumerate(sens):
        c.want(isinstance(r, dict) and is_name(r.get("part"), NAME_PATTERN) and _num(r.get("db_per_pct")),
               f"spread.sensitivity[{i}]", '{"part": <name>, "db_per_pct": <number>, ...}')


def check_sections(doc: dict, path: str | Path) -> None:
    """Raise DataError (naming ``path`` and the key) where a result's sections lack the shapes xo_fit writes.

    ``doc`` is a parsed result whose "parts" is a table of tables, each with a positive "value".
    """
    c = _Check(Path(path))
    c.want(doc.get("stage") is None or (_text(doc["stage"]) and doc["stage"].isprintable()), "stage",
           'a text such as "fit"')
    src = c.table(doc, "source")
    if src is not None:
        for k in ("job", "folder", "job_folder", "from", "inventory"):
            c.want(src.get(k) is None or _text(src[k]), f"source.{k}", "a text (a path) or null")
        c.want(src.get("document") is None or isinstance(src["document"], dict), "source.document",
               "a table (the job the result was made from)")
    _parts(c, doc["parts"])
    for key in ("search", "snap"):
        c.table(doc, key)
    pr = c.table(doc, "prune")
    if pr is not None:
        _prune(c, pr)
    sp = c.table(doc, "spread")
    if sp is not None or doc.get("stage") == "spread":
        c.want(sp is not None, "spread", "a table (a spread result)")
        assert sp is not None  # want() raised otherwise
        _spread(c, sp)
