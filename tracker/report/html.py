"""The follow-up report as one self-contained HTML file: inline CSS, the figure as an embedded PNG, no
script, and a content security policy that forbids the page any outside request."""

from __future__ import annotations

import base64
import datetime as dt
from html import escape

from tracker.report.content import FollowUpReport, Heading, Table, Text
from tracker.report.figure import png

CSS = """
@page { size: A4; margin: 16mm 16mm 20mm 16mm; }
body { font-family: "DejaVu Sans", "Segoe UI", Arial, sans-serif; color: #1f2d3a; font-size: 10pt;
       line-height: 1.35; max-width: 190mm; margin: 1.5em auto; padding: 0 1em; }
h1 { color: #0f6e74; font-size: 16pt; margin: 0 0 0.4em; }
h2 { color: #0f6e74; font-size: 12.5pt; margin: 1.2em 0 0.35em; border-bottom: 1px solid #c9d2cf; }
h3 { font-size: 10pt; margin: 0.8em 0 0.2em; }
table { border-collapse: collapse; width: 100%; margin: 0.25em 0 0.5em; font-size: 8.5pt;
        page-break-inside: auto; }
th, td { text-align: left; vertical-align: top; padding: 2px 4px; border-bottom: 1px solid #c9d2cf; }
th { background: #e8eeec; }
tr { page-break-inside: avoid; }
table.facts th { width: 34%; background: none; }
p { margin: 0.2em 0 0.4em; }
p.note { font-size: 8.5pt; color: #44525e; }
p.outcome { font-weight: bold; font-size: 11.5pt; }
p.caution { font-weight: bold; background: #fff4e0; border: 1px solid #E69F00; padding: 6px 8px; }
figure { margin: 0.5em 0; page-break-inside: avoid; }
figure img { width: 100%; height: auto; }
figcaption, footer { font-size: 8.5pt; color: #44525e; }
"""
POLICY = "default-src 'none'; img-src data:; style-src 'unsafe-inline'"


def _block(block) -> str:
    if isinstance(block, Heading):
        return f"<h3>{escape(block.text)}</h3>"
    if isinstance(block, Text):
        return f'<p class="{escape(block.kind)}">{escape(block.text)}</p>'
    if isinstance(block, Table):
        if not block.rows:
            return f"<p>{escape(block.empty or 'None.')}</p>"
        head = "".join(f"<th>{escape(h)}</th>" for h in block.header)
        body = "".join("<tr>" + "".join(f"<td>{escape(c)}</td>" for c in row) + "</tr>" for row in block.rows)
        return f"<table><thead><tr>{head}</tr></thead><tbody>{body}</tbody></table>"
    raise TypeError(f"unknown report block {type(block).__name__}")


def render(report: FollowUpReport, created: dt.datetime) -> bytes:
    """The report as UTF-8 HTML bytes; ``created`` is printed at the end."""
    stamp = created.astimezone(dt.timezone.utc)
    picture = base64.b64encode(png(report.figure)).decode("ascii")
    parts = [
        "<!DOCTYPE html>",
        '<html lang="en"><head><meta charset="utf-8">',
        f'<meta http-equiv="Content-Security-Policy" content="{POLICY}">',
        '<meta name="viewport" content="width=device-width, initial-scale=1">',
        f'<meta name="generator" content="ncs-tracker {escape(report.version)}">',
        f"<title>{escape(report.title)}</title><style>{CSS}</style></head><body>",
        f"<h1>{escape(report.title)}</h1>",
        f'<p class="caution">{escape(report.caution)}</p>',
        '<table class="facts"><tbody>'
        + "".join(f"<tr><th>{escape(k)}</th><td>{escape(v)}</td></tr>" for k, v in report.facts)
        + "</tbody></table>",
    ]
    for section in report.sections:
        parts.append(f"<section><h2>{escape(section.title)}</h2>")
        parts += [_block(b) for b in section.blocks]
        parts.append("</section>")
    parts.append("<section><h2>Trend</h2><figure>")
    parts.append(f'<img alt="{escape(report.figure.alt)}" src="data:image/png;base64,{picture}">')
    parts.append(f"<figcaption>{escape(report.figure.caption)}</figcaption></figure></section>")
    if report.sources:
        parts.append(
            "<section><h2>Sources</h2>"
            + "".join(f'<p class="note">{escape(s)}</p>' for s in report.sources)
            + "</section>"
        )
    parts.append(f'<p class="caution">{escape(report.caution)}</p>')
    parts.append(
        f"<footer>{escape(report.patient)} · visit {report.visit_date.isoformat()} · produced "
        f"{stamp:%Y-%m-%d %H:%M} UTC by ncs-tracker {escape(report.version)}.</footer>"
    )
    parts.append("</body></html>\n")
    return "\n".join(parts).encode("utf-8")
