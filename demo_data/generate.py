#!/usr/bin/env python3
"""Write the demonstration data set of ncs-tracker.

ALL DATA PRODUCED BY THIS SCRIPT ARE INVENTED FOR DEMONSTRATION. The clinic ("Demo Neuromuscular
Clinic"), the patients (DEMO-01 ... DEMO-06), their studies, treatments and scores do not describe
any real person. Do not use them for clinical decisions or research.

The script is deterministic: it uses only the standard library and one fixed random generator
(``random.Random(20261201)``), so every run writes byte-identical files.

Output (next to this file):
    measurements.csv  one row per stimulation site of every nerve test
    treatments.csv    one row per treatment period
    scores.csv        one row per clinical score (INCAT with its arm and leg grades, I-RODS, MRC sum, grip)

Usage:  python demo_data/generate.py

Model in short: every nerve test has "healthy" values for the patient (around published adult
normal limits, Preston & Shapiro, Electromyography and Neuromuscular Disorders, appendix). A
severity s (0 = healthy, 1 = the disease profile's full picture) moves conduction velocity,
distal latency, F-wave latency, amplitudes and durations towards the profile's targets, which
are expressed as fractions of the normal limits. Small random test-retest noise, the effect of
limb temperature, conduction block (MMN) and a wrist entrapment are added on top.
"""

from __future__ import annotations

import csv
import random
from pathlib import Path

HERE = Path(__file__).resolve().parent

# The fixed random generator: one instance, consumed in a fixed order.
rng = random.Random(20261201)

MEASUREMENT_COLUMNS = [
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
    "wrist_entrapment",
]
TREATMENT_COLUMNS = [
    "patient",
    "therapy",
    "start_date",
    "end_date",
    "dose",
    "dose_unit",
    "interval_days",
    "note",
]
SCORE_COLUMNS = ["patient", "date", "scale", "value"]
PATIENT_COLUMNS = ["patient", "onset_date"]
# Invented symptom-onset dates (no names, record numbers or birth dates: the demo clinic has no identities).
# DEMO-05 is studied on days 7, 30 and 90 from onset; the others began months before their first study.
ONSETS = (
    ("DEMO-01", "2022-09-10"),
    ("DEMO-02", "2023-01-20"),
    ("DEMO-03", "2021-11-15"),
    ("DEMO-04", "2022-05-01"),
    ("DEMO-05", "2025-08-25"),
    ("DEMO-06", "2023-06-01"),
)

# --------------------------------------------------------------------------------------------
# Nerve templates (healthy adult of 170 cm). Limits: lln_* lower limit, uln_* upper limit.
# sites: (label, distance_mm) - site 1 distance to the active recording electrode, later sites
# the distance from the previous site. seg_drop / seg_dur: healthy amplitude fall and duration
# rise from the previous site.
# --------------------------------------------------------------------------------------------
MOTOR = {
    "median": dict(
        limb="upper",
        recording="abductor_pollicis_brevis",
        sites=[("wrist", 70), ("elbow", 235)],
        seg_drop=[0.05],
        seg_dur=[0.04],
        amp=8.5,
        cv=56.0,
        dl=3.5,
        f=27.0,
        dur=5.2,
        lln_amp=4.0,
        lln_cv=49.0,
        uln_dl=4.4,
        uln_f=31.0,
    ),
    "ulnar": dict(
        limb="upper",
        recording="abductor_digiti_minimi",
        sites=[("wrist", 70), ("below_elbow", 215), ("above_elbow", 100)],
        seg_drop=[0.04, 0.03],
        seg_dur=[0.03, 0.02],
        amp=10.0,
        cv=59.0,
        dl=2.7,
        f=27.5,
        dur=5.8,
        lln_amp=6.0,
        lln_cv=49.0,
        uln_dl=3.3,
        uln_f=32.0,
    ),
    "fibular": dict(
        limb="lower",
        recording="extensor_digitorum_brevis",
        sites=[("ankle", 90), ("below_fibular_head", 320), ("popliteal_fossa", 90)],
        seg_drop=[0.10, 0.03],
        seg_dur=[0.06, 0.02],
        amp=5.5,
        cv=48.5,
        dl=4.7,
        f=46.5,
        dur=5.6,
        lln_amp=2.0,
        lln_cv=44.0,
        uln_dl=6.5,
        uln_f=56.0,
    ),
    "tibial": dict(
        limb="lower",
        recording="abductor_hallucis",
        sites=[("ankle", 90), ("popliteal_fossa", 400)],
        seg_drop=[0.18],
        seg_dur=[0.09],
        amp=11.0,
        cv=47.0,
        dl=4.3,
        f=47.5,
        dur=5.9,
        lln_amp=4.0,
        lln_cv=41.0,
        uln_dl=5.8,
        uln_f=56.0,
    ),
}
SENSORY = {
    "median": dict(
        limb="upper",
        recording="digit_2",
        site="wrist",
        dist=130,
        amp=38.0,
        cv=57.0,
        peak_gap=0.65,
        lln_amp=20.0,
        lln_cv=50.0,
    ),
    "ulnar": dict(
        limb="upper",
        recording="digit_5",
        site="wrist",
        dist=110,
        amp=30.0,
        cv=56.0,
        peak_gap=0.60,
        lln_amp=17.0,
        lln_cv=50.0,
    ),
    "sural": dict(
        limb="lower",
        recording="posterior_ankle",
        site="calf",
        dist=140,
        amp=17.0,
        cv=47.0,
        peak_gap=0.75,
        lln_amp=6.0,
        lln_cv=40.0,
    ),
}

