"""Invented patients for benchmarks and tests: a deterministic cohort of any size, written as the
interchange CSV files (DESIGN.md §4.1–4.2) that ``ncs-tracker import`` reads.

ALL DATA PRODUCED HERE ARE INVENTED. Codes are artificial (``SYN-TARGET``, ``SYN-00001`` …); there are no
names, record numbers or birth dates, and the values describe no real person. Not for clinical use.

Deterministic: a patient's record depends only on its code (every patient has its own random generator,
started from the code), so a cohort of ``n`` patients is a prefix of a cohort of ``m > n`` patients, and the
followed patient ``SYN-TARGET`` is the same in every cohort. Only the standard library is used.

Model (plausible, not fitted to any data): every nerve test starts from healthy adult values (distal
latency, conduction velocity, amplitude, F-wave latency; the same values as the dashboard benchmark, in
the range of textbook normal limits, from memory, not verified). A severity ``s`` (0 healthy … 1 severe)
slows conduction and lowers amplitudes; its course over the visits follows the working diagnosis:

* CIDP: starts moderate to severe; on treatment (seven in ten) it improves over the first visits, then
  fluctuates, with an occasional relapse; untreated it drifts;
* GBS: severe at the first visit, then recovers towards a small residual deficit (monophasic);
* MMN: slowly progressive, with a conduction block between the distal and proximal stimulation sites of
  the arm motor nerves (amplitude falls by 40–70 %), velocities near normal;
* other: near normal values with test–retest noise.

Skin temperature is below the guideline minimum in about one test in ten.
"""

from __future__ import annotations

import csv
import datetime as dt
import random
from collections.abc import Iterator
from dataclasses import dataclass, field
from pathlib import Path

TARGET = "SYN-TARGET"
TARGET_VISITS = 30
LABEL = "invented data (tracker.synthetic): no real patient"

MEASUREMENT_HEADER = [
    "patient",
    "visit_date",
    "nerve",
    "side",
    "modality",
    "site_order",
    "site",
    "distance_mm",
    "latency_ms",
    "peak_latency_ms",
    "amplitude_mv",
    "amplitude_uv",
    "duration_ms",
    "area_mvms",
    "temperature_c",
    "lff_hz",
    "f_latency_ms",
    "f_persistence_pct",
    "recording_site",
    "height_cm",
    "sex",
    "birth_year",
    "diagnosis",
    "phenotype",
]
TREATMENT_HEADER = [
    "patient",
    "therapy",
    "start_date",
    "end_date",
    "dose",
    "dose_unit",
    "interval_days",
    "note",
]
SCORE_HEADER = ["patient", "date", "scale", "value"]
FILE_NAMES = ("measurements.csv", "treatments.csv", "scores.csv")


@dataclass(frozen=True)
class Motor:
    sites: tuple[str, ...]
    distances_mm: tuple[int, ...]  # site 1: to the recording electrode; then from the previous site
    distal_latency_ms: float  # healthy values, slowed by the patient's disease
    cv_m_s: float
    cmap_mv: float
    f_latency_ms: float
    recording_site: str
    limb: str


@dataclass(frozen=True)
class Sensory:
    site: str
    distance_mm: int
    cv_m_s: float
    snap_uv: float
    recording_site: str
    limb: str


MOTOR = {
    "median": Motor(("wrist", "elbow"), (70, 230), 3.6, 56, 8.5, 27, "abductor_pollicis_brevis", "arm"),
    "ulnar": Motor(
        ("wrist", "below_elbow", "above_elbow"),
        (70, 210, 100),
        2.9,
        58,
        9.0,
        28,
        "abductor_digiti_minimi",
        "arm",
    ),
    "fibular": Motor(
        ("ankle", "below_fibular_head", "popliteal_fossa"),
        (90, 320, 100),
        4.8,
        47,
        5.5,
        48,
        "extensor_digitorum_brevis",
        "leg",
    ),
    "tibial": Motor(("ankle", "popliteal_fossa"), (90, 400), 4.5, 46, 11.0, 49, "abductor_hallucis", "leg"),
}
SENSORY = {
    "median": Sensory("wrist", 130, 55, 30, "digit_2", "arm"),
    "ulnar": Sensory("wrist", 110, 55, 25, "digit_5", "arm"),
    "sural": Sensory("calf", 140, 48, 16, "posterior_ankle", "leg"),
}
NERVE_TESTS_PER_VISIT = len(MOTOR) + len(SENSORY)
SITES_PER_VISIT = sum(len(m.sites) for m in MOTOR.values()) + len(SENSORY)


@dataclass
class SyntheticPatient:
    """One invented patient: identity-free attributes, visits as (date, severity), treatments, scores."""

    code: str
    sex: str
    birth_year: int
    height_cm: int
    diagnosis: str
    phenotype: str
    visits: list[tuple[dt.date, float]] = field(default_factory=list)
    treatments: list[list[object]] = field(default_factory=list)
    scores: list[list[object]] = field(default_factory=list)


