"""Physical bounds for every number a trial, booking or protocol records.

A value outside these bounds cannot be real (a negative irradiance, water at 80 °C in a worm
dish), so forms refuse it with a message that names the field, the value and the allowed range,
and the database refuses it with a CheckConstraint of the same name. Protocol *limits* (what a
protocol approves) are a different, narrower thing and live on the protocol.
"""
from dataclasses import dataclass

from django.core.exceptions import ValidationError
from django.db.models import Q
from django.utils.deconstruct import deconstructible


@dataclass(frozen=True)
class Bound:
    label: str
    unit: str
    low: float
    high: float

    def text(self) -> str:
        unit = f" {self.unit}" if self.unit else ""
        return f"{self.low:g}–{self.high:g}{unit}"


# Generous on purpose: they catch typing mistakes and unit mix-ups, not unusual experiments.
BOUNDS: dict[str, Bound] = {
    # stimulus: light and UV (UV-C through near infrared)
    "wavelength_nm": Bound("Wavelength", "nm", 200, 1100),
    "irradiance_mw_cm2": Bound("Irradiance", "mW/cm²", 0, 1000),  # full sunlight is about 100 mW/cm²
    "duration_s": Bound("Duration", "s", 0, 86400),
    "dose_mj_cm2": Bound("Dose", "mJ/cm²", 0, 1e8),
    # stimulus: electrical
    "voltage_v": Bound("Voltage", "V", 0, 1000),
    "electrode_gap_cm": Bound("Electrode gap", "cm", 0.01, 100),
    "field_v_cm": Bound("Field strength", "V/cm", 0, 100000),
    "pulse_width_ms": Bound("Pulse width", "ms", 0.001, 60000),
    "pulse_count": Bound("Pulse count", "pulses", 1, 1000000),
    "pulse_frequency_hz": Bound("Pulse frequency", "Hz", 0.001, 100000),
    # stimulus: thermal and chemical
    "temp_step_c": Bound("Temperature step", "°C", -40, 40),
    "temp_rate_c_min": Bound("Temperature ramp rate", "°C/min", 0, 100),
    "concentration_um": Bound("Concentration", "µM", 0, 1e7),
    # arena
    "arena_diameter_mm": Bound("Arena diameter", "mm", 1, 1000),
    "water_volume_ml": Bound("Water volume", "mL", 0.01, 10000),
    "water_temp_c": Bound("Water temperature", "°C", 0, 45),
    "light_lux": Bound("Light level", "lx", 0, 200000),
    "acclimation_min": Bound("Acclimation", "min", 0, 1440),
    # outcomes
    "aggregate_s": Bound("Time to aggregate", "s", 0, 86400),
    "disperse_s": Bound("Time to disperse", "s", 0, 86400),
    "observation_window_s": Bound("Observation window", "s", 1, 86400),
    "largest_fraction": Bound("Largest-cluster fraction", "", 0, 1),
    # protocol limits
    "min_rest_hours": Bound("Minimum rest between exposures", "h", 0, 8760),
    "temp_step_abs_c": Bound("Temperature step (size)", "°C", 0, 40),
    "exposures": Bound("Exposures per dish", "", 1, 10000),
    # counts of animals: bookings, cohorts, trial arenas (the booking form's long-standing limit)
    "animals": Bound("Animals", "", 1, 100000),
    "mortality_24h": Bound("Dead at 24 h", "", 0, 100000),
    "replicates": Bound("Replicates", "", 1, 200),
}
MAX_CONDITIONS = 50  # conditions in one study; more is a pasted list, not a design
MAX_BOOKING_AHEAD_DAYS = 366  # book at most a year ahead: a booking holds animals back from everyone else
PROTOCOL_AHEAD_DAYS = 3653  # protocols start and expire at most ten years from today (approvals run 1-5 years)


def outside_message(key: str, value) -> str:
    b = BOUNDS[key]
    unit = f" {b.unit}" if b.unit else ""
    shown = str(value) if isinstance(value, int) else f"{value:g}"
    return f"{b.label} {shown}{unit} is not possible here: allowed range {b.text()}."


@deconstructible
class Within:
    """Field validator for BOUNDS[key]; the message names the field, the value and the range."""

    def __init__(self, key: str):
        self.key = key

    def __call__(self, value):
        if value is None:
            return
        b = BOUNDS[self.key]
        if not b.low <= value <= b.high:  # also refuses nan
            raise ValidationError(outside_message(self.key, value), code="out_of_bounds")

    def __eq__(self, other):
        return isinstance(other, Within) and other.key == self.key


def within_q(field: str, key: str | None = None) -> Q:
    """Database condition: the column is empty or inside its physical bounds."""
    b = BOUNDS[key or field]
    return Q(**{f"{field}__isnull": True}) | Q(**{f"{field}__gte": b.low, f"{field}__lte": b.high})
