"""The designer's report: one self-contained HTML page (images inline) for designs, overlaid, and bom.csv.

:func:`write_report` is handed loaded designs (:class:`~xo_fit.output.design.Design` and
:class:`~xo_fit.output.design.Spread`); it never reads a job or a result itself. The page reads top-down:
what to buy (the bill of materials of the result bought from, :mod:`~xo_fit.output.report.parts`), the
metrics, predicted preference, where the error lies, the tolerance summary, values, targets and curves of
every result (:mod:`~xo_fit.output.report.sections`, figures in :mod:`~xo_fit.output.report.figures` and
:mod:`~xo_fit.output.report.offaxis`), then the part list, protection, network, a prune's steps, findings
and cautions of the design to build. :mod:`~xo_fit.output.report.page` holds the page's template and its
list of sections; :mod:`~xo_fit.output.report.markup` the HTML helpers that escape every text from a file.
"""

from xo_fit.output.report.page import write_report

__all__ = ["write_report"]