def _rng(code: str, purpose: str) -> random.Random:
    """The generator of one patient and purpose (started from text: the same in every run and process)."""
    return random.Random(f"ncs-tracker synthetic v1 {code} {purpose}")


def _limb_temperature(limb: str, rng: random.Random) -> float:
    """Skin temperature, °C: about one test in ten below the guideline minimum (arm 33 °C, leg 30 °C)."""
    minimum = 33.0 if limb == "arm" else 30.0
    if rng.random() < 0.1:
        return rng.uniform(minimum - 1.5, minimum - 0.1)
    return rng.uniform(minimum, minimum + 2.5)


def _score_rows(code: str, date: dt.date, severity: float, rng: random.Random) -> list[list[object]]:
    """INCAT (arm and leg grades adding up to the total) and the MRC sum score, worse with severity."""
    incat = min(10, round(1 + 6 * severity))
    arm = min(5, round(3 * severity), incat)
    day = date.isoformat()
    return [
        [code, day, "incat", incat],
        [code, day, "incat_arm", arm],
        [code, day, "incat_leg", incat - arm],
        [code, day, "mrc_sum", max(0, min(60, round(58 - 24 * severity + rng.uniform(-2, 2))))],
    ]


def measurement_rows(patient: SyntheticPatient) -> list[list[object]]:
    """Every stimulation-site row of the patient's visits (the columns of :data:`MEASUREMENT_HEADER`)."""
    rng = _rng(patient.code, "values")
    common = [patient.height_cm, patient.sex, patient.birth_year, patient.diagnosis, patient.phenotype]
    rows: list[list[object]] = []
    for date, severity in patient.visits:
        day = date.isoformat()
        block = patient.diagnosis == "mmn" and severity > 0.25
        for nerve, m in MOTOR.items():
            demyelination = severity if patient.diagnosis in ("cidp", "gbs") else 0.15 * severity
            slow = max(0.4, (1 - 0.6 * demyelination) * rng.uniform(0.9, 1.05))  # fraction of healthy CV
            latency = m.distal_latency_ms / slow
            amplitude = m.cmap_mv * rng.uniform(0.6, 1.1) * (1 - 0.5 * severity)
            duration = 5.5 / slow
            temperature = _limb_temperature(m.limb, rng)
            f_latency = m.f_latency_ms / slow * rng.uniform(0.97, 1.04)
            persistence = rng.randint(20, 100)
            for order, (label, distance) in enumerate(zip(m.sites, m.distances_mm)):
                if order:
                    latency += distance / (m.cv_m_s * slow * rng.uniform(0.92, 1.08))
                    amplitude *= rng.uniform(0.55 if severity > 0.6 else 0.8, 0.98)
                    duration *= rng.uniform(1.0, 1.35)
                    if block and m.limb == "arm" and order == 1:
                        amplitude *= rng.uniform(0.3, 0.6)  # the block between the first two sites
                rows.append(
                    [
                        patient.code,
                        day,
                        nerve,
                        "right",
                        "motor",
                        order + 1,
                        label,
                        distance,
                        f"{latency:.2f}",
                        "",
                        f"{amplitude:.1f}",
                        "",
                        f"{duration:.1f}",
                        f"{amplitude * duration * 0.45:.1f}",
                        f"{temperature:.1f}",
                        2,
                        f"{f_latency:.1f}",
                        persistence,
                        m.recording_site,
                        *common,
                    ]
                )
        for nerve, s in SENSORY.items():
            demyelination = severity if patient.diagnosis in ("cidp", "gbs") else 0.1 * severity
            slow = (1 - 0.4 * demyelination) * rng.uniform(0.9, 1.05)
            latency = s.distance_mm / (s.cv_m_s * slow)
            snap = s.snap_uv * rng.uniform(0.5, 1.2) * (1 - 0.7 * severity)
            rows.append(
                [
                    patient.code,
                    day,
                    nerve,
                    "right",
                    "sensory",
                    1,
                    s.site,
                    s.distance_mm,
                    f"{latency:.2f}",
                    f"{latency + rng.uniform(0.6, 0.9):.2f}",
                    "",
                    f"{snap:.1f}",
                    "",
                    "",
                    f"{_limb_temperature(s.limb, rng):.1f}",
                    20,
                    "",
                    "",
                    s.recording_site,
                    *common,
                ]
            )
    return rows


