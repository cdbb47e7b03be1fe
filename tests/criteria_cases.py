"""Builders of engine inputs for criteria tests: one invented visit from a few readable numbers.

Invented values for testing only. Limits default to the shipped set (Preston & Shapiro appendix values).
"""

from __future__ import annotations

import itertools
from dataclasses import dataclass, field

import pandas as pd

from tracker.criteria import engine, limits
from tracker.criteria.model import Settings

_keys = itertools.count(1)

DEFAULT_SITES = {
    "median": ("wrist", "elbow"),
    "ulnar": ("wrist", "below_elbow", "above_elbow"),
    "fibular": ("ankle", "below_fibular_head", "popliteal_fossa"),
    "tibial": ("ankle", "popliteal_fossa"),
    "radial": ("forearm", "elbow"),
}


@dataclass
class Motor:
    """One motor nerve test. ``amplitudes``/``durations``/``areas``/``latencies`` are per site, distal first.

    ``cv`` (m/s) sets the latency of site 2 from site 1 over ``segment_mm`` when ``latencies`` is not given.
    """

    nerve: str
    side: str = "right"
    dml: float | None = 3.5
    cv: float | None = 55.0
    amplitudes: tuple[float | None, ...] = (8.0, 7.5)
    durations: tuple[float | None, ...] = (5.5, 6.0)
    areas: tuple[float | None, ...] | None = None
    latencies: tuple[float | None, ...] | None = None
    labels: tuple[str | None, ...] | None = None
    segment_mm: float = 250.0
    f_latency: float | None = 28.0
    f_absent: bool = False
    temperature: float | None = 33.5
    lff: float | None = 2.0
    wrist_entrapment: bool | None = None


@dataclass
class Sensory:
    nerve: str
    side: str = "right"
    amplitude: float | None = 30.0
    cv: float | None = 55.0
    distance_mm: float = 130.0
    peak_latency: float | None = None
    temperature: float | None = 33.5
    wrist_entrapment: bool | None = None


@dataclass
class Visit:
    nerves: list = field(default_factory=list)
    patient: str = "T-1"
    visit_date: str = "2024-01-10"
    age_years: float | None = 55
    height_cm: float | None = 170
    sex: str | None = "female"
    phenotype: str | None = "typical"


def frames(visits: list[Visit]) -> tuple[pd.DataFrame, pd.DataFrame, pd.DataFrame]:
    """(visits, tests, sites) frames as the service layer builds them."""
    visit_rows, test_rows, site_rows = [], [], []
    for visit in visits:
        visit_key = next(_keys)
        visit_rows.append(
            dict(
                visit_key=visit_key,
                patient=visit.patient,
                visit_date=pd.Timestamp(visit.visit_date).date(),
                age_years=visit.age_years,
                height_cm=visit.height_cm,
                sex=visit.sex,
                phenotype=visit.phenotype,
            )
        )
        for nerve in visit.nerves:
            test_key = next(_keys)
            if isinstance(nerve, Motor):
                test_rows.append(
                    dict(
                        visit_key=visit_key,
                        test_key=test_key,
                        nerve=nerve.nerve,
                        side=nerve.side,
                        modality="motor",
                        temperature_c=nerve.temperature,
                        lff_hz=nerve.lff,
                        f_latency_ms=None if nerve.f_absent else nerve.f_latency,
                        f_absent=nerve.f_absent,
                        wrist_entrapment=nerve.wrist_entrapment,
                    )
                )
                n = len(nerve.amplitudes)
                labels = nerve.labels or DEFAULT_SITES.get(nerve.nerve, tuple(None for _ in range(n)))
                latencies = list(nerve.latencies) if nerve.latencies else [nerve.dml]
                if not nerve.latencies:
                    for _ in range(1, n):
                        previous = latencies[-1]
                        latencies.append(
                            None
                            if previous is None or nerve.cv is None
                            else round(previous + nerve.segment_mm / nerve.cv, 6)
                        )
                areas = nerve.areas or tuple(None if a is None else a * 2.5 for a in nerve.amplitudes)
                for order in range(n):
                    site_rows.append(
                        dict(
                            test_key=test_key,
                            site_order=order + 1,
                            label=labels[order] if order < len(labels) else None,
                            distance_mm=70.0 if order == 0 else nerve.segment_mm,
                            latency_ms=latencies[order],
                            peak_latency_ms=None,
                            amplitude=nerve.amplitudes[order],
                            duration_ms=nerve.durations[order] if order < len(nerve.durations) else None,
                            area_mvms=areas[order],
                        )
                    )
            else:
                test_rows.append(
                    dict(
                        visit_key=visit_key,
                        test_key=test_key,
                        nerve=nerve.nerve,
                        side=nerve.side,
                        modality="sensory",
                        temperature_c=nerve.temperature,
                        lff_hz=20.0,
                        f_latency_ms=None,
                        f_absent=False,
                        wrist_entrapment=nerve.wrist_entrapment,
                    )
                )
                latency = (
                    None
                    if nerve.cv is None or nerve.amplitude == 0
                    else round(nerve.distance_mm / nerve.cv, 6)
                )
                site_rows.append(
                    dict(
                        test_key=test_key,
                        site_order=1,
                        label=None,
                        distance_mm=nerve.distance_mm,
                        latency_ms=latency,
                        peak_latency_ms=nerve.peak_latency,
                        amplitude=nerve.amplitude,
                        duration_ms=None,
                        area_mvms=None,
                    )
                )
    tests = pd.DataFrame(test_rows)
    for column in ("temperature_c", "lff_hz", "f_latency_ms"):
        tests[column] = tests[column].astype(float)
    sites = pd.DataFrame(site_rows)
    for column in ("distance_mm", "latency_ms", "peak_latency_ms", "amplitude", "duration_ms", "area_mvms"):
        sites[column] = sites[column].astype(float)
    return pd.DataFrame(visit_rows), tests, sites


