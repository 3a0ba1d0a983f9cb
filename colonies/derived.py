"""Values derived from a check's raw readings with published methods (see colonies/chemistry.py).

Like the measured parameters, each derived value is one entry in a registry that the round, the
tank page, the CSV export and care targets read. A derived value is None when an input is missing
or lies outside the method's validity range: no extrapolated number is shown as if it were real.

Barometric pressure is not recorded per check; oxygen saturation assumes standard pressure
(101.325 kPa). At 600 m altitude that overstates % saturation by about 7 % of the value.

One check (`derive`, for pages, flags and rules) or a few thousand at once (`derive_arrays`, for
exports) run the same compute functions and chemistry formulas, so both give the same bits.
"""
from collections.abc import Callable, Mapping, Sequence
from dataclasses import dataclass

import numpy as np

from . import chemistry, parameters

Readings = dict[str, float | None]
# What a compute function reads: one check's readings as floats, or arrays of many checks' readings
# (NaN where a reading is missing; every chemistry function refuses NaN).
Inputs = Mapping[str, float | np.ndarray]
INPUTS = ("temp_c", "ph", "do_mg_l", "tan_mg_l", "conductivity_us_cm", "salinity")  # every reading a compute reads
NAN = float("nan")


@dataclass(frozen=True)
class DerivedValue:
    key: str
    label: str
    short: str
    unit: str
    decimals: int
    method: str
    compute: Callable[[Inputs, bool | np.ndarray], float | np.ndarray]  # (inputs, marine)
    habitats: tuple[str, ...] = parameters.BOTH
    # Physical bounds of the derived value, inclusive: a care target outside them is refused.
    minimum: float = 0.0
    maximum: float = float("inf")

    @property
    def label_with_unit(self) -> str:
        return f"{self.label} ({self.unit})"

    def bounds_text(self) -> str:
        return f"{self.minimum:g} to {self.maximum:g} {self.unit}"

    def format(self, value: float | None) -> str:
        return "" if value is None else f"{value:.{self.decimals}f}"

    def applies_to(self, habitat: str) -> bool:
        return habitat in self.habitats


def _nh3(r: Inputs, marine):
    return chemistry.unionized_ammonia_mg_l(r["tan_mg_l"], r["ph"], r["temp_c"])


def _do_pct(r: Inputs, marine):
    # A marine tank's own salinity reading (missing: no value); fresh water holds no salt.
    salinity = np.where(marine, r["salinity"], 0.0) if isinstance(marine, np.ndarray) else (
        r["salinity"] if marine else 0.0)
    return chemistry.oxygen_percent_saturation(r["do_mg_l"], r["temp_c"], salinity)


def _cond25(r: Inputs, marine):
    return chemistry.specific_conductance_25(r["conductivity_us_cm"], r["temp_c"])


def _salinity_from_cond(r: Inputs, marine):
    return chemistry.practical_salinity(r["conductivity_us_cm"] / 1000.0, r["temp_c"])


DERIVED: tuple[DerivedValue, ...] = (
    DerivedValue("nh3_mg_l", "Un-ionized ammonia", "NH3", "mg/L NH3-N", 4,
                 "Emerson et al. 1975 pKa from pH and temperature, times total ammonia-N", _nh3,
                 maximum=100.0),  # never more than the total ammonia-N, whose bound is 100 mg/L
    DerivedValue("do_pct_sat", "Oxygen saturation", "DO %", "% air sat.", 0,
                 "Benson & Krause 1984 solubility (USGS tables) at standard pressure; salinity from the reading "
                 "for marine tanks", _do_pct,
                 # Pure oxygen at 1 atm holds 100/20.95 ≈ 480 % of the air-saturated concentration
                 # (Henry's law, O2 mole fraction of dry air 0.2095; from memory): above 500 % is not water.
                 maximum=500.0),
    DerivedValue("cond25_us_cm", "Conductivity at 25 °C", "EC25", "µS/cm", 0,
                 "Linear compensation, α = 0.0191 /°C (Standard Methods 2510)", _cond25,
                 # the raw bound 100000 µS/cm compensated from the coldest allowed water (-5 °C): 1/(1-0.0191*30)
                 maximum=250000.0),
    DerivedValue("salinity_from_cond", "Salinity from conductivity", "Sal(EC)", "PSU", 1,
                 "PSS-78, UNESCO 1983 Tech. Pap. 44, at 0 dbar", _salinity_from_cond,
                 habitats=(parameters.MARINE,), maximum=50.0),  # the measured salinity's bound
)
BY_KEY = {d.key: d for d in DERIVED}
KEYS = tuple(BY_KEY)


def derive(readings: Readings, habitat: str) -> dict[str, float | None]:
    """All derived values that apply to the habitat; None where inputs are missing or out of range."""
    inputs = {k: NAN if readings.get(k) is None else readings[k] for k in INPUTS}
    marine = habitat == parameters.MARINE
    out: dict[str, float | None] = {}
    for d in DERIVED:
        if not d.applies_to(habitat):
            continue
        try:
            out[d.key] = d.compute(inputs, marine)
        except ValueError:  # an input missing (NaN) or outside the method's range
            out[d.key] = None
    return out


