"""Plain-text rendering of a patient's record for the terminal (interface layer; no rules here)."""

from __future__ import annotations

from tracker import CAUTION
from tracker.domain.labels import DIAGNOSIS_SHORT, segment_words, therapy_label, words
from tracker.services.records import NerveRecord, PatientRecord, VisitRecord

MISSING = "—"


def number(value: float | None, decimals: int = 1) -> str:
    return MISSING if value is None else f"{value:.{decimals}f}"


def _table(header: list[str], rows: list[list[str]], indent: str = "  ") -> list[str]:
    widths = [
        max(len(header[i]), *(len(r[i]) for r in rows)) if rows else len(header[i])
        for i in range(len(header))
    ]
    line = lambda cells: (
        indent
        + "  ".join(c.ljust(w) if i == 0 else c.rjust(w) for i, (c, w) in enumerate(zip(cells, widths)))
    )
    return [line(header), indent + "  ".join("-" * w for w in widths)] + [line(r) for r in rows]


def _f_wave(nerve: NerveRecord) -> str:
    if nerve.f_absent:
        return "absent"
    return number(nerve.f_latency_ms, 2)


def _motor_lines(nerves: list[NerveRecord]) -> list[str]:
    lines = ["Motor nerves (distal = site 1)"]
    rows = []
    for n in nerves:
        s = n.summary
        rows.append(
            [
                f"{words(n.nerve)} {n.side}",
                number(n.temperature_c),
                "no response" if s.no_response else number(s.distal_latency_ms, 2),
                number(s.distal_amplitude),
                number(s.distal_duration_ms),
                _f_wave(n),
            ]
        )
    lines += _table(
        [
            "nerve",
            "temp. (°C)",
            "distal latency (ms)",
            "CMAP (mV)",
            "CMAP duration (ms)",
            "F-wave latency (ms)",
        ],
        rows,
    )
    segment_rows = []
    for n in nerves:
        for seg in n.summary.segments:
            segment_rows.append(
                [
                    f"{words(n.nerve)} {n.side}: {segment_words(seg.name)}",
                    number(seg.distance_mm, 0),
                    number(seg.velocity_m_per_s),
                    number(seg.amplitude_reduction_pct),
                    number(seg.area_reduction_pct),
                    number(seg.duration_increase_pct),
                ]
            )
    if segment_rows:
        lines.append("")
        lines.append("Motor segments")
        lines += _table(
            ["segment", "dist. (mm)", "CV (m/s)", "amp. drop (%)", "area drop (%)", "dur. rise (%)"],
            segment_rows,
        )
    return lines


def _sensory_lines(nerves: list[NerveRecord]) -> list[str]:
    rows = []
    for n in nerves:
        s = n.summary
        site = n.sites[0] if n.sites else None
        rows.append(
            [
                f"{words(n.nerve)} {n.side}",
                number(n.temperature_c),
                "no response" if s.no_response else number(s.distal_latency_ms, 2),
                number(site.peak_latency_ms if site else None, 2),
                number(s.distal_amplitude),
                number(s.sensory_velocity_m_per_s),
            ]
        )
    return ["Sensory nerves"] + _table(
        ["nerve", "temp. (°C)", "onset latency (ms)", "peak latency (ms)", "SNAP (µV)", "CV (m/s)"], rows
    )


def visit_lines(visit: VisitRecord) -> list[str]:
    head = f"Visit {visit.visit_date.isoformat()} ({visit.status}, version {visit.version})"
    if visit.height_cm is not None:
        head += f" — height {visit.height_cm:g} cm"
    if visit.diagnosis:
        head += f" — {DIAGNOSIS_SHORT.get(visit.diagnosis, words(visit.diagnosis))}" + (
            f" ({words(visit.phenotype)})" if visit.phenotype else ""
        )
    lines = [head]
    motor = [n for n in visit.nerves if n.modality == "motor"]
    sensory = [n for n in visit.nerves if n.modality == "sensory"]
    if motor:
        lines += ["  " + line for line in _motor_lines(motor)]
    if sensory:
        lines += [""] + ["  " + line for line in _sensory_lines(sensory)]
    if not visit.nerves:
        lines.append("  (no nerve tests recorded)")
    return lines


def _scale_label(scale: str) -> str:
    """``grip strength, left hand (kPa)`` — the scale's label with its unit (``scales.csv``)."""
    from tracker.response.scales import scale_table

    info = scale_table().get(scale)
    return info.label_with_unit() if info is not None else words(scale)


def patient_lines(record: PatientRecord) -> list[str]:
    about = [x for x in (record.sex, f"born {record.birth_year}" if record.birth_year else None) if x]
    diagnosis = (
        DIAGNOSIS_SHORT.get(record.diagnosis, words(record.diagnosis))
        if record.diagnosis
        else "no diagnosis recorded"
    )
    if record.phenotype:
        diagnosis += f" ({words(record.phenotype)})"
    lines = [
        f"Patient {record.code}" + (f" — {', '.join(about)}" if about else "") + f"; diagnosis: {diagnosis}"
    ]
    if record.treatments:
        lines.append("Treatments:")
        for t in record.treatments:
            dose = f" {t.dose:g} {t.dose_unit or ''}".rstrip() if t.dose is not None else ""
            every = f" every {t.interval_days:g} days" if t.interval_days else ""
            until = t.end_date.isoformat() if t.end_date else "ongoing"
            lines.append(f"  {therapy_label(t.therapy)}{dose}{every}: {t.start_date.isoformat()} → {until}")
    lines.append(f"{len(record.visits)} visit(s)")
    for visit in record.visits:
        lines.append("")
        lines += visit_lines(visit)
        scores = [
            f"{_scale_label(scale)} {value:g}"
            for date, scale, value in record.scores
            if date == visit.visit_date
        ]
        if scores:
            lines.append("  Scores on this day: " + "; ".join(scores))
    lines += ["", CAUTION]
    return lines
