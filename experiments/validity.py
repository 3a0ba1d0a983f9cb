"""Validity criteria for a study, stated the way test guidelines state them (pure Python, no Django).

A study declares a few criteria from `CRITERIA` (Study.validity_criteria, a JSON list of
{"kind": ..., <field>: <number>}); `clean_criteria` checks them (each message names the field and
the allowed range) and `validity_results` judges each against plain rows from the records: met,
not met, or cannot tell (no record of it, or it needs the conditions while the study is blind),
always with the evidence (values, counts, which records).

The criteria are modelled on the validity sections of sediment and water test guidelines for
invertebrates; the numbers are the lab's to choose, the defaults only a starting point:
- control (reference) survival: ASTM E1706 states a minimum mean control survival for its
  sediment tests (80 % for Hyalella azteca and Chironomus dilutus; from memory);
- dissolved oxygen not below a floor: OECD TG 225 (2007, Lumbriculus) asks for at least 30 %
  of air saturation in the overlying water throughout the test, OECD TG 218 (2004, Chironomus)
  for at least 60 % (both from memory);
- pH within a band: OECD TG 225 and 218, pH 6 to 9 in the overlying water (from memory);
- temperature within a band: OECD TG 218, the test temperature not differing by more than
  ±1.0 °C (from memory); here a band in °C, low to high.
"""
from __future__ import annotations

from dataclasses import dataclass, field
from datetime import date, datetime

MET, NOT_MET, CANNOT_TELL = "met", "not met", "cannot tell"


@dataclass(frozen=True)
class Bound:
    label: str
    unit: str
    minimum: float
    maximum: float

    def range_text(self) -> str:
        return f"{self.minimum:g} to {self.maximum:g}{' ' + self.unit if self.unit else ''}"


@dataclass(frozen=True)
class Criterion:
    kind: str
    label: str
    guideline: str
    fields: dict[str, Bound]
    defaults: dict[str, float]


CRITERIA: dict[str, Criterion] = {c.kind: c for c in (
    Criterion("reference_survival", "Reference-condition survival at 24 h",
              "Modelled on ASTM E1706 (control survival; from memory)",
              {"min_pct": Bound("Reference survival at 24 h, minimum", "%", 0, 100)}, {"min_pct": 80}),
    Criterion("oxygen_floor", "Dissolved oxygen in the source tanks not below a floor",
              "Modelled on OECD TG 225 and TG 218 (oxygen throughout the test; from memory)",
              {"min_mg_l": Bound("Dissolved oxygen, minimum", "mg/L", 0, 30)}, {"min_mg_l": 4}),
    Criterion("oxygen_saturation_floor", "Oxygen saturation in the source tanks not below a floor",
              "Modelled on OECD TG 225 (at least 30 % of air saturation; from memory)",
              {"min_pct": Bound("Oxygen saturation, minimum", "% air sat.", 0, 500)}, {"min_pct": 30}),
    Criterion("temperature_band", "Temperature within a band (source tanks and trial arenas)",
              "Modelled on OECD TG 218 (test temperature held within a band; from memory)",
              {"low_c": Bound("Temperature band, low", "°C", -5, 50),
               "high_c": Bound("Temperature band, high", "°C", -5, 50)}, {"low_c": 18, "high_c": 22}),
    Criterion("ph_band", "pH within a band in the source tanks",
              "Modelled on OECD TG 225 and TG 218 (pH 6 to 9; from memory)",
              {"low": Bound("pH band, low", "", 0, 14), "high": Bound("pH band, high", "", 0, 14)},
              {"low": 6, "high": 9}),
)}


class CriteriaError(ValueError):
    """Bad criteria: `errors` maps "<kind>.<field>" (or "criteria") to a message naming the field and range."""

    def __init__(self, errors: dict[str, str]):
        super().__init__(" ".join(errors.values()))
        self.errors = errors


def _number(text) -> float | None:
    if isinstance(text, bool):
        return None
    try:
        value = float(text)
    except (TypeError, ValueError):
        return None
    return value if value == value and abs(value) != float("inf") else None