# Disease profiles: where a nerve ends up at severity 1.
#   cv_frac  conduction velocity as a fraction of the lower limit of normal
#   dl_frac  distal motor latency as a fraction of the upper limit of normal
#   f_frac   minimal F latency as a fraction of the upper limit of normal
#   amp_loss distal CMAP amplitude loss; dur_distal distal CMAP duration increase
#   disp     extra proximal duration increase over the whole nerve (temporal dispersion)
#   prox_drop extra proximal amplitude fall over the whole nerve
PROFILES = {
    "cidp": dict(
        cv_frac=0.62,
        dl_frac=1.65,
        f_frac=1.42,
        amp_loss=0.45,
        dur_distal=0.45,
        disp=0.55,
        prox_drop=0.28,
        sens_amp_loss=0.70,
        sens_cv_loss=0.30,
        persist_loss=0.55,
    ),
    "gbs": dict(
        cv_frac=0.78,
        dl_frac=1.50,
        f_frac=1.35,
        amp_loss=0.55,
        dur_distal=0.50,
        disp=0.45,
        prox_drop=0.35,
        sens_amp_loss=0.60,
        sens_cv_loss=0.20,
        persist_loss=0.65,
    ),
    # MMN: motor only, mild slowing at most; the conduction block is added per visit.
    "mmn": dict(
        cv_frac=0.85,
        dl_frac=1.10,
        f_frac=1.10,
        amp_loss=0.30,
        dur_distal=0.10,
        disp=0.10,
        prox_drop=0.0,
        sens_amp_loss=0.0,
        sens_cv_loss=0.0,
        persist_loss=1.50,
    ),
}

HAND_REF_C = 33.0  # temperature at which the templates apply
FOOT_REF_C = 31.5

STANDARD_TESTS = [
    ("median", "right", "motor"),
    ("ulnar", "right", "motor"),
    ("fibular", "right", "motor"),
    ("tibial", "right", "motor"),
    ("median", "right", "sensory"),
    ("ulnar", "right", "sensory"),
    ("sural", "right", "sensory"),
]

