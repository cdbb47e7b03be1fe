"""The follow-up report as PDF bytes (reportlab, invariant mode: byte-stable for the same content and stamp).

Text is set in DejaVu Sans, the font that ships with matplotlib, so that µ, ≥, →, ▲ and ▼ print. Every
page carries the clinical caution, the pseudonymous code, the visit and the page number in its footer.
"""

from __future__ import annotations

import datetime as dt
import io
from pathlib import Path
from xml.sax.saxutils import escape

import matplotlib
from reportlab.lib import colors
from reportlab.lib.pagesizes import A4
from reportlab.lib.styles import ParagraphStyle
from reportlab.lib.units import mm
from reportlab.pdfbase import pdfmetrics
from reportlab.pdfbase.ttfonts import TTFont
from reportlab.platypus import (
    Image,
    KeepTogether,
    Paragraph,
    SimpleDocTemplate,
    Spacer,
    TableStyle,
)
from reportlab.platypus import (
    Table as PdfTable,
)

from tracker.report.content import FollowUpReport, Heading, Table
from tracker.report.figure import png

FONT, BOLD = "NcsDejaVuSans", "NcsDejaVuSans-Bold"
INK = colors.HexColor("#1f2d3a")
ACCENT = colors.HexColor("#0f6e74")
RULE = colors.HexColor("#c9d2cf")
HEAD_FILL = colors.HexColor("#e8eeec")
CAUTION_FILL = colors.HexColor("#fff4e0")
MARGIN = 16 * mm
FOOTER = 17 * mm


def _register_fonts() -> None:
    if FONT in pdfmetrics.getRegisteredFontNames():
        return
    folder = Path(matplotlib.get_data_path()) / "fonts" / "ttf"
    pdfmetrics.registerFont(TTFont(FONT, str(folder / "DejaVuSans.ttf")))
    pdfmetrics.registerFont(TTFont(BOLD, str(folder / "DejaVuSans-Bold.ttf")))
    pdfmetrics.registerFontFamily(FONT, normal=FONT, bold=BOLD, italic=FONT, boldItalic=BOLD)


def _styles() -> dict[str, ParagraphStyle]:
    base = ParagraphStyle("body", fontName=FONT, fontSize=9, leading=11.5, textColor=INK, spaceAfter=3)
    return {
        "title": ParagraphStyle(
            "title", parent=base, fontName=BOLD, fontSize=15, leading=19, textColor=ACCENT, spaceAfter=6
        ),
        "section": ParagraphStyle(
            "section",
            parent=base,
            fontName=BOLD,
            fontSize=12,
            leading=15,
            textColor=ACCENT,
            spaceBefore=9,
            spaceAfter=4,
        ),
        "heading": ParagraphStyle(
            "heading", parent=base, fontName=BOLD, fontSize=9.5, leading=12, spaceBefore=5, spaceAfter=2
        ),
        "body": base,
        "note": ParagraphStyle(
            "note", parent=base, fontSize=7.5, leading=9.5, textColor=colors.HexColor("#44525e")
        ),
        "outcome": ParagraphStyle("outcome", parent=base, fontName=BOLD, fontSize=11, leading=14),
        "caution": ParagraphStyle(
            "caution",
            parent=base,
            fontName=BOLD,
            fontSize=9,
            leading=11.5,
            backColor=CAUTION_FILL,
            borderColor=colors.HexColor("#E69F00"),
            borderWidth=0.8,
            borderPadding=5,
            spaceBefore=4,
            spaceAfter=8,
        ),
        "cell": ParagraphStyle("cell", parent=base, fontSize=7.5, leading=9, spaceAfter=0),
        "head": ParagraphStyle("head", parent=base, fontName=BOLD, fontSize=7.5, leading=9, spaceAfter=0),
        "footer": ParagraphStyle(
            "footer", parent=base, fontSize=6.5, leading=8, textColor=colors.HexColor("#44525e"), spaceAfter=0
        ),
    }


def _p(text: str, style: ParagraphStyle) -> Paragraph:
    return Paragraph(escape(text).replace("\n", "<br/>"), style)


