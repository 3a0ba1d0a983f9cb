"""Derived stimulus values (pure Python, no Django).

Units are in the names. The conversions are unit arithmetic, not published models:
- light dose (radiant exposure): irradiance mW/cm² × duration s = mJ/cm² (1 W·s = 1 J);
- field strength between parallel electrodes: voltage V / electrode gap cm = V/cm (uniform-field
  approximation; real arenas have fringing fields near the edges);
- pulse train: on-time = pulse count × pulse width; train length = pulse count / frequency.
"""
from __future__ import annotations

from dataclasses import dataclass


def light_dose_mj_cm2(irradiance_mw_cm2: float | None, duration_s: float | None) -> float | None:
    if irradiance_mw_cm2 is None or duration_s is None:
        return None
    return irradiance_mw_cm2 * duration_s


def field_strength_v_cm(voltage_v: float | None, electrode_gap_cm: float | None) -> float | None:
    if voltage_v is None or not electrode_gap_cm:
        return None
    return voltage_v / electrode_gap_cm


@dataclass(frozen=True)
class PulseTrain:
    on_s: float | None  # total time the stimulus is on
    train_s: float | None  # from the first pulse's start to the end of the last period
    duty_cycle: float | None  # on-time per period, 0-1


def pulse_train(pulse_width_ms: float | None, pulse_count: int | None,
                pulse_frequency_hz: float | None) -> PulseTrain:
    """Totals of a regular pulse train. Raises ValueError when pulses would overlap (duty > 1)."""
    on_s = pulse_width_ms * pulse_count / 1000 if pulse_width_ms is not None and pulse_count else None
    if not pulse_frequency_hz or not pulse_count:
        return PulseTrain(on_s, None, None)
    train_s = pulse_count / pulse_frequency_hz
    duty = pulse_width_ms / 1000 * pulse_frequency_hz if pulse_width_ms is not None else None
    if duty is not None and duty > 1 + 1e-9:
        raise ValueError(
            f"Pulse width {pulse_width_ms:g} ms is longer than the period at {pulse_frequency_hz:g} Hz "
            f"({1000 / pulse_frequency_hz:g} ms): pulses would overlap."
        )
    return PulseTrain(on_s, train_s, duty)