# --------------------------------------------------------------------------------------------
# The invented patients. s: visit severity; weights: per nerve multiplier of s; axonal: fixed
# extra distal amplitude loss. Per-visit options: absent (sensory tests without response),
# f_absent (motor tests without F-waves), test_s (severity of one test), block (conduction block:
# test -> (site index, fraction)), cold_foot (temperature of lower-limb tests), cts (wrist
# entrapment of the median nerve).
# --------------------------------------------------------------------------------------------
PATIENTS = [
    dict(
        code="DEMO-01",
        sex="female",
        birth_year=1961,
        height=164,
        diagnosis="cidp",
        tests=STANDARD_TESTS,
        weights={"median": 1.0, "ulnar": 0.95, "fibular": 1.05, "tibial": 1.0, "sural": 1.0},
        axonal={"fibular": 0.25, "tibial": 0.15},
        visits=[
            dict(date="2023-02-14", s=1.00, absent={("sural", "right")}, f_absent={("fibular", "right")}),
            dict(date="2023-05-16", s=0.78),
            dict(date="2023-10-10", s=0.55),
            dict(date="2024-04-09", s=0.38),
            dict(date="2025-03-18", s=0.27),
        ],
    ),
    dict(
        code="DEMO-02",
        sex="male",
        birth_year=1954,
        height=178,
        diagnosis="cidp",
        tests=STANDARD_TESTS,
        weights={"median": 1.0, "ulnar": 1.0, "fibular": 1.0, "tibial": 0.95, "sural": 0.9},
        axonal={"fibular": 0.15, "tibial": 0.10},
        visits=[
            dict(date="2023-06-06", s=0.92, absent={("median", "right")}),
            dict(date="2023-09-12", s=0.62),
            dict(date="2024-01-16", s=0.42),
            dict(date="2024-07-09", s=0.80),  # relapse on the 35-day interval
            dict(date="2024-11-19", s=0.46),
            dict(date="2025-06-10", s=0.38),
        ],
    ),
    dict(
        code="DEMO-03",
        sex="female",
        birth_year=1970,
        height=168,
        diagnosis="cidp",
        tests=STANDARD_TESTS,
        weights={"median": 1.0, "ulnar": 0.9, "fibular": 1.0, "tibial": 1.0, "sural": 1.0},
        axonal={"fibular": 0.10},
        visits=[
            dict(date=d, s=0.40)
            for d in ("2023-03-21", "2023-11-07", "2024-06-18", "2025-02-11", "2025-10-14", "2026-06-23")
        ],
    ),
    dict(
        code="DEMO-04",
        sex="male",
        birth_year=1979,
        height=181,
        diagnosis="mmn",
        tests=[
            ("median", "left", "motor"),
            ("ulnar", "left", "motor"),
            ("ulnar", "right", "motor"),
            ("fibular", "right", "motor"),
            ("median", "left", "sensory"),
            ("ulnar", "left", "sensory"),
            ("ulnar", "right", "sensory"),
            ("sural", "right", "sensory"),
        ],
        weights={},
        axonal={"ulnar_left": 0.15},
        visits=[
            dict(
                date="2024-02-20",
                s=0.0,
                test_s={("ulnar", "left", "motor"): 0.35},
                block={("ulnar", "left"): (1, 0.66)},
            ),
            dict(
                date="2024-05-28",
                s=0.0,
                test_s={("ulnar", "left", "motor"): 0.30},
                block={("ulnar", "left"): (1, 0.56)},
            ),
            dict(
                date="2024-11-26",
                s=0.0,
                test_s={("ulnar", "left", "motor"): 0.25},
                block={("ulnar", "left"): (1, 0.47)},
            ),
            dict(
                date="2025-06-03",
                s=0.0,
                test_s={("ulnar", "left", "motor"): 0.25},
                block={("ulnar", "left"): (1, 0.44)},
            ),
        ],
    ),
    dict(
        code="DEMO-05",
        sex="female",
        birth_year=1988,
        height=170,
        diagnosis="gbs",
        tests=STANDARD_TESTS,
        weights={"median": 1.0, "ulnar": 0.9, "fibular": 1.05, "tibial": 1.0, "sural": 1.0},
        axonal={},
        visits=[
            dict(
                date="2025-09-01",
                s=0.85,
                absent={("sural", "right")},
                f_absent={("fibular", "right"), ("tibial", "right")},
            ),  # day 7 from onset
            dict(
                date="2025-09-24",
                s=0.68,  # day 30
                test_s={("sural", "right", "sensory"): 1.1},
            ),
            dict(date="2025-11-23", s=0.25),  # day 90
        ],
    ),
    dict(
        code="DEMO-06",
        sex="male",
        birth_year=1966,
        height=175,
        diagnosis="cidp",
        tests=STANDARD_TESTS,
        weights={"median": 1.0, "ulnar": 0.95, "fibular": 1.0, "tibial": 1.05, "sural": 1.0},
        axonal={"fibular": 0.10},
        visits=[
            dict(date="2023-09-05", s=0.90, absent={("sural", "right")}),
            dict(date="2023-12-12", s=0.62, test_s={("sural", "right", "sensory"): 0.95}),
            dict(date="2024-04-23", s=0.45, cold_foot=28.5),
            dict(date="2024-10-15", s=0.30),
            dict(date="2025-09-30", s=0.22, cts=True),
        ],
    ),
]

