"""The stakeholder report: plain-language words, figures and the single-file HTML page."""

from .html import HEADINGS, SECTIONS, render_report, write_report
from .words import evidence, headline

__all__ = ["HEADINGS", "SECTIONS", "evidence", "headline", "render_report", "write_report"]
