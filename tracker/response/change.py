"""Changes that count.

Scores: each visit's value against the regimen baseline, the previous score and the best earlier score,
judged against the scale's minimal important change (MIC) with the source's comparator.

Nerve conduction: each parameter per nerve (and segment) against an earlier visit, judged against the
smallest detectable change (SDC) of :mod:`.reproducibility`; a change measured at limb temperatures, filter
settings or distances too far apart is marked less certain (:class:`ResponseSettings`).

Comparisons use the project's rounding rule (:func:`tracker.domain.conduction.quantise`), so a change of
exactly the threshold meets ``≥`` and not ``>``.
"""

from __future__ import annotations

import datetime as dt

import numpy as np
import pandas as pd

from tracker.domain.conduction import quantise, quantise_array
from tracker.response.regimens import Regimen
from tracker.response.reproducibility import Detectable
from tracker.response.scales import ScaleInfo
from tracker.response.settings import ResponseSettings

SCORE_CHANGE_COLUMNS = [
    "date",
    "scale",
    "value",
    "reference",
    "reference_date",
    "reference_value",
    "change",
    "change_pct",
    "verdict",
    "threshold",
]
NERVE_VALUE_COLUMNS = [
    "visit_key",
    "nerve",
    "side",
    "modality",
    "parameter",
    "where",
    "value",
    "absent",
    "temperature_c",
    "lff_hz",
    "distance_mm",
]
NERVE_CHANGE_COLUMNS = [
    "nerve",
    "side",
    "modality",
    "parameter",
    "where",
    "reference",
    "reference_date",
    "reference_value",
    "value",
    "change",
    "change_pct",
    "verdict",
    "sdc",
    "less_certain",
    "absent",
    "reference_absent",
]

# Parameters whose value depends on a measured distance (a latency over a distance, a velocity).
DISTANCE_PARAMETERS = ("distal_latency", "segment_velocity", "sensory_velocity")
# Verdict words (identifiers; labels for people live in tracker.domain.labels).
IMPROVED, WORSENED, WITHIN, NO_THRESHOLD, NOT_COMPARABLE = (
    "improved",
    "worsened",
    "within_noise",
    "no_threshold",
    "not_comparable",
)


def meets(change: float, threshold: float, comparator: str) -> bool:
    """``|change| comparator threshold`` after rounding both (``>=`` or ``>``)."""
    size, limit = quantise(abs(change)), quantise(threshold)
    return size >= limit if comparator == ">=" else size > limit


def judge(
    change: float | None,
    change_pct: float | None,
    higher_is_better: bool,
    threshold: float | None,
    comparator: str,
    kind: str,
) -> str:
    """``improved`` / ``worsened`` when the change meets the threshold in that direction, else
    ``within_noise``; ``no_threshold`` without a threshold; ``not_comparable`` without a change."""
    size = change_pct if kind == "percent" else change
    if size is None or (isinstance(size, float) and np.isnan(size)):
        return NOT_COMPARABLE
    if threshold is None:
        return NO_THRESHOLD
    if not meets(size, threshold, comparator):
        return WITHIN
    return IMPROVED if (size > 0) == higher_is_better else WORSENED


def _pct(value: float, reference: float) -> float | None:
    return None if reference == 0 else (value - reference) / abs(reference) * 100.0


def baseline(
    series: list[tuple[dt.date, float]], regimen: Regimen, settings: ResponseSettings
) -> tuple[dt.date, float] | None:
    """The regimen's baseline in one scale's ``series`` ((day, value) sorted by day): the latest value on or
    before the start within the look-back, else the first within the grace days after the start."""
    start = regimen.start_date
    earliest = start - dt.timedelta(days=settings.baseline_lookback_days)
    if settings.baseline_after_previous_regimen and regimen.previous_start is not None:
        # A score from before the previous regimen began describes neither regimen.
        earliest = max(earliest, regimen.previous_start)
    before = [point for point in series if earliest <= point[0] <= start]
    if before:
        return before[-1]
    latest = start + dt.timedelta(days=settings.baseline_grace_days)
    if regimen.end_date is not None:
        latest = min(latest, regimen.end_date)
    after = [point for point in series if start < point[0] <= latest]
    return after[0] if after else None