def _table(block: Table, styles, width: float):
    if not block.rows:
        return _p(block.empty or "None.", styles["body"])
    total = sum(block.widths)
    widths = [width * w / total for w in block.widths]
    data = [[_p(h, styles["head"]) for h in block.header]] + [
        [_p(c, styles["cell"]) for c in row] for row in block.rows
    ]
    table = PdfTable(data, colWidths=widths, repeatRows=1, hAlign="LEFT")
    table.setStyle(
        TableStyle(
            [
                ("BACKGROUND", (0, 0), (-1, 0), HEAD_FILL),
                ("LINEBELOW", (0, 0), (-1, -1), 0.4, RULE),
                ("VALIGN", (0, 0), (-1, -1), "TOP"),
                ("LEFTPADDING", (0, 0), (-1, -1), 2.5),
                ("RIGHTPADDING", (0, 0), (-1, -1), 2.5),
                ("TOPPADDING", (0, 0), (-1, -1), 1.5),
                ("BOTTOMPADDING", (0, 0), (-1, -1), 2),
            ]
        )
    )
    return table


def render(report: FollowUpReport, created: dt.datetime) -> bytes:
    """The report as PDF bytes; ``created`` (aware, UTC) is printed in the
    footer and stored as the PDF dates."""
    _register_fonts()
    styles = _styles()
    buffer = io.BytesIO()
    stamp = created.astimezone(dt.timezone.utc)
    document = SimpleDocTemplate(
        buffer,
        pagesize=A4,
        leftMargin=MARGIN,
        rightMargin=MARGIN,
        topMargin=MARGIN,
        bottomMargin=MARGIN + FOOTER,
        title=report.title,
        author="ncs-tracker",
        subject="Nerve conduction follow-up report (decision support)",
        creator=f"ncs-tracker {report.version}",
        producer=f"ncs-tracker {report.version}",
        invariant=1,
    )
    width = A4[0] - 2 * MARGIN
    story = [_p(report.title, styles["title"]), _p(report.caution, styles["caution"])]
    facts = PdfTable(
        [[_p(k, styles["head"]), _p(v, styles["cell"])] for k, v in report.facts],
        colWidths=[52 * mm, width - 52 * mm],
        hAlign="LEFT",
    )
    facts.setStyle(
        TableStyle([("LINEBELOW", (0, 0), (-1, -1), 0.4, RULE), ("VALIGN", (0, 0), (-1, -1), "TOP")])
    )
    story.append(facts)
    for section in report.sections:
        story.append(_p(section.title, styles["section"]))
        pending_heading = None
        for block in section.blocks:
            if isinstance(block, Heading):
                pending_heading = _p(block.text, styles["heading"])
                continue
            flowable = (
                _table(block, styles, width)
                if isinstance(block, Table)
                else _p(block.text, styles.get(block.kind, styles["body"]))
            )
            if pending_heading is not None:  # a heading never stands alone at the foot of a page
                story.append(KeepTogether([pending_heading, flowable]))
                pending_heading = None
            else:
                story.append(flowable)
            story.append(Spacer(1, 2))
        if pending_heading is not None:
            story.append(pending_heading)
    story.append(_p("Trend", styles["section"]))
    image = png(report.figure)
    picture = Image(io.BytesIO(image), lazy=0)
    scale = width / picture.imageWidth
    picture.drawWidth, picture.drawHeight = width, picture.imageHeight * scale
    story.append(KeepTogether([picture, _p(report.figure.caption, styles["note"])]))
    if report.sources:
        story.append(_p("Sources", styles["section"]))
        story += [_p(s, styles["note"]) for s in report.sources]
    # The caution heads the first page and stands in every page's footer.
    story.append(_p(f"Produced {stamp:%Y-%m-%d %H:%M} UTC by ncs-tracker {report.version}.", styles["note"]))

    footer_text = f"{report.patient} · visit {report.visit_date.isoformat()} · {report.caution}"
    date_text = f"D:{stamp:%Y%m%d%H%M%S}+00'00'"

    def on_page(canvas, doc) -> None:
        canvas.saveState()
        canvas.setDateFormatter(lambda *_: date_text)
        footer = _p(footer_text, styles["footer"])
        _, height = footer.wrap(width - 22 * mm, FOOTER)
        footer.drawOn(canvas, MARGIN, MARGIN + FOOTER - 4 * mm - height)
        canvas.setFont(FONT, 7)
        canvas.setFillColor(INK)
        canvas.drawRightString(MARGIN + width, MARGIN + FOOTER - 4 * mm - 8, f"page {doc.page}")
        canvas.setStrokeColor(RULE)
        canvas.line(MARGIN, MARGIN + FOOTER - 2 * mm, MARGIN + width, MARGIN + FOOTER - 2 * mm)
        canvas.restoreState()

    document.build(story, onFirstPage=on_page, onLaterPages=on_page)
    return buffer.getvalue()