def followed_patient() -> SyntheticPatient:
    """The followed patient: 30 visits about every 3 months from 2017 on IVIG, a relapse while the interval
    is stretched and recovery when it is restored; the same in every cohort."""
    rng = _rng(TARGET, "course")
    patient = SyntheticPatient(TARGET, "female", 1962, 166, "cidp", "typical")
    date = dt.date(2017, 1, 16)
    for visit in range(TARGET_VISITS):
        course = 0.85 - 0.45 * min(visit, 8) / 8  # improves under treatment …
        if 16 <= visit <= 20:
            course += 0.08 * (visit - 15)  # … relapses while the interval is extended …
        if visit > 20:
            course += 0.4 - 0.06 * (visit - 20)  # … and recovers when it is restored
        severity = min(1.0, max(0.15, course + rng.uniform(-0.05, 0.05)))
        patient.visits.append((date, severity))
        patient.scores += _score_rows(TARGET, date, severity, rng)
        date += dt.timedelta(days=91 + rng.randint(-7, 7))
    first = patient.visits[0][0]
    relapse, restored = patient.visits[15][0], patient.visits[21][0]
    day = dt.timedelta(days=1)
    patient.treatments = [
        [TARGET, "ivig", first + 6 * day, first + 10 * day, 2, "g/kg", "", "loading course over 5 days"],
        [TARGET, "ivig", first + 31 * day, relapse - day, 1, "g/kg", 21, "maintenance"],
        [TARGET, "ivig", relapse, restored - day, 1, "g/kg", 35, "interval extended (spacing trial)"],
        [TARGET, "ivig", restored, "", 1, "g/kg", 21, "interval restored after relapse"],
    ]
    return patient


def _course(diagnosis: str, visits: int, treated: bool, rng: random.Random) -> list[float]:
    """Severity at each visit (0 healthy … 1 severe) for the working diagnosis."""
    clamp = lambda value: min(1.0, max(0.0, value))  # noqa: E731
    if diagnosis == "gbs":
        start, residual = rng.uniform(0.6, 1.0), rng.uniform(0.05, 0.3)
        return [
            clamp(residual + (start - residual) * 0.45**k + rng.uniform(-0.04, 0.04)) for k in range(visits)
        ]
    if diagnosis == "mmn":
        start = rng.uniform(0.3, 0.7)
        return [clamp(start + 0.03 * k + rng.uniform(-0.05, 0.05)) for k in range(visits)]
    if diagnosis == "other":
        level = rng.uniform(0.0, 0.3)
        return [clamp(level + rng.uniform(-0.05, 0.05)) for _ in range(visits)]
    severity, course = rng.uniform(0.3, 1.0), []
    for k in range(visits):
        course.append(severity)
        if treated and k < 3:
            severity -= rng.uniform(0.05, 0.2)  # responds to treatment …
        elif rng.random() < 0.1:
            severity += rng.uniform(0.1, 0.25)  # … an occasional relapse …
        else:
            severity += rng.uniform(-0.08, 0.06)  # … otherwise fluctuates
        severity = clamp(severity)
    return course


def cohort_patient(number: int) -> SyntheticPatient:
    """Cohort patient ``number`` (1, 2, …): 3–8 visits 3–10 months apart between 2014 and 2025."""
    code = f"SYN-{number:05d}"
    rng = _rng(code, "course")
    diagnosis = rng.choices(["cidp", "mmn", "gbs", "other"], weights=[70, 10, 10, 10])[0]
    phenotype = rng.choice(["typical", "typical", "distal", "multifocal"]) if diagnosis == "cidp" else ""
    patient = SyntheticPatient(
        code,
        rng.choice(["female", "male"]),
        rng.randint(1940, 1995),
        rng.randint(150, 195),
        diagnosis,
        phenotype,
    )
    treated = diagnosis in ("cidp", "mmn") and rng.random() < 0.7
    date = dt.date(2014, 1, 1) + dt.timedelta(days=rng.randint(0, 6 * 365))
    for severity in _course(diagnosis, rng.randint(3, 8), treated, rng):
        patient.visits.append((date, severity))
        if rng.random() < 0.5:
            patient.scores += _score_rows(code, date, severity, rng)
        date += dt.timedelta(days=rng.randint(90, 300))
    if treated:
        start = patient.visits[0][0] + dt.timedelta(days=rng.randint(3, 20))
        patient.treatments.append(
            [code, "ivig", start, "", rng.choice([1, 2]), "g/kg", rng.choice([21, 28, 35]), ""]
        )
    return patient


def cohort(count: int) -> Iterator[SyntheticPatient]:
    """``count`` patients: the followed patient first, then cohort patients 1 … ``count`` − 1."""
    if count >= 1:
        yield followed_patient()
    for number in range(1, count):
        yield cohort_patient(number)


def write_csv_files(folder: Path, patients: list[SyntheticPatient]) -> list[Path]:
    """Write measurements.csv, treatments.csv and scores.csv of ``patients`` into ``folder`` (a file only
    when it has rows); return the paths written."""
    tables = [
        (MEASUREMENT_HEADER, (row for p in patients for row in measurement_rows(p))),
        (TREATMENT_HEADER, (row for p in patients for row in p.treatments)),
        (SCORE_HEADER, (row for p in patients for row in p.scores)),
    ]
    written = []
    for name, (header, rows) in zip(FILE_NAMES, tables):
        path = folder / name
        count = 0
        with open(path, "w", encoding="utf-8", newline="") as handle:
            writer = csv.writer(handle)
            writer.writerow(header)
            for row in rows:
                writer.writerow(row)
                count += 1
        if count:
            written.append(path)
        else:
            path.unlink()
    return written