def score_changes(
    scores: pd.DataFrame,
    scales: dict[str, ScaleInfo],
    regimen_of: dict[dt.date, Regimen | None],
    settings: ResponseSettings,
) -> pd.DataFrame:
    """Per scored day and scale: the change since the regimen baseline, the previous score
    and the best earlier score, each with its verdict against the scale's MIC. ``regimen_of``
    maps a day to the regimen then running."""
    rows: list[dict] = []
    for scale, series in scores.sort_values("date", kind="stable").groupby("scale", sort=True):
        info = scales.get(scale)
        if info is None:
            continue
        series = series.reset_index(drop=True)
        points = list(zip(series["date"], series["value"].astype(float)))
        for position, row in series.iterrows():
            day, value = row["date"], float(row["value"])
            references: list[tuple[str, dt.date, float]] = []
            regimen = regimen_of.get(day)
            if regimen is not None:
                base = baseline(points, regimen, settings)
                if base is not None and base[0] < day:
                    references.append(("regimen_baseline", *base))
            if position > 0:
                previous = series.iloc[position - 1]
                references.append(("previous", previous["date"], float(previous["value"])))
                earlier = series.iloc[:position]
                best_index = earlier["value"].idxmax() if info.higher_is_better else earlier["value"].idxmin()
                references.append(
                    ("best", earlier.loc[best_index, "date"], float(earlier.loc[best_index, "value"]))
                )
            for kind, ref_date, ref_value in references:
                change = value - ref_value
                pct = _pct(value, ref_value)
                verdict = judge(
                    change, pct, info.higher_is_better, info.mic, info.mic_comparator or ">=", info.mic_kind
                )
                rows.append(
                    {
                        "date": day,
                        "scale": scale,
                        "value": value,
                        "reference": kind,
                        "reference_date": ref_date,
                        "reference_value": ref_value,
                        "change": quantise(change),
                        "change_pct": None if pct is None else quantise(pct),
                        "verdict": verdict,
                        "threshold": info.mic_words(),
                    }
                )
    return pd.DataFrame(rows, columns=SCORE_CHANGE_COLUMNS)


def nerve_values(nerves: pd.DataFrame, paths: pd.DataFrame, sites: pd.DataFrame) -> pd.DataFrame:
    """The compared parameters of every nerve test in long form (:data:`NERVE_VALUE_COLUMNS`).

    ``nerves``/``paths``: the criteria engine's feature tables (:func:`tracker.criteria.features.build`), so a
    value here is the one the criteria judged; ``sites``: the stimulation sites (``test_key``, ``site_order``,
    ``label``, ``distance_mm``, ``amplitude``). Amplitudes in mV (motor) or µV (sensory), latencies in ms,
    velocities in m/s, block in % of the distal amplitude.
    """
    if nerves.empty:
        return pd.DataFrame(columns=NERVE_VALUE_COLUMNS)
    ordered = sites.sort_values(["test_key", "site_order"], kind="stable")
    first = ordered.drop_duplicates("test_key", keep="first").set_index("test_key")
    last = ordered.drop_duplicates("test_key", keep="last").set_index("test_key")
    context = nerves.set_index("test_key")[
        ["visit_key", "nerve", "side", "modality", "temperature_c", "lff_hz"]
    ]
    parts: list[pd.DataFrame] = []

    def part(keys, parameter, where, values, distance=np.nan, absent=False):
        frame = context.loc[keys].reset_index(drop=True)
        frame["parameter"] = parameter
        frame["where"] = list(where) if not isinstance(where, str) else where
        frame["value"] = np.asarray(values, dtype=float)
        frame["absent"] = absent if isinstance(absent, bool) else np.asarray(absent, dtype=bool)
        frame["distance_mm"] = np.asarray(distance, dtype=float) if not np.isscalar(distance) else distance
        parts.append(frame)

    motor = nerves[nerves["modality"] == "motor"]
    keys = motor["test_key"].to_numpy()
    distal_site = first.reindex(keys)
    part(keys, "distal_cmap_amplitude", distal_site["label"].fillna(""), motor["distal_amplitude"])
    part(
        keys,
        "distal_latency",
        distal_site["label"].fillna(""),
        motor["distal_latency_ms"],
        distal_site["distance_mm"].to_numpy(),
    )
    proximal = last.reindex(keys)
    has_proximal = (proximal["site_order"] > 1).to_numpy()
    part(
        keys[has_proximal],
        "proximal_cmap_amplitude",
        proximal["label"][has_proximal].fillna(""),
        proximal["amplitude"][has_proximal],
    )
    part(keys, "f_latency", "", motor["f_latency_ms"], absent=motor["f_absent"].to_numpy(dtype=bool))
    if not paths.empty:
        seg = paths[paths["segment_velocity"].notna()]
        part(
            seg["test_key"].to_numpy(),
            "segment_velocity",
            seg["segment"],
            seg["segment_velocity"],
            seg["distance_mm"].to_numpy(),
        )
        block = paths[paths["amplitude_reduction_pct"].notna()]
        part(block["test_key"].to_numpy(), "block_pct", block["path"], block["amplitude_reduction_pct"])
    sensory = nerves[nerves["modality"] == "sensory"]
    skeys = sensory["test_key"].to_numpy()
    ssite = first.reindex(skeys)
    part(skeys, "snap_amplitude", ssite["label"].fillna(""), sensory["distal_amplitude"])
    part(
        skeys,
        "sensory_velocity",
        ssite["label"].fillna(""),
        sensory["sensory_cv"],
        ssite["distance_mm"].to_numpy(),
    )
    out = pd.concat(parts, ignore_index=True)
    out = out[out["value"].notna() | out["absent"]]
    return out[NERVE_VALUE_COLUMNS].reset_index(drop=True)


