"""Choices of ours where no publication decides, each a named setting with its default's origin.

Every setting that changes a result is shown in the evidence of a classification (``describe``).
"""

from __future__ import annotations

from dataclasses import asdict, dataclass, fields


@dataclass(frozen=True)
class ResponseSettings:
    """Settings of the response analysis.

    ``baseline_lookback_days``: a regimen's baseline score is the latest one on or before the regimen starts,
    at most this many days before (days).
    ``baseline_grace_days``: without such a score, the first score up to this many days after the start is
    the baseline (days).
    ``induction_merge_days``: a single course (no interval) followed within this many days by the same
    therapy is that regimen's induction (days); the regimen's baseline is then before the induction.
    ``temperature_delta_c``: a nerve change measured at limb temperatures further apart than this is less
    certain (°C).
    ``distance_delta_pct``: … or over distances differing by more than this (% of the earlier distance).
    ``filter_must_match``: … or with a different low-frequency filter setting (Hz).
    ``mixed_changes``: what a regimen is when one scale meets its worsening threshold and another its
    improvement threshold: ``worsened`` (default: a relapse must not be hidden) or ``not_assessable``.
    ``baseline_after_previous_regimen``: a baseline score must not predate the start of the regimen before
    this one (else the earlier regimen's effect would be credited to this one).
    """

    baseline_lookback_days: int = 90
    baseline_grace_days: int = 14
    induction_merge_days: int = 60
    temperature_delta_c: float = 1.0
    distance_delta_pct: float = 10.0
    filter_must_match: bool = True
    mixed_changes: str = "worsened"
    baseline_after_previous_regimen: bool = True

    def __post_init__(self) -> None:
        if self.mixed_changes not in ("worsened", "not_assessable"):
            raise ValueError("mixed_changes must be 'worsened' or 'not_assessable'")
        for name in ("baseline_lookback_days", "baseline_grace_days", "induction_merge_days"):
            if getattr(self, name) < 0:
                raise ValueError(f"{name} must be 0 or more")

    def describe(self) -> list[dict]:
        """Each setting with its value and where its default comes from (for traces and reports)."""
        defaults = ResponseSettings()
        return [
            {
                "setting": f.name,
                "value": value,
                "default": getattr(defaults, f.name),
                "origin": SETTING_ORIGINS[f.name],
            }
            for f in fields(self)
            for value in [asdict(self)[f.name]]
        ]


SETTING_ORIGINS: dict[str, str] = {
    "baseline_lookback_days": (
        "common practice, no source (a score older than about three months no longer describes the patient "
        "at the change)"
    ),
    "baseline_grace_days": (
        "common practice, no source (grip separated IVIg from placebo from day 16 in ICE, so later scores "
        "already show treatment: normatives.md §4.1)"
    ),
    "induction_merge_days": (
        "trial designs measure response to maintenance from the baseline before the induction dose (ICE, "
        "ProCID: normatives.md §4.2); the 60-day window is common practice, no source"
    ),
    "temperature_delta_c": (
        "common practice, no source (motor CV changes by about 1.5 m/s per °C: Vanggaard 1975, normatives.md "
        "§2.2)"
    ),
    "distance_delta_pct": "common practice, no source",
    "filter_must_match": (
        "common practice, no source (the low-frequency filter changes negative-peak duration and amplitude)"
    ),
    "mixed_changes": (
        "a rule of ours: no publication defines a regimen where one scale improves and another worsens"
    ),
    "baseline_after_previous_regimen": (
        "a rule of ours: trials measure from a baseline taken on the treatment being changed (normatives.md "
        "§4.2); a score from before the previous regimen describes neither"
    ),
}
