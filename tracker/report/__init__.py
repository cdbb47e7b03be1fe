"""The printable follow-up report of one visit (``ncs-tracker report``, Visit review download).

Entry points: :func:`build` (the content, from the services), :func:`render` (PDF or HTML bytes),
:func:`tracker.report.output.write_private` (the file, atomically, mode 0600). An interface-level package: it
calls services and never touches the database itself.
"""

from __future__ import annotations

import datetime as dt

from tracker.report import output
from tracker.report.content import FollowUpReport, build
from tracker.report.output import creation_stamp, format_of, write_private

__all__ = ["FollowUpReport", "build", "creation_stamp", "format_of", "output", "render", "write_private"]


def render(report: FollowUpReport, file_format: str, *, created: dt.datetime | None = None) -> bytes:
    """The report as ``pdf`` or ``html`` bytes; the same report and ``created`` give the same bytes."""
    created = created or creation_stamp()
    if file_format == "pdf":
        from tracker.report import pdf

        return pdf.render(report, created)
    if file_format == "html":
        from tracker.report import html

        return html.render(report, created)
    raise ValueError(f"unknown report format {file_format!r}")