TREATMENTS = [
    # patient, therapy, start, end, dose, unit, interval_days, note
    ("DEMO-01", "ivig", "2023-02-20", "2023-02-24", "2", "g/kg", "", "loading course over 5 days"),
    ("DEMO-01", "ivig", "2023-03-17", "", "1", "g/kg", "21", "maintenance"),
    ("DEMO-02", "ivig", "2023-06-12", "2023-06-16", "2", "g/kg", "", "loading course over 5 days"),
    ("DEMO-02", "ivig", "2023-07-07", "2024-02-01", "1", "g/kg", "21", "maintenance"),
    (
        "DEMO-02",
        "ivig",
        "2024-02-02",
        "2024-07-14",
        "1",
        "g/kg",
        "35",
        "interval extended to 35 days (spacing trial)",
    ),
    ("DEMO-02", "ivig", "2024-07-15", "", "1", "g/kg", "21", "interval restored to 21 days after relapse"),
    ("DEMO-03", "ivig", "2022-04-05", "2023-01-10", "1", "g/kg", "28", "maintenance before change of route"),
    ("DEMO-03", "scig", "2023-01-11", "", "0.4", "g/kg", "7", "weekly home infusions"),
    ("DEMO-04", "ivig", "2024-02-26", "2024-03-01", "2", "g/kg", "", "loading course over 5 days"),
    ("DEMO-04", "ivig", "2024-03-25", "", "1", "g/kg", "28", "maintenance"),
    (
        "DEMO-05",
        "ivig",
        "2025-09-01",
        "2025-09-05",
        "2",
        "g/kg",
        "",
        "single course: 0.4 g/kg/day for 5 days",
    ),
    ("DEMO-06", "corticosteroid", "2023-09-11", "2023-11-05", "60", "mg", "1", "oral prednisolone daily"),
    ("DEMO-06", "corticosteroid", "2023-11-06", "2024-01-07", "40", "mg", "1", "taper"),
    ("DEMO-06", "corticosteroid", "2024-01-08", "2024-04-28", "20", "mg", "1", "taper"),
    ("DEMO-06", "corticosteroid", "2024-04-29", "2024-10-27", "10", "mg", "1", "taper"),
    ("DEMO-06", "corticosteroid", "2024-10-28", "2025-03-30", "5", "mg", "1", "taper then stopped"),
]

# date -> (incat, INCAT arm grade, INCAT leg grade, i_rods centile, mrc_sum, grip left kPa, grip right kPa);
# None = not recorded. The typed INCAT total always equals arm + leg when both grades are recorded
# (checked in score_rows), so the tool never finds a typed total that disagrees with its grades.
# The adjusted INCAT (leg + max(arm - 1, 0)) is not written: the tool computes it from the grades.
# Invented stories (see README.md): DEMO-01 improves; DEMO-02 improves, then worsens on the 35-day
# interval (adjusted INCAT 2 -> 3; its arm grade also goes 0 -> 1 on 2024-05-21, which the adjusted
# INCAT does not count) and improves again on 21 days; DEMO-03 is stable on SCIG (scored at the last
# IVIg infusion of 2023-01-09 so that the SCIG regimen has a baseline); DEMO-05's grades were not
# recorded in the first week, so its IVIg course cannot be assessed; DEMO-06 is scored during the last
# prednisolone step (2025-02-18) so that the end of the taper can be judged.
SCORES = {
    "DEMO-01": [
        ("2023-02-14", 5, 2, 3, 31, 44, 34, 38),
        ("2023-03-17", None, None, None, None, None, 41, 45),
        ("2023-05-16", 4, 2, 2, 45, 49, 48, 53),
        ("2023-10-10", 3, 1, 2, 58, 53, 58, 63),
        ("2024-04-09", 2, 1, 1, 66, 55, 63, 68),
        ("2025-03-18", 2, 1, 1, 70, 56, 66, 71),
    ],
    "DEMO-02": [
        ("2023-06-06", 4, 1, 3, 38, 47, 56, 60),
        ("2023-09-12", 3, 1, 2, 55, 52, 78, 82),
        ("2024-01-16", 2, 0, 2, 64, 55, 90, 95),
        ("2024-05-21", 3, 1, 2, 52, None, None, None),
        ("2024-07-09", 4, 1, 3, 41, 49, 62, 66),
        ("2024-11-19", 2, 0, 2, 62, 55, 88, 90),
        ("2025-06-10", 2, 0, 2, 66, 56, 93, 96),
    ],
    "DEMO-03": [
        ("2023-01-09", 2, 1, 1, 67, 56, 69, 73),
        ("2023-03-21", 2, 1, 1, 68, 56, 70, 73),
        ("2023-11-07", 2, 1, 1, 66, 55, 68, 72),
        ("2024-06-18", 2, 1, 1, 69, 56, 71, 74),
        ("2025-02-11", 1, 0, 1, 70, 56, 69, 75),
        ("2025-10-14", 2, 1, 1, 67, 56, 70, 72),
        ("2026-06-23", 2, 1, 1, 68, 55, 68, 73),
    ],
    "DEMO-04": [
        ("2024-02-20", 2, 2, 0, 72, 53, 46, 112),
        ("2024-05-28", 1, 1, 0, 80, 55, 60, 115),
        ("2024-11-26", 1, 1, 0, 83, 56, 68, 114),
        ("2025-06-03", 1, 1, 0, 84, 56, 70, 116),
    ],
    "DEMO-05": [
        ("2025-09-01", 7, None, None, 10, 38, 22, 25),
        ("2025-09-08", None, None, None, None, 40, None, None),
        ("2025-09-24", 5, 2, 3, 28, 46, 40, 44),
        ("2025-11-23", 2, 1, 1, 64, 56, 70, 74),
    ],
    "DEMO-06": [
        ("2023-09-05", 4, 1, 3, 40, 48, 66, 70),
        ("2023-12-12", 3, 1, 2, 55, 53, 86, 90),
        ("2024-04-23", 2, 1, 1, 63, 55, 98, 102),
        ("2024-10-15", 1, 0, 1, 72, 57, 106, 110),
        ("2025-02-18", 1, 0, 1, 73, 58, 107, 111),
        ("2025-09-30", 1, 0, 1, 74, 58, 108, 112),
    ],
}


