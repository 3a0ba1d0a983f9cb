"""Values derived from a check's raw readings with published methods (see colonies/chemistry.py).

Like the measured parameters, each derived value is one entry in a registry that the round, the
tank page, the CSV export and care targets read. A derived value is None when an input is missing
or lies outside the method's validity range: no extrapolated number is shown as if it were real.

Barometric pressure is not recorded per check; oxygen saturation assumes standard pressure
(101.325 kPa). At 600 m altitude that overstates % saturation by about 7 % of the value.
"""
from collections.abc import Callable
from dataclasses import dataclass

from . import chemistry, parameters

Readings = dict[str, float | None]


@dataclass(frozen=True)
class DerivedValue:
    key: str
    label: str
    short: str
    unit: str
    decimals: int
    method: str
    compute: Callable[[Readings, str], float]
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


def _need(readings: Readings, *keys: str) -> list[float]:
    values = [readings.get(k) for k in keys]
    if any(v is None for v in values):
        raise LookupError
    return values  # type: ignore[return-value]


def _nh3(r: Readings, habitat: str) -> float:
    tan, ph, temp = _need(r, "tan_mg_l", "ph", "temp_c")
    return chemistry.unionized_ammonia_mg_l(tan, ph, temp)


def _do_pct(r: Readings, habitat: str) -> float:
    do, temp = _need(r, "do_mg_l", "temp_c")
    salinity = r.get("salinity") if habitat == parameters.MARINE else 0.0
    if salinity is None:
        raise LookupError
    return chemistry.oxygen_percent_saturation(do, temp, salinity)


def _cond25(r: Readings, habitat: str) -> float:
    cond, temp = _need(r, "conductivity_us_cm", "temp_c")
    return chemistry.specific_conductance_25(cond, temp)


def _salinity_from_cond(r: Readings, habitat: str) -> float:
    cond, temp = _need(r, "conductivity_us_cm", "temp_c")
    return chemistry.practical_salinity(cond / 1000.0, temp)


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
    return {d.key: value_of(d, readings, habitat) for d in DERIVED if d.applies_to(habitat)}


def value_of(d: DerivedValue, readings: Readings, habitat: str) -> float | None:
    """One derived value; None where an input is missing or out of its method's range (the rules' arrays use this)."""
    try:
        return d.compute(readings, habitat)
    except (LookupError, ValueError):
        return None


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