def clean_criteria(raw: list[dict]) -> list[dict]:
    """Checked criteria in CRITERIA's order, numbers as floats; raises CriteriaError with every problem."""
    if not isinstance(raw, list):
        raise CriteriaError({"criteria": "Validity criteria: a list of criteria is expected."})
    errors: dict[str, str] = {}
    by_kind: dict[str, dict] = {}
    allowed = ", ".join(CRITERIA)
    for entry in raw:
        kind = entry.get("kind") if isinstance(entry, dict) else None
        if kind not in CRITERIA:
            errors["criteria"] = f"Validity criteria: unknown criterion {kind!r}; allowed: {allowed}."
            continue
        if kind in by_kind:
            errors["criteria"] = f"Validity criteria: {CRITERIA[kind].label} is given twice; each at most once."
            continue
        criterion, clean = CRITERIA[kind], {"kind": kind}
        for name, bound in criterion.fields.items():
            value = _number(entry.get(name))
            if value is None:
                errors[f"{kind}.{name}"] = (f"{bound.label}: {entry.get(name)!r} is not a number; "
                                            f"allowed range {bound.range_text()}.")
            elif not bound.minimum <= value <= bound.maximum:
                errors[f"{kind}.{name}"] = (f"{bound.label}: {value:g} is outside the allowed range "
                                            f"{bound.range_text()}.")
            else:
                clean[name] = value
        low_high = [n for n in criterion.fields if n.startswith("low")], [n for n in criterion.fields
                                                                          if n.startswith("high")]
        if low_high[0] and all(n in clean for n in criterion.fields):
            low, high = clean[low_high[0][0]], clean[low_high[1][0]]
            if low > high:
                bound = criterion.fields[low_high[1][0]]
                errors[f"{kind}.{low_high[1][0]}"] = (f"{bound.label}: {high:g} is below the low end {low:g}; "
                                                      f"allowed range {low:g} to {bound.maximum:g}"
                                                      f"{' ' + bound.unit if bound.unit else ''}.")
        by_kind[kind] = clean
    if errors:
        raise CriteriaError(errors)
    return [by_kind[k] for k in CRITERIA if k in by_kind]


def requirement_text(criterion: dict) -> str:
    c = CRITERIA[criterion["kind"]]
    unit = next(iter(c.fields.values())).unit
    u = f" {unit}" if unit else ""
    if c.kind == "reference_survival":
        return f"survival of the reference condition's animals at 24 h ≥ {criterion['min_pct']:g} %"
    if c.kind in ("oxygen_floor", "oxygen_saturation_floor"):
        name = "dissolved oxygen" if c.kind == "oxygen_floor" else "oxygen saturation"
        return f"{name} ≥ {criterion[next(iter(c.fields))]:g}{u} at every check of the source tanks"
    low, high = (criterion[n] for n in c.fields)
    where = "every check of the source tanks and every trial arena" if c.kind == "temperature_band" else \
        "every check of the source tanks"
    return f"{'temperature' if c.kind == 'temperature_band' else 'pH'} within {low:g}–{high:g}{u} at {where}"


# --- evidence rows ---------------------------------------------------------------------------------
@dataclass(frozen=True)
class TrialRow:
    code: str
    condition: str  # "" when the viewer may not know it
    animals: int
    mortality_24h: int | None
    voided: bool = False
    water_temp_c: float | None = None


@dataclass(frozen=True)
class CheckRow:
    tank: str
    observed_at: datetime
    readings: dict[str, float | None] = field(default_factory=dict)  # temp_c, ph, do_mg_l, do_pct_sat


@dataclass(frozen=True)
class Evidence:
    blind: bool
    reference: str
    trials: list[TrialRow]
    checks: list[CheckRow]
    tanks: list[str]
    first_day: date | None
    last_day: date | None

    def where(self) -> str:
        if self.first_day is None:
            return "no trial recorded yet"
        tanks = ", ".join(self.tanks) or "no tank"
        return f"tanks {tanks}, {self.first_day.isoformat()} to {self.last_day.isoformat()}"


@dataclass(frozen=True)
class Result:
    kind: str
    label: str
    guideline: str
    requirement: str
    status: str
    evidence: str


# Decimals as the registry shows each reading (colonies/parameters.py; oxygen saturation as colonies/derived.py).
DECIMALS = {"temp_c": 1, "ph": 2, "do_mg_l": 2, "do_pct_sat": 0}


def _fmt(value: float, key: str) -> str:
    return f"{value:.{DECIMALS[key]}f}"


def _survival(c: dict, ev: Evidence) -> tuple[str, str]:
    if not ev.reference:
        return CANNOT_TELL, "The study has no reference condition (one condition only)."
    if ev.blind:
        return CANNOT_TELL, "Withheld while the study is blind: it needs the reference condition's trials."
    ref = [t for t in ev.trials if not t.voided and t.condition == ev.reference]
    if not ref:
        return CANNOT_TELL, f"No trial of the reference condition '{ev.reference}' recorded."
    missing = [t.code for t in ref if t.mortality_24h is None]
    if missing:
        return CANNOT_TELL, (f"{len(missing)} of {len(ref)} reference trials have no count of dead at 24 h "
                             f"({', '.join(missing)}).")
    animals, dead = sum(t.animals for t in ref), sum(t.mortality_24h for t in ref)
    survival = 100.0 * (animals - dead) / animals
    status = MET if survival >= c["min_pct"] else NOT_MET
    return status, (f"{animals - dead} of {animals} animals alive at 24 h ({survival:.1f} %) in {len(ref)} "
                    f"reference trials ({', '.join(t.code for t in ref)}; voided trials left out, excluded "
                    f"ones counted).")