def evaluate(
    visits: list[Visit],
    criteria: str,
    settings: Settings | None = None,
    limit_rows: pd.DataFrame | None = None,
):
    """Run one criteria set; return its SetResult."""
    v, t, s = frames(visits)
    return engine.evaluate(
        v, t, s, limit_rows if limit_rows is not None else limits.default_limits(), [criteria], settings
    )[criteria]


def finding(result, nerve: str, item: str, side: str = "right") -> pd.Series:
    rows = result.findings[
        (result.findings["nerve"] == nerve)
        & (result.findings["item"] == item)
        & (result.findings["side"] == side)
    ]
    assert len(rows) == 1, rows
    return rows.iloc[0]


def outcome(result, key: str = "outcome"):
    assert len(result.outcomes) == 1
    return result.outcomes.iloc[0][key]


def healthy_four_nerves() -> list:
    """A normal right-sided four-nerve motor study (invented), well inside the default limits."""
    return [
        Motor("median"),
        Motor("ulnar", amplitudes=(9.0, 8.6, 8.4), durations=(5.5, 5.8, 6.0), dml=2.8),
        Motor("fibular", amplitudes=(5.0, 4.6, 4.5), durations=(5.5, 6.0, 6.1), dml=4.5, cv=48, f_latency=48),
        Motor(
            "tibial",
            amplitudes=(10.0, 8.5),
            durations=(5.5, 6.5),
            dml=4.5,
            cv=46,
            f_latency=50,
            segment_mm=400,
        ),
    ]


def inexcitable(nerve: str, side: str = "right") -> Motor:
    """A motor nerve with no recordable response at any stimulation site (invented): amplitude 0, no latency,
    no duration, F-waves absent — what the importer stores as "no response"."""
    n = len(DEFAULT_SITES.get(nerve, (None, None)))
    return Motor(
        nerve,
        side=side,
        dml=None,
        cv=None,
        amplitudes=(0.0,) * n,
        durations=(None,) * n,
        f_latency=None,
        f_absent=True,
    )


def exact_velocity(cv: float, dml: float = 3.5, sites: int = 2) -> dict:
    """Motor keyword arguments giving conduction velocity ``cv`` exactly on every segment (5 ms per segment,
    distance cv × 5 mm), so a value placed on a threshold compares equal to it."""
    return dict(dml=dml, latencies=tuple(dml + 5.0 * i for i in range(sites)), segment_mm=cv * 5.0)