# --------------------------------------------------------------------------------------------
def noise(sd: float) -> float:
    """Relative test-retest noise, bounded to +/- 2.5 standard deviations."""
    return max(-2.5 * sd, min(2.5 * sd, rng.gauss(0.0, sd)))


def lerp(healthy: float, target: float, s: float) -> float:
    return healthy + s * (target - healthy)


def temp_delta(limb: str, temperature: float) -> float:
    """Degrees below the template temperature (negative when warmer)."""
    return (HAND_REF_C if limb == "upper" else FOOT_REF_C) - temperature


def f2(x: float) -> str:
    return f"{x:.2f}"


def f1(x: float) -> str:
    return f"{x:.1f}"


class PatientModel:
    """Fixed per-patient characteristics (drawn once from the fixed random generator)."""

    def __init__(self, spec: dict):
        self.spec = spec
        self.profile = PROFILES[spec["diagnosis"]]
        h = spec["height"]
        age = 2024 - spec["birth_year"]
        self.age_amp = 1.0 - max(0, age - 40) * 0.005
        self.fixed: dict[tuple, dict] = {}
        for nerve, side, modality in spec["tests"]:
            key = (nerve, side, modality)
            if modality == "motor":
                t = MOTOR[nerve]
                dists = [t["sites"][0][1]]
                for _, d in t["sites"][1:]:
                    dists.append(int(round(d * h / 170.0 / 5.0) * 5 + rng.randint(-5, 5)))
                self.fixed[key] = dict(
                    dists=dists,
                    amp=1.0 + noise(0.08),
                    cv=1.0 + noise(0.03),
                    dl=1.0 + noise(0.04),
                    dur=1.0 + noise(0.04),
                    seg_cv=[1.0] + [1.0 + noise(0.025) for _ in t["sites"][1:]],
                    persist=rng.randint(80, 100),
                )
            else:
                self.fixed[key] = dict(amp=1.0 + noise(0.10), cv=1.0 + noise(0.03))

    def severity(self, visit: dict, key: tuple) -> float:
        if key in visit.get("test_s", {}):
            return visit["test_s"][key]
        return visit["s"] * self.spec["weights"].get(key[0], 1.0)

    def axonal(self, nerve: str, side: str) -> float:
        ax = self.spec["axonal"]
        return ax.get(f"{nerve}_{side}", ax.get(nerve, 0.0))