def _readings(ev: Evidence, key: str) -> list[tuple[float, str]]:
    return [(r.readings[key], f"{r.tank} {r.observed_at:%Y-%m-%d %H:%M}") for r in ev.checks
            if r.readings.get(key) is not None]


def _floor(c: dict, ev: Evidence, key: str, floor_name: str, unit: str) -> tuple[str, str]:
    values = _readings(ev, key)
    if not values:
        return CANNOT_TELL, f"No check recorded {floor_name} ({ev.where()})."
    floor = c[next(iter(CRITERIA[c["kind"]].fields))]
    low, at = min(values)
    below = [v for v in values if v[0] < floor]
    status = NOT_MET if below else MET
    return status, (f"{len(values)} checks with {floor_name} ({ev.where()}): lowest {_fmt(low, key)} {unit} ({at}); "
                    f"{len(below)} below {floor:g} {unit}.")


def _band(values: list[tuple[float, str]], low: float, high: float, key: str, unit: str, what: str) -> tuple[int, str]:
    outside = [v for v in values if not low <= v[0] <= high]
    lo, hi = min(values), max(values)
    text = (f"{len(values)} {what}: {_fmt(lo[0], key)}–{_fmt(hi[0], key)}{unit} (lowest {lo[1]}, highest {hi[1]}); "
            f"{len(outside)} outside the band")
    return len(outside), text


def _temperature(c: dict, ev: Evidence) -> tuple[str, str]:
    checks = _readings(ev, "temp_c")
    arenas = [(t.water_temp_c, f"trial {t.code}") for t in ev.trials if not t.voided and t.water_temp_c is not None]
    if not checks and not arenas:
        return CANNOT_TELL, f"No temperature recorded at a check or a trial ({ev.where()})."
    parts, outside = [], 0
    for values, what in ((checks, f"checks of the source tanks ({ev.where()})"), (arenas, "trial arenas")):
        if values:
            n, text = _band(values, c["low_c"], c["high_c"], "temp_c", " °C", what)
            outside += n
            parts.append(text)
    return (NOT_MET if outside else MET), "; ".join(parts) + "."


def _ph(c: dict, ev: Evidence) -> tuple[str, str]:
    values = _readings(ev, "ph")
    if not values:
        return CANNOT_TELL, f"No check recorded pH ({ev.where()})."
    n, text = _band(values, c["low"], c["high"], "ph", "", f"checks with pH ({ev.where()})")
    return (NOT_MET if n else MET), text + "."


def validity_results(criteria: list[dict], evidence: Evidence) -> list[Result]:
    """Each declared criterion judged on the evidence: met, not met or cannot tell, with the values and records.

    `criteria` as stored on the study (clean_criteria's output); `evidence` holds plain rows: the
    study's trials (condition "" for a viewer who may not know it), the source tanks' checks during the
    study period (first to last lab day with a cohort drawn or a trial run), and whether the study is blind.
    """
    out = []
    for c in criteria:
        kind = c["kind"]
        if kind == "reference_survival":
            status, text = _survival(c, evidence)
        elif kind == "oxygen_floor":
            status, text = _floor(c, evidence, "do_mg_l", "dissolved oxygen", "mg/L")
        elif kind == "oxygen_saturation_floor":
            status, text = _floor(c, evidence, "do_pct_sat", "oxygen saturation", "% air sat.")
        elif kind == "temperature_band":
            status, text = _temperature(c, evidence)
        else:
            status, text = _ph(c, evidence)
        spec = CRITERIA[kind]
        out.append(Result(kind, spec.label, spec.guideline, requirement_text(c), status, text))
    return out


def form_rows(criteria: list[dict]) -> list[dict]:
    """The criteria form: every criterion of CRITERIA, ticked when declared, with its values or the defaults."""
    declared = {c["kind"]: c for c in criteria or []}
    rows = []
    for kind, spec in CRITERIA.items():
        values = declared.get(kind, spec.defaults)
        rows.append({"kind": kind, "label": spec.label, "guideline": spec.guideline, "used": kind in declared,
                     "fields": [{"name": f"{kind}.{name}", "label": b.label, "unit": b.unit,
                                 "value": f"{values[name]:g}", "min": f"{b.minimum:g}", "max": f"{b.maximum:g}"}
                                for name, b in spec.fields.items()]})
    return rows


def criteria_from_form(data) -> list[dict]:
    """The ticked criteria from a form's fields ("use" lists the kinds; "<kind>.<field>" the numbers), unchecked."""
    return [{"kind": kind, **{name: data.get(f"{kind}.{name}") for name in CRITERIA[kind].fields}}
            if kind in CRITERIA else {"kind": kind} for kind in data.getlist("use")]
