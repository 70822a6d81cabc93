"""A result read back: :func:`load_result` rebuilds a design (or a spread) from a result.json alone.

The result carries the resolved job document and the job's folder (relative to the result and absolute), so a
moved result folder or a batch variant's result loads like any other (:func:`job_of_result`); the design is
re-scored from its values, and a spread's percentile curves are read from its spread.csv
(:func:`spread_columns`). The file reading itself is :mod:`xo_fit.io.results`'s.
"""

from __future__ import annotations

from pathlib import Path

import numpy as np

from xo_fit.errors import DataError, XoFitError
from xo_fit.output.design import Design, Spread

#: Sections recomputed when a result is loaded (everything else is kept as the stage wrote it).
RECOMPUTED = frozenset({"xo_fit_version", "format", "job", "stage", "parts", "cost", "cost_terms", "metrics",
                        "level_db", "findings", "stress", "source", "error_breakdown", "protection", "limits"})
#: Entries of parts.NAME recomputed when a result is loaded (the rest, a snap's series, source and combination,
#: is what the result says of the part beyond its value).
PART_RECOMPUTED = frozenset({"value", "unit", "text", "limit"})


def job_of_result(doc: dict, folder: Path, path: Path):
    """The job a result was made from, loaded (a :class:`~xo_fit.model.system.System`).

    Rebuilt from the result's resolved document, its data found relative to the result (as the folders stood
    when it was written) or at the job folder's absolute path (the result's own folder where it names neither);
    or, for a result without the document (written before format 2), read from the job file it names. ``doc``
    is the read result.json, ``folder`` the folder it lies in, ``path`` the file (for messages). Raises
    DataError when the result names no job or no folder rebuilds it.
    """
    from xo_fit.job.reader import load_job
    from xo_fit.model.system import load_system

    src = doc.get("source") or {}
    document = src.get("document")
    if not isinstance(document, dict):
        job_file = src.get("job")
        if not job_file:
            raise DataError("the result names no job (source.document or source.job); make it with xo-fit",
                            path=path, key="source")
        return load_system(load_job(job_file))
    bases = []
    if isinstance(src.get("job_folder"), str):
        bases.append((folder / src["job_folder"]).resolve())
    if isinstance(src.get("folder"), str):
        bases.append(Path(src["folder"]))
    if not bases:
        bases.append(folder)
    first: XoFitError | None = None
    for base in dict.fromkeys(bases):
        try:
            return load_system(load_job(document, base=base))
        except XoFitError as e:
            first = first or e
    raise DataError(f"cannot rebuild the result's job: {first} (looked for its data in "
                    f"{' and '.join(str(b) for b in dict.fromkeys(bases))})", path=path, key="source") from None


def spread_columns(table: Path, f: np.ndarray) -> dict[str, np.ndarray]:
    """The columns of a spread.csv (each (F,); an empty cell is NaN), checked against the result's grid ``f``
    (F,) in Hz: a DataError naming the file (and the line) for a missing or empty table, a column the report
    needs missing or one named twice, a row of the wrong length, a cell that is not a finite number, or rows
    other than the grid's frequencies."""
    import csv

    from xo_fit.errors import read_user_text

    if not table.exists():
        raise DataError("a spread result needs its spread.csv beside it", path=table)
    rows = list(csv.reader(read_user_text(table, "spread table").splitlines()))
    if len(rows) < 2:
        raise DataError("spread.csv holds no rows", path=table)
    head, body = rows[0], rows[1:]
    need = ["frequency_hz", "sum_p05_db", "sum_p50_db", "sum_p95_db"]
    if [h for h in need if h not in head] or len(set(head)) != len(head):
        raise DataError(f"spread.csv: expected the columns {', '.join(need)}, ... once each, got {head[:12]!r}",
                        path=table, line=1)
    if len(body) != f.size:
        raise DataError(f"spread.csv holds {len(body)} rows; the result's grid has {f.size} points", path=table)
    data = np.full((len(body), len(head)), np.nan)
    for i, r in enumerate(body):
        if len(r) != len(head):
            raise DataError(f"expected {len(head)} cells, got {len(r)}", path=table, line=i + 2)
        for k, x in enumerate(r):
            try:
                data[i, k] = float(x) if x != "" else np.nan
            except ValueError:
                raise DataError(f"{head[k]}: {x[:40]!r} is not a number", path=table, line=i + 2) from None
            if np.isinf(data[i, k]):
                raise DataError(f"{head[k]}: {x[:40]!r} is not a finite number", path=table, line=i + 2)
    if not np.allclose(data[:, 0], f, rtol=1e-4, atol=0):
        raise DataError("spread.csv's frequencies are not the result's grid", path=table)
    return {h: data[:, k] for k, h in enumerate(head)}


def part_extras(parts: dict) -> dict[str, dict]:
    """What a result's ``parts`` say of each part beyond its value (a snap's series, source and combination):
    name -> the entries :data:`PART_RECOMPUTED` leaves, for every part that has any."""
    out = {n: {k: v for k, v in e.items() if k not in PART_RECOMPUTED} for n, e in parts.items() if isinstance(e, dict)}
    return {n: e for n, e in out.items() if e}


def load_result(path: str | Path, *, system=None) -> Design | Spread:
    """A result.json (or its folder) as a :class:`~xo_fit.output.design.Design`, or a
    :class:`~xo_fit.output.design.Spread` for a spread result.

    The design is rebuilt and re-scored from the result alone (see :func:`job_of_result`).

    Parameters
    ----------
    path : str or Path
        The result.json file, or the folder that holds it.
    system : System, optional
        An already loaded job (:class:`~xo_fit.model.system.System`) to score the values on instead of the
        job the result carries.

    Returns
    -------
    Design or Spread
        The design with its part values (SI: ohm, H, F) re-scored; a ``Spread`` (its design, the spread
        section and spread.csv's curves on the job's grid, (F,) each) when the result's stage is "spread".

    Raises
    ------
    XoFitError
        The file is missing, not a result, damaged, names parts the job does not have, or its job cannot be
        rebuilt; a spread result whose spread.csv is missing or damaged.
    """
    from xo_fit.search.fitting import score
    from xo_fit.io.results import read_result, result_values

    path = Path(path)
    doc = read_result(path)
    folder = path if path.is_dir() else path.parent
    file = folder / "result.json" if path.is_dir() else path
    system = system if system is not None else job_of_result(doc, folder, file)
    values = system.values(result_values(doc, system.part_names, file))
    source = {k: v for k, v in (doc.get("source") or {}).items() if k in ("from", "inventory")}
    design = Design(system=system, scored=score(system, values), stage=str(doc.get("stage", "result")),
                    sections={k: v for k, v in doc.items() if k not in RECOMPUTED}, source=source,
                    part_info=part_extras(doc["parts"]), label=str(doc.get("stage", "result")))
    if design.stage != "spread":
        return design
    columns = spread_columns(folder / "spread.csv", system.frequencies)
    return Spread(design=design, section=dict(doc.get("spread") or {}), columns=columns)