def nerve_changes(
    values: pd.DataFrame,
    current: int,
    reference: int,
    reference_kind: str,
    reference_date: dt.date,
    table: dict[str, Detectable],
    settings: ResponseSettings,
) -> pd.DataFrame:
    """Each parameter of visit ``current`` against visit ``reference`` (visit keys in ``values``)."""
    pairs = pd.DataFrame(
        {
            "visit_key": [current],
            "reference_key": [reference],
            "reference": [reference_kind],
            "reference_date": [reference_date],
        }
    )
    return nerve_changes_many(values, pairs, table, settings).drop(columns=["visit_key"])


def nerve_changes_many(
    values: pd.DataFrame, pairs: pd.DataFrame, table: dict[str, Detectable], settings: ResponseSettings
) -> pd.DataFrame:
    """Vectorised :func:`nerve_changes` over many (visit, earlier visit) ``pairs`` (columns ``visit_key``,
    ``reference_key``, ``reference``, ``reference_date``): one row per parameter found at both visits, with
    ``visit_key`` first."""
    key = ["nerve", "side", "modality", "parameter", "where"]
    columns = ["visit_key", *NERVE_CHANGE_COLUMNS]
    now = values[values["visit_key"].isin(pairs["visit_key"])].merge(pairs, on="visit_key")
    then = values[values["visit_key"].isin(pairs["reference_key"])][
        ["visit_key", *key, "value", "absent", "temperature_c", "lff_hz", "distance_mm"]
    ]
    then = then.rename(
        columns={
            "visit_key": "reference_key",
            "value": "value_ref",
            "absent": "absent_ref",
            "temperature_c": "temperature_c_ref",
            "lff_hz": "lff_hz_ref",
            "distance_mm": "distance_mm_ref",
        }
    )
    m = now.merge(then, on=["reference_key", *key], how="inner")
    if m.empty:
        return pd.DataFrame(columns=columns)
    value = m["value"].to_numpy(dtype=float)
    ref = m["value_ref"].to_numpy(dtype=float)
    absent = m["absent"].to_numpy(dtype=bool)
    absent_ref = m["absent_ref"].to_numpy(dtype=bool)
    either = absent | absent_ref
    delta = np.where(either, np.nan, value - ref)
    with np.errstate(invalid="ignore", divide="ignore"):
        pct = np.where(either | (ref == 0), np.nan, delta / np.abs(ref) * 100.0)
    parameter = m["parameter"].to_numpy(dtype=object)
    known = {p: d for p, d in table.items()}
    sdc = np.array(
        [known[p].sdc if p in known and known[p].sdc is not None else np.nan for p in parameter], dtype=float
    )
    percent = np.array(
        [known[p].change_kind == "percent" if p in known else True for p in parameter], dtype=bool
    )
    better_high = np.array([known[p].higher_is_better if p in known else True for p in parameter], dtype=bool)
    size = np.where(percent, pct, delta)
    with np.errstate(invalid="ignore"):
        beyond = quantise_array(np.abs(size)) >= quantise_array(sdc)
    verdict = np.where(np.isnan(size), NOT_COMPARABLE, np.where(np.isnan(sdc), NO_THRESHOLD, WITHIN)).astype(
        object
    )
    verdict[beyond & ((size > 0) == better_high)] = IMPROVED
    verdict[beyond & ((size > 0) != better_high)] = WORSENED
    # An absence is a finding: present → absent is worse, absent → present better, absent at both not
    # comparable (the value columns are then empty and ``absent``/``reference_absent`` say why).
    verdict[absent & ~absent_ref] = WORSENED
    verdict[~absent & absent_ref] = IMPROVED
    verdict[absent & absent_ref] = NOT_COMPARABLE
    t, t_ref = m["temperature_c"].to_numpy(dtype=float), m["temperature_c_ref"].to_numpy(dtype=float)
    f, f_ref = m["lff_hz"].to_numpy(dtype=float), m["lff_hz_ref"].to_numpy(dtype=float)
    d, d_ref = m["distance_mm"].to_numpy(dtype=float), m["distance_mm_ref"].to_numpy(dtype=float)
    with np.errstate(invalid="ignore", divide="ignore"):
        # Not recorded at either visit: the condition cannot be checked, so the change is less certain too.
        unknown_t = np.isnan(t) | np.isnan(t_ref)
        warm = (quantise_array(np.abs(t - t_ref)) > quantise(settings.temperature_delta_c)) | unknown_t
        filt = (
            (np.isnan(f) != np.isnan(f_ref)) | (~np.isnan(f) & ~np.isnan(f_ref) & (f != f_ref))
            if settings.filter_must_match
            else np.zeros(len(m), bool)
        )
        distance_used = np.isin(parameter, list(DISTANCE_PARAMETERS))
        unknown_d = distance_used & (np.isnan(d) | np.isnan(d_ref))
        far = ((d_ref > 0) & (np.abs(d - d_ref) / d_ref * 100.0 > settings.distance_delta_pct)) | unknown_d
    doubt = np.full(len(m), "", dtype=object)
    for i in np.flatnonzero((warm | filt | far) & ~either):
        reasons = []
        if warm[i] and unknown_t[i]:
            reasons.append(f"limb temperature not recorded ({_celsius(t_ref[i])} → {_celsius(t[i])})")
        elif warm[i]:
            reasons.append(
                f"limb temperature {t_ref[i]:g} → {t[i]:g} °C (more than {settings.temperature_delta_c:g} °C "
                "apart)"
            )
        if filt[i]:
            reasons.append(f"low-frequency filter {_hz(f_ref[i])} → {_hz(f[i])}")
        if far[i] and unknown_d[i]:
            reasons.append("distance not recorded at both visits")
        elif far[i]:
            reasons.append(
                f"distance {d_ref[i]:g} → {d[i]:g} mm (more than {settings.distance_delta_pct:g} % apart)"
            )
        doubt[i] = "; ".join(reasons)
    out = pd.DataFrame(
        {
            "visit_key": m["visit_key"].to_numpy(),
            "nerve": m["nerve"].to_numpy(dtype=object),
            "side": m["side"].to_numpy(dtype=object),
            "modality": m["modality"].to_numpy(dtype=object),
            "parameter": parameter,
            "where": m["where"].to_numpy(dtype=object),
            "reference": m["reference"].to_numpy(dtype=object),
            "reference_date": m["reference_date"].to_numpy(dtype=object),
            "reference_value": np.where(absent_ref, np.nan, ref),
            "value": np.where(absent, np.nan, value),
            "change": quantise_array(delta),
            "change_pct": quantise_array(pct),
            "verdict": verdict,
            "sdc": sdc,
            "less_certain": doubt,
            "absent": absent,
            "reference_absent": absent_ref,
        }
    )
    return out.sort_values(
        ["visit_key", "nerve", "side", "modality", "parameter", "where"], kind="stable"
    ).reset_index(drop=True)[columns]


