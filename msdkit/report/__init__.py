"""Figures and the self-contained HTML report."""

from .html import write_report

__all__ = ["write_report"]
