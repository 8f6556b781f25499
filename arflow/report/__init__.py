"""``arflow report``: one self-contained HTML file for one run (charts, tables, cautions).

Needs the optional extra ``report`` (plotly); everything the page needs is
inside the file (plotly.js inline, no network at all when it is opened).
"""

from __future__ import annotations

from .build import ReportOptions, ReportSummary, write_report

__all__ = ["ReportOptions", "ReportSummary", "write_report"]
