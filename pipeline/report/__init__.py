"""The HTML report: static page and PNG figures built from a session store."""

from pipeline.report.page import CAUTION, Section, render_page
from pipeline.report.stage import SECTIONS, build_report, run_report

__all__ = ["build_report", "run_report", "render_page", "Section", "SECTIONS", "CAUTION"]
