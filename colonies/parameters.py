"""The water-parameter registry: the one definition every form, flag, export and plot reads.

Conventions (write them on every label so nobody has to guess):
- Ammonia, nitrite and nitrate are expressed *as nitrogen* (mg/L NH3-N, NO2-N, NO3-N), the
  convention of most test kits' "-N" scales and of the US EPA 2013 ammonia criteria. Total
  ammonia nitrogen (TAN) is NH3-N + NH4+-N.
- Conductivity is recorded at the water's temperature, uncompensated (switch the meter's 25 °C
  compensation off, or read its raw value); Vermilog derives the 25 °C value and, for marine
  tanks, practical salinity from it (colonies/derived.py).
- Salinity is practical salinity (PSS-78, dimensionless, numerically close to g/kg or ‰).
- Hardness is total hardness in mg/L as CaCO3 (Standard Methods 2340).

Physical bounds reject what cannot be a real reading (a typo or a wrong unit); they are not care
targets. Care targets live on species profiles and tanks and only flag.

Adding a parameter: append one `Parameter` here, run `makemigrations colonies` (a nullable column
and its bounds constraint on the check table), and add a default target to the species profiles if
one is published. Forms, the round, flags, the CSV export and charts pick it up from this list.
"""
from dataclasses import dataclass

FRESHWATER = "freshwater"
MARINE = "marine"
BOTH = (FRESHWATER, MARINE)


@dataclass(frozen=True)
class Parameter:
    key: str  # column name on the check table; never rename once data exist
    label: str
    short: str  # column heading on narrow screens
    unit: str
    decimals: int
    minimum: float  # physical bounds, inclusive
    maximum: float
    habitats: tuple[str, ...] = BOTH
    help: str = ""

    @property
    def label_with_unit(self) -> str:
        return f"{self.label} ({self.unit})" if self.unit else self.label

    @property
    def step(self) -> str:
        return "any"

    def bounds_text(self) -> str:
        return f"{self.minimum:g} to {self.maximum:g}{(' ' + self.unit) if self.unit else ''}"

    def format(self, value: float | None) -> str:
        if value is None:
            return ""
        return f"{value:.{self.decimals}f}"

    def applies_to(self, habitat: str) -> bool:
        return habitat in self.habitats


PARAMETERS: tuple[Parameter, ...] = (
    Parameter("temp_c", "Temperature", "Temp", "°C", 1, -5.0, 50.0,
              help="Water temperature at the time of the check."),
    Parameter("ph", "pH", "pH", "", 2, 0.0, 14.0),
    Parameter("do_mg_l", "Dissolved oxygen", "DO", "mg/L", 2, 0.0, 30.0,
              help="Dissolved oxygen concentration; above about 20 mg/L only with pure-oxygen supersaturation."),
    Parameter("tan_mg_l", "Total ammonia", "TAN", "mg/L NH3-N", 2, 0.0, 100.0,
              help="Total ammonia nitrogen (NH3-N + NH4+-N), as most test kits' '-N' scale reports it."),
    Parameter("no2_mg_l", "Nitrite", "NO2", "mg/L NO2-N", 3, 0.0, 100.0),
    Parameter("no3_mg_l", "Nitrate", "NO3", "mg/L NO3-N", 1, 0.0, 500.0),
    Parameter("conductivity_us_cm", "Conductivity, uncompensated", "Cond (raw)", "µS/cm", 0, 0.0, 100000.0,
              help="At the water's temperature, uncompensated; Vermilog derives the 25 °C value."),
    Parameter("salinity", "Salinity", "Sal", "PSU", 1, 0.0, 50.0, habitats=(MARINE,),
              help="Practical salinity (PSS-78), numerically close to ‰ or g/kg."),
    Parameter("hardness_mg_l", "Total hardness", "Hard", "mg/L CaCO3", 0, 0.0, 2000.0, habitats=(FRESHWATER,),
              help="Total hardness as CaCO3 (Standard Methods 2340)."),
)

BY_KEY: dict[str, Parameter] = {p.key: p for p in PARAMETERS}
KEYS: tuple[str, ...] = tuple(BY_KEY)
CHOICES: list[tuple[str, str]] = [(p.key, p.label_with_unit) for p in PARAMETERS]


def for_habitat(habitat: str) -> tuple[Parameter, ...]:
    return tuple(p for p in PARAMETERS if p.applies_to(habitat))


def get(key: str) -> Parameter:
    try:
        return BY_KEY[key]
    except KeyError:
        raise KeyError(f"Unknown water parameter {key!r}; known: {', '.join(KEYS)}") from None