def motor_rows(pm: PatientModel, visit: dict, nerve: str, side: str, temperature: float) -> list[dict]:
    t, p = MOTOR[nerve], pm.profile
    fx = pm.fixed[(nerve, side, "motor")]
    s = pm.severity(visit, (nerve, side, "motor"))
    dT = temp_delta(t["limb"], temperature)
    cold_slow = 1.0 - 0.03 * dT  # slower conduction when cold
    cold_long = 1.0 + 0.03 * dT  # longer latencies when cold
    cold_big = 1.0 + 0.02 * dT  # larger, broader responses when cold

    dists = [fx["dists"][0]] + [d + rng.randint(-2, 2) for d in fx["dists"][1:]]
    cv_healthy = t["cv"] * fx["cv"]
    cv = lerp(cv_healthy, p["cv_frac"] * t["lln_cv"], s) * cold_slow
    dl_healthy = t["dl"] * fx["dl"]
    dl = lerp(dl_healthy, p["dl_frac"] * t["uln_dl"], s) * cold_long * (1.0 + noise(0.03))
    if nerve == "median" and visit.get("cts"):
        dl *= 1.25
    f_healthy = t["f"] * pm.spec["height"] / 170.0 * fx["cv"] ** -1
    f_lat = lerp(f_healthy, p["f_frac"] * t["uln_f"], s) * (1.0 + 0.02 * dT) * (1.0 + noise(0.015))
    f_absent = (nerve, side) in visit.get("f_absent", set())
    persist = max(5, min(100, round(fx["persist"] * (1.0 - s * p["persist_loss"]) + rng.randint(-5, 5))))

    amp = (
        t["amp"]
        * fx["amp"]
        * pm.age_amp
        * (1.0 - s * p["amp_loss"])
        * (1.0 - pm.axonal(nerve, side))
        * cold_big
        * (1.0 + noise(0.06))
    )
    dur = t["dur"] * fx["dur"] * (1.0 + s * p["dur_distal"]) * cold_big * (1.0 + noise(0.03))
    area = amp * dur * 0.55

    block = visit.get("block", {}).get((nerve, side))
    prox_total = sum(dists[1:]) or 1
    lat, amps, durs, areas, lats = dl, [amp], [dur], [area], [dl]
    for k in range(1, len(dists)):
        frac = dists[k] / prox_total
        seg_cv = cv * fx["seg_cv"][k] * (1.0 + noise(0.02))
        lat = lat + dists[k] / seg_cv
        if block and block[0] == k:
            a = amps[-1] * (1.0 - block[1]) * (1.0 + noise(0.02))
            d = durs[-1] * (1.0 + rng.uniform(0.10, 0.18))
        else:
            a = amps[-1] * (1.0 - t["seg_drop"][k - 1] - s * p["prox_drop"] * frac) * (1.0 + noise(0.02))
            d = durs[-1] * (1.0 + t["seg_dur"][k - 1] + s * p["disp"] * frac) * (1.0 + noise(0.02))
        # Dispersion cancels part of the area; a block removes it with the amplitude.
        ar = a * d * 0.55 / (1.0 + 0.4 * (d / durs[0] - 1.0))
        lats.append(lat)
        amps.append(a)
        durs.append(d)
        areas.append(ar)

    rows = []
    for k, (label, _) in enumerate(t["sites"]):
        rows.append(
            dict(
                nerve=nerve,
                side=side,
                modality="motor",
                site_order=k + 1,
                site=label,
                distance_mm=dists[k],
                latency_ms=f2(lats[k]),
                peak_latency_ms="",
                amplitude_mv=f1(amps[k]),
                amplitude_uv="",
                duration_ms=f1(durs[k]),
                area_mvms=f1(areas[k]),
                temperature_c=f1(temperature),
                lff_hz=2,
                f_latency_ms="absent" if f_absent else f1(f_lat),
                f_persistence_pct=0 if f_absent else persist,
                recording_site=t["recording"],
            )
        )
    return rows