def _celsius(value: float) -> str:
    return "not recorded" if value != value else f"{value:g} °C"


def _hz(value: float) -> str:
    return "not recorded" if value != value else f"{value:g} Hz"


def nerve_summary(changes: pd.DataFrame) -> list[dict]:
    """Summary measures across nerves: mean % change of proximally (and distally) evoked CMAP amplitude —
    the NCS measure whose change correlated with adjusted-INCAT change in the ICE trial (Bril V et al. Muscle
    Nerve 2010, citation from memory; normatives.md §3.2) — and counts of changes beyond the SDC."""
    out: list[dict] = []
    for reference, part in changes.groupby("reference", sort=False):
        for parameter in ("proximal_cmap_amplitude", "distal_cmap_amplitude"):
            values = part[(part["parameter"] == parameter) & part["change_pct"].notna()]["change_pct"].astype(
                float
            )
            if len(values):
                out.append(
                    {
                        "reference": reference,
                        "measure": f"mean_change_pct_{parameter}",
                        "value": quantise(float(values.mean())),
                        "nerves": int(len(values)),
                    }
                )
        out.append(
            {
                "reference": reference,
                "measure": "changes_beyond_sdc_worse",
                "value": int((part["verdict"] == WORSENED).sum()),
                "nerves": int(len(part)),
            }
        )
        out.append(
            {
                "reference": reference,
                "measure": "changes_beyond_sdc_better",
                "value": int((part["verdict"] == IMPROVED).sum()),
                "nerves": int(len(part)),
            }
        )
    return out
