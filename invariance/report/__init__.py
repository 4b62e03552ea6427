"""The self-contained HTML report comparing encoders (see :mod:`invariance.report.render`)."""

from invariance._io import check_writable
from invariance.report.render import render_report, write_report

__all__ = ["check_writable", "render_report", "write_report"]
