"""The self-contained HTML report comparing encoders (see :mod:`invariance.report.html`)."""

from invariance.report.html import check_writable, render_report, write_report

__all__ = ["check_writable", "render_report", "write_report"]
