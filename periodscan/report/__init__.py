"""The sweep report: tables (CSV, Parquet), PNG figures and one self-contained HTML page.

``write_report(view)`` takes a :class:`periodscan.api.SweepView` and writes everything into the
sweep's folder; the figure functions live in :mod:`periodscan.report.figures`.
"""

from __future__ import annotations


def write_report(view, **kwargs):
    """Write the report into the sweep folder; see :func:`periodscan.report.page.write_report`."""
    from periodscan.report.page import write_report as _write

    return _write(view, **kwargs)


__all__ = ["write_report"]
