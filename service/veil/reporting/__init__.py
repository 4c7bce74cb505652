"""The per-version HTML report: the data its plots need, and the page itself.

The page is assembled in :mod:`veil.reporting.html` from the plots of
:mod:`veil.reporting.plots` and the sections of :mod:`veil.reporting.sections`.

May import: ``veil.registry`` (the card it renders), ``veil.checks`` (verdicts),
``veil.audit``, ``veil.maps``.  Never the fitting job, the service or the CLI.
"""

from veil.reporting.html import REPORT_FILE, render_report, version_report
from veil.reporting.plotdata import PLOT_DATA_FILE, PlotData

__all__ = ["PLOT_DATA_FILE", "REPORT_FILE", "PlotData", "render_report", "version_report"]
