"""Conduction arithmetic for one nerve test: segments between consecutive stimulation sites.

Units: distances in mm, latencies and durations in ms, motor amplitudes in mV, sensory amplitudes in µV,
areas in mV·ms, velocities in m/s (mm / ms = m/s), changes in percent.

**Comparison rule (binary floating point).** Values are stored as binary floats, which cannot hold 4.4 or
6.6 exactly, so ``1.5 * 4.4 >= 6.6`` is ``False`` in plain Python. Every derived quantity and every
threshold is therefore rounded half-to-even to :data:`DECIMALS` (6) decimal places before any comparison,
with :func:`quantise` (one value) or :func:`quantise_array` (vectorised; gives identical results). Six
places are far finer than any recorded precision (0.01 ms, 0.1 mm, 0.1 mV) and far coarser than float noise
(about 1e-15 relative), so a value that equals a threshold in decimal arithmetic compares equal here too.
"""

from __future__ import annotations

from collections.abc import Sequence
from dataclasses import dataclass

import numpy as np

DECIMALS = 6


def quantise(value: float | None) -> float | None:
    """Round to :data:`DECIMALS` places (half to even); ``None`` stays ``None``."""
    if value is None:
        return None
    return round(float(value), DECIMALS)


def quantise_array(values: np.ndarray) -> np.ndarray:
    """Vectorised :func:`quantise`; NaN stays NaN."""
    return np.round(np.asarray(values, dtype=float), DECIMALS)


def at_least(value: float | None, threshold: float | None) -> bool | None:
    """``value ≥ threshold`` under the comparison rule; ``None`` when either side is missing."""
    if value is None or threshold is None:
        return None
    return quantise(value) >= quantise(threshold)


def at_most(value: float | None, threshold: float | None) -> bool | None:
    """``value ≤ threshold`` under the comparison rule; ``None`` when either side is missing."""
    if value is None or threshold is None:
        return None
    return quantise(value) <= quantise(threshold)


def greater_than(value: float | None, threshold: float | None) -> bool | None:
    """``value > threshold`` under the comparison rule; ``None`` when either side is missing."""
    if value is None or threshold is None:
        return None
    return quantise(value) > quantise(threshold)


def less_than(value: float | None, threshold: float | None) -> bool | None:
    """``value < threshold`` under the comparison rule; ``None`` when either side is missing."""
    if value is None or threshold is None:
        return None
    return quantise(value) < quantise(threshold)


def velocity_m_per_s(distance_mm: float | None, latency_difference_ms: float | None) -> float | None:
    """Conduction velocity in m/s from a distance (mm) and a latency difference (ms).

    ``None`` when an input is missing or the latency difference is not positive (no velocity exists).
    """
    if distance_mm is None or latency_difference_ms is None:
        return None
    difference = quantise(latency_difference_ms)
    if difference is None or difference <= 0:
        return None
    return quantise(distance_mm / difference)


def reduction_pct(distal: float | None, proximal: float | None) -> float | None:
    """Percent fall from the distal to the proximal value: ``(distal − proximal) / distal × 100``.

    Used for negative-peak amplitude and area. ``None`` when missing or the distal value is 0.
    """
    if distal is None or proximal is None or distal <= 0:
        return None
    return quantise((distal - proximal) / distal * 100.0)


def increase_pct(distal: float | None, proximal: float | None) -> float | None:
    """Percent rise from the distal to the proximal value: ``(proximal − distal) / distal × 100``.

    Used for negative-peak duration (temporal dispersion). ``None`` when missing or the distal value is 0.
    """
    if distal is None or proximal is None or distal <= 0:
        return None
    return quantise((proximal - distal) / distal * 100.0)


@dataclass(frozen=True, slots=True)
class Site:
    """One stimulation site of a nerve test, as recorded.

    ``latency_ms`` is the onset latency; ``amplitude`` is the negative-peak amplitude in mV (motor) or µV
    (sensory); ``0`` amplitude with no latency means no recordable response.
    """

    order: int
    label: str | None
    distance_mm: float
    latency_ms: float | None
    amplitude: float | None
    duration_ms: float | None = None
    area_mvms: float | None = None
    peak_latency_ms: float | None = None

    @property
    def no_response(self) -> bool:
        return self.amplitude == 0 and self.latency_ms is None


@dataclass(frozen=True, slots=True)
class Segment:
    """Derived values between two consecutive sites (``distal`` → ``proximal``)."""

    distal_order: int
    proximal_order: int
    distal_label: str | None
    proximal_label: str | None
    distance_mm: float
    velocity_m_per_s: float | None
    amplitude_reduction_pct: float | None
    area_reduction_pct: float | None
    duration_increase_pct: float | None

    @property
    def name(self) -> str:
        a = self.distal_label or f"site {self.distal_order}"
        b = self.proximal_label or f"site {self.proximal_order}"
        return f"{a} → {b}"


@dataclass(frozen=True, slots=True)
class NerveSummary:
    """Per-nerve values: distal (site 1) latency, amplitude and duration, sensory velocity, segments."""

    modality: str
    distal_latency_ms: float | None
    distal_amplitude: float | None
    distal_duration_ms: float | None
    no_response: bool
    sensory_velocity_m_per_s: float | None
    segments: tuple[Segment, ...]


def segment_between(distal: Site, proximal: Site) -> Segment:
    """Derived values between two consecutive motor stimulation sites.

    The velocity uses the distance between the sites (``proximal.distance_mm``, recorded from the previous
    site) over the onset-latency difference. Amplitude and area reductions and the duration increase
    compare the proximal response with the distal one.
    """
    difference = None
    if distal.latency_ms is not None and proximal.latency_ms is not None:
        difference = proximal.latency_ms - distal.latency_ms
    return Segment(
        distal_order=distal.order,
        proximal_order=proximal.order,
        distal_label=distal.label,
        proximal_label=proximal.label,
        distance_mm=proximal.distance_mm,
        velocity_m_per_s=velocity_m_per_s(proximal.distance_mm, difference),
        amplitude_reduction_pct=reduction_pct(distal.amplitude, proximal.amplitude),
        area_reduction_pct=reduction_pct(distal.area_mvms, proximal.area_mvms),
        duration_increase_pct=increase_pct(distal.duration_ms, proximal.duration_ms),
    )


def summarise_nerve(modality: str, sites: Sequence[Site]) -> NerveSummary:
    """Per-nerve values and segments for one nerve test (sites in any order; sorted distal first).

    Sensory: velocity = distance (stimulation to recording) / onset latency of site 1.
    """
    ordered = sorted(sites, key=lambda s: s.order)
    if not ordered:
        return NerveSummary(modality, None, None, None, False, None, ())
    first = ordered[0]
    sensory_velocity = None
    if modality == "sensory":
        sensory_velocity = velocity_m_per_s(first.distance_mm, first.latency_ms)
    segments = tuple(segment_between(a, b) for a, b in zip(ordered, ordered[1:]))
    return NerveSummary(
        modality=modality,
        distal_latency_ms=first.latency_ms,
        distal_amplitude=first.amplitude,
        distal_duration_ms=first.duration_ms,
        no_response=first.no_response,
        sensory_velocity_m_per_s=sensory_velocity,
        segments=segments if modality == "motor" else (),
    )