def value_of(d: DerivedValue, readings: Readings, habitat: str) -> float | None:
    """One derived value; None where an input is missing or out of its method's range."""
    inputs = {k: NAN if readings.get(k) is None else readings[k] for k in INPUTS}
    try:
        return d.compute(inputs, habitat == parameters.MARINE)
    except ValueError:
        return None


def derive_arrays(readings: Mapping[str, Sequence[float | None]], habitats: Sequence[str]) -> dict[str, np.ndarray]:
    """`derive` for many checks at once: one array per derived value, element i for check i.

    `readings` holds a sequence per input key (None for a missing reading) and `habitats` the habitat
    of each check. Element i is the float `derive` gives for check i, bit for bit, or NaN where that
    is None or the value does not apply to the check's habitat.
    """
    inputs = {k: np.array(readings[k], dtype=float) for k in INPUTS}  # None becomes NaN
    habitats = np.asarray(habitats, dtype=str)
    marine = habitats == parameters.MARINE
    out = {}
    for d in DERIVED:
        applies = np.isin(habitats, d.habitats)
        out[d.key] = np.where(applies, d.compute(inputs, marine), np.nan)
    return out


def for_habitat(habitat: str) -> tuple[DerivedValue, ...]:
    return tuple(d for d in DERIVED if d.applies_to(habitat))


def label_for(key: str):
    """The registry entry (measured or derived) for a target or flag key."""
    return parameters.BY_KEY.get(key) or BY_KEY[key]


TARGET_CHOICES = parameters.CHOICES + [(d.key, f"{d.label_with_unit} (derived)") for d in DERIVED]


@dataclass(frozen=True)
class RawEquivalent:
    """A target on a derived value, restated for one raw reading under the tank's latest conditions.

    Lets the entry page flag a typed DO (mg/L) or total ammonia against a % saturation or NH3
    target without a second copy of the chemistry in JavaScript. Only a live hint: the saved
    check is flagged on the derived value itself.
    """

    low: float | None
    high: float | None
    text: str


# The latest readings raw_equivalents reads (a page for one tank loads only these: Tank.last_readings).
EQUIVALENT_INPUTS = ("temp_c", "ph", "salinity")


def raw_equivalents(targets: dict, last: Readings, habitat: str) -> dict[str, RawEquivalent]:
    out: dict[str, RawEquivalent] = {}
    temp = last.get("temp_c")
    do_target = targets.get("do_pct_sat")
    if do_target is not None and temp is not None:
        salinity = (last.get("salinity") or 0.0) if habitat == parameters.MARINE else 0.0
        try:
            saturated = chemistry.oxygen_solubility_mg_l(temp, salinity)
        except ValueError:
            saturated = None
        if saturated is not None:
            low = None if do_target.low is None else do_target.low / 100 * saturated
            high = None if do_target.high is None else do_target.high / 100 * saturated
            out["do_mg_l"] = RawEquivalent(low, high, _equivalent_text(low, high, "mg/L") +
                                           f" ({_limits(do_target)} % air sat. at {temp:.1f} °C)")
    nh3_target = targets.get("nh3_mg_l")
    ph = last.get("ph")
    if nh3_target is not None and temp is not None and ph is not None:
        try:
            fraction = chemistry.unionized_ammonia_fraction(ph, temp)
        except ValueError:
            fraction = 0.0
        if fraction > 0:
            low = None if nh3_target.low is None else nh3_target.low / fraction
            high = None if nh3_target.high is None else nh3_target.high / fraction
            out["tan_mg_l"] = RawEquivalent(low, high, _equivalent_text(low, high, "mg/L") +
                                            f" (NH3 {_limits(nh3_target)} mg/L at pH {ph:.2f}, {temp:.1f} °C)")
    return out


def _equivalent_text(low: float | None, high: float | None, unit: str) -> str:
    """Limits without a comparison sign: the page says "▲ above …" or "▼ below …"."""
    if low is not None and high is not None:
        return f"{low:.3g}–{high:.3g} {unit}"
    return f"{low if low is not None else high:.3g} {unit}"


def _limits(target) -> str:
    if target.low is not None and target.high is not None:
        return f"{target.low:g}–{target.high:g}"
    return f"{target.low if target.low is not None else target.high:g}"


# The readings each derived value is computed from: a deviation on a derived value makes these due
# again (colonies/schedules.py, "while a deviation on it is open").
MEASURED_FROM: dict[str, tuple[str, ...]] = {
    "nh3_mg_l": ("tan_mg_l", "ph", "temp_c"),
    "do_pct_sat": ("do_mg_l", "temp_c"),
    "cond25_us_cm": ("conductivity_us_cm", "temp_c"),
    "salinity_from_cond": ("conductivity_us_cm", "temp_c"),
}


def measured_keys(key: str) -> tuple[str, ...]:
    """The measured parameters behind a target or deviation key (itself when it is measured)."""
    return MEASURED_FROM.get(key, (key,) if key in parameters.BY_KEY else ())
