"""The allocation report: one self-contained HTML file per campaign round.

:func:`build_report` collects the content (:mod:`prescreen.report.build`) and renders
it (:mod:`prescreen.report.render`, figures from :mod:`prescreen.report.figures`);
:func:`write_pdf` prints it to PDF when headless Chromium is installed (optional).
"""

from __future__ import annotations

from prescreen.report.build import (
    CAUTIONS,
    ReplayCurves,
    ReportData,
    ValidationData,
    build_report,
    collect,
    write_pdf,
)

__all__ = ["build_report", "write_pdf", "collect", "ReportData", "ReplayCurves", "ValidationData", "CAUTIONS"]
