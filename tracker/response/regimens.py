"""Treatment periods → regimens.

A regimen is one therapy at one dose and interval over a period. A change of dose or interval starts a new
regimen, so a relapse after an interval was stretched belongs to the stretched regimen. Two periods of the
same therapy, dose and interval that follow each other without a gap are one regimen. A single course (no
interval) followed within ``induction_merge_days`` by the same therapy is the next regimen's induction: trial
designs measure the response to maintenance from the baseline before the induction dose (ICE, ProCID).
"""

from __future__ import annotations

import datetime as dt
from dataclasses import dataclass, field, replace

from tracker.domain.labels import treatment_words
from tracker.response.settings import ResponseSettings


@dataclass(frozen=True)
class TreatmentPeriod:
    """One stored treatment row. ``dose`` per administration in ``dose_unit``; ``interval_days`` between
    administrations (days); ``end_date`` None while ongoing."""

    therapy: str
    start_date: dt.date
    end_date: dt.date | None
    dose: float | None
    dose_unit: str | None
    interval_days: int | None


@dataclass(frozen=True)
class Regimen:
    """A regimen. ``start_date`` is the induction's start when there is one (the baseline lies before it);
    ``end_date`` is the recorded end, or the day before the same therapy changes; None while ongoing.
    Build regimens with :func:`regimens`, which also sets ``assessed_until``."""

    therapy: str
    start_date: dt.date
    end_date: dt.date | None
    dose: float | None
    dose_unit: str | None
    interval_days: int | None
    induction: TreatmentPeriod | None = None
    periods: tuple[TreatmentPeriod, ...] = field(default=())
    # Until when a change is attributed to this regimen: its end, or the day before the next
    # regimen of any therapy starts if that is earlier; a single course (no repeat interval)
    # until that next start (None: open).
    assessed_until: dt.date | None = None
    single_course: bool = False
    # The start of the regimen (any therapy) that began before this one; a baseline may not predate it.
    previous_start: dt.date | None = None

    @property
    def key(self) -> str:
        return f"{self.therapy}:{self.start_date.isoformat()}"

    @property
    def maintenance_start(self) -> dt.date:
        return self.periods[0].start_date if self.periods else self.start_date

    def label(self) -> str:
        """``ivig 1 g/kg every 21 days (after a 2 g/kg induction)`` — the words a clinician would write."""
        text = treatment_words(self.therapy, self.dose, self.dose_unit, self.interval_days)
        if self.induction is not None:
            induction_dose = treatment_words("", self.induction.dose, self.induction.dose_unit, None).strip()
            text += f" (after a {induction_dose or 'single'} induction)"
        return text

    def covers(self, day: dt.date) -> bool:
        """Whether the regimen runs on ``day``."""
        return self.start_date <= day and (self.end_date is None or day <= self.end_date)

    def attributes(self, day: dt.date) -> bool:
        """Whether a change seen on ``day`` is attributed to this regimen (see ``assessed_until``)."""
        return self.start_date <= day and (self.assessed_until is None or day <= self.assessed_until)


def _same_schedule(a: TreatmentPeriod, b: TreatmentPeriod) -> bool:
    return (a.therapy, a.dose, a.dose_unit, a.interval_days) == (
        b.therapy,
        b.dose,
        b.dose_unit,
        b.interval_days,
    )


def regimens(periods: list[TreatmentPeriod], settings: ResponseSettings | None = None) -> list[Regimen]:
    """The regimens of one patient, in order of start (then therapy)."""
    settings = settings or ResponseSettings()
    by_therapy: dict[str, list[TreatmentPeriod]] = {}
    for period in sorted(periods, key=lambda p: (p.therapy, p.start_date)):
        by_therapy.setdefault(period.therapy, []).append(period)
    out: list[Regimen] = []
    for therapy, rows in by_therapy.items():
        groups: list[list[TreatmentPeriod]] = []
        inductions: dict[int, TreatmentPeriod] = {}
        pending: TreatmentPeriod | None = None
        for period in rows:
            if pending is not None:
                gap = (period.start_date - (pending.end_date or pending.start_date)).days
                if 0 <= gap <= settings.induction_merge_days and period.interval_days is not None:
                    inductions[len(groups)] = pending
                else:
                    groups.append([pending])
                pending = None
            if _is_single_course(period):
                pending = period
                continue
            last = groups[-1][-1] if groups and len(groups) not in inductions else None
            if (
                last is not None
                and _same_schedule(last, period)
                and last.end_date is not None
                and (period.start_date - last.end_date).days <= 1
            ):
                groups[-1].append(period)
            else:
                groups.append([period])
        if pending is not None:
            groups.append([pending])
        for index, group in enumerate(groups):
            induction = inductions.get(index)
            next_start = groups[index + 1][0].start_date if index + 1 < len(groups) else None
            if index + 1 in inductions:
                next_start = inductions[index + 1].start_date
            end = group[-1].end_date
            if end is None and next_start is not None:
                end = next_start - dt.timedelta(days=1)
            first = group[0]
            out.append(
                Regimen(
                    therapy=therapy,
                    start_date=induction.start_date if induction else first.start_date,
                    end_date=end,
                    dose=first.dose,
                    dose_unit=first.dose_unit,
                    interval_days=first.interval_days,
                    induction=induction,
                    periods=tuple(group),
                )
            )
    out = sorted(out, key=lambda r: (r.start_date, r.therapy))
    finished = []
    for index, regimen in enumerate(out):
        single = (
            regimen.induction is None and len(regimen.periods) == 1 and _is_single_course(regimen.periods[0])
        )
        # A change after another regimen (of any therapy) has begun is that regimen's to explain: an open
        # regimen is followed until the next one starts (a single course, too, which has no end of effect).
        later = [r.start_date for r in out if r.start_date > regimen.start_date]
        handover = min(later) - dt.timedelta(days=1) if later else None
        until = regimen.end_date if not single else None
        if handover is not None and (until is None or handover < until):
            until = handover
        earlier = [r.start_date for r in out if r.start_date < regimen.start_date]
        finished.append(
            replace(
                regimen,
                assessed_until=until,
                single_course=single,
                previous_start=max(earlier) if earlier else None,
            )
        )
    return finished


def _is_single_course(period: TreatmentPeriod) -> bool:
    """A course without a repeat interval that ended (e.g. IVIg 2 g/kg over 5 days)."""
    return period.interval_days is None and period.end_date is not None