def sensory_rows(pm: PatientModel, visit: dict, nerve: str, side: str, temperature: float) -> list[dict]:
    t, p = SENSORY[nerve], pm.profile
    fx = pm.fixed[(nerve, side, "sensory")]
    s = pm.severity(visit, (nerve, side, "sensory"))
    dT = temp_delta(t["limb"], temperature)
    row = dict(
        nerve=nerve,
        side=side,
        modality="sensory",
        site_order=1,
        site=t["site"],
        distance_mm=t["dist"],
        amplitude_mv="",
        duration_ms="",
        area_mvms="",
        temperature_c=f1(temperature),
        lff_hz=20,
        f_latency_ms="",
        f_persistence_pct="",
        recording_site=t["recording"],
    )
    if (nerve, side) in visit.get("absent", set()):
        row.update(latency_ms="", peak_latency_ms="", amplitude_uv="0")
        return [row]
    cv = t["cv"] * fx["cv"] * (1.0 - s * p["sens_cv_loss"]) * (1.0 - 0.03 * dT) * (1.0 + noise(0.02))
    onset = t["dist"] / cv
    amp = (
        t["amp"]
        * fx["amp"]
        * pm.age_amp
        * (1.0 - s * p["sens_amp_loss"])
        * (1.0 + 0.02 * dT)
        * (1.0 + noise(0.08))
    )
    gap = t["peak_gap"] * (1.0 + 0.6 * s) * (1.0 + noise(0.04))
    if nerve == "median" and visit.get("cts"):
        onset += 0.9
        amp *= 0.65
        gap *= 1.15
    row.update(latency_ms=f2(onset), peak_latency_ms=f2(onset + gap), amplitude_uv=f1(amp))
    return [row]


def measurement_rows() -> list[dict]:
    out = []
    for spec in PATIENTS:
        pm = PatientModel(spec)
        for visit in spec["visits"]:
            hand = round(rng.uniform(32.2, 34.4), 1)
            foot = round(rng.uniform(30.6, 32.6), 1)
            visit_common = dict(
                patient=spec["code"],
                visit_date=visit["date"],
                height_cm=spec["height"],
                sex=spec["sex"],
                birth_year=spec["birth_year"],
                diagnosis=spec["diagnosis"],
                phenotype="typical" if spec["diagnosis"] == "cidp" else "",
            )
            for nerve, side, modality in spec["tests"]:
                table = MOTOR if modality == "motor" else SENSORY
                if table[nerve]["limb"] == "upper":
                    temperature = hand + round(rng.uniform(-0.2, 0.2), 1)
                else:
                    temperature = visit.get("cold_foot") or foot + round(rng.uniform(-0.2, 0.2), 1)
                make = motor_rows if modality == "motor" else sensory_rows
                for row in make(pm, visit, nerve, side, temperature):
                    row.update(visit_common)
                    if nerve == "median" and spec["diagnosis"] == "cidp":
                        row["wrist_entrapment"] = "yes" if visit.get("cts") else "no"
                    else:
                        row["wrist_entrapment"] = ""
                    out.append(row)
    return out


def score_rows() -> list[dict]:
    scales = ("incat", "incat_arm", "incat_leg", "i_rods", "mrc_sum", "grip_kpa_left", "grip_kpa_right")
    out = []
    for patient, entries in SCORES.items():
        for date, *values in entries:
            incat, arm, leg = values[:3]
            if arm is not None and leg is not None:
                assert incat == arm + leg, f"{patient} {date}: INCAT {incat} is not arm {arm} + leg {leg}"
            for scale, value in zip(scales, values):
                if value is not None:
                    out.append(dict(patient=patient, date=date, scale=scale, value=value))
    return out


def write_csv(name: str, columns: list[str], rows: list[dict]) -> None:
    with open(HERE / name, "w", newline="", encoding="utf-8") as fh:
        writer = csv.DictWriter(fh, fieldnames=columns, lineterminator="\n")
        writer.writeheader()
        for row in rows:
            writer.writerow({c: row.get(c, "") for c in columns})


def main() -> None:
    measurements = measurement_rows()
    treatments = [dict(zip(TREATMENT_COLUMNS, t)) for t in TREATMENTS]
    scores = score_rows()
    write_csv("measurements.csv", MEASUREMENT_COLUMNS, measurements)
    write_csv("treatments.csv", TREATMENT_COLUMNS, treatments)
    write_csv("scores.csv", SCORE_COLUMNS, scores)
    write_csv("patients.csv", PATIENT_COLUMNS, [dict(zip(PATIENT_COLUMNS, p)) for p in ONSETS])
    print(
        f"invented demo data written to {HERE}: {len(measurements)} measurement rows, "
        f"{len(treatments)} treatment rows, {len(scores)} score rows, {len(ONSETS)} patient rows"
    )


if __name__ == "__main__":
    main()
