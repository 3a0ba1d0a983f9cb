"""The plain rows a methods draft is composed from (experiments/methods.py); no Django.

experiments/methods_records.py fills them from the records; while a study is blind it leaves each
trial's condition, stimulus and free-text reasons empty.
"""
from __future__ import annotations

from dataclasses import dataclass, field
from datetime import date, datetime

from .validity import Result


@dataclass(frozen=True)
class StudyFacts:
    code: str
    title: str
    question: str
    conditions: list[str]
    reference: str
    replicates: int
    slots: int
    method: str
    method_label: str
    seed: int
    generator: str
    allocated_at: datetime | None
    blinded: bool
    blind: bool
    unblinded_at: datetime | None
    unblinded_by: str
    unblind_reason: str
    scorer_not_operator: bool
    primary_outcome: str
    window_s: int
    exclusion_criteria: str
    owner: str
    protocol_reference: str
    protocol_title: str
    protocol_approver: str
    protocol_approved_on: date | None


@dataclass(frozen=True)
class TrialRow:
    code: str
    slot: int
    condition: str  # "" while blind
    animals: int  # in the arena for this trial
    run_at: datetime
    run_by: str
    dish: str
    cohort: str
    tank: str
    dish_animals: int = 0  # put in the trial's dish
    voided: bool = False
    void_reason: str = ""
    excluded: bool = False
    exclusion_reason: str = ""
    scored: bool = False
    censored: bool = False
    scored_by: str = ""
    mortality_24h: int | None = None
    vessel: str = ""
    arena_diameter_mm: float | None = None
    water_volume_ml: float | None = None
    water_temp_c: float | None = None
    light_lux: float | None = None
    acclimation_min: float | None = None
    stimulus: str = ""  # "" while blind
    measured: str = ""  # "", "accepted" or "overridden": the image measurement shown when it was scored
    overridden: bool = False  # a manager let it go beyond a protocol limit
    override_reason: str = ""  # "" while blind


@dataclass(frozen=True)
class TankFacts:
    code: str
    species: str
    room: str
    volume_l: float
    system: str
    substrate: str
    cohorts: int = 0
    animals_drawn: int = 0


@dataclass(frozen=True)
class Husbandry:
    """The source tanks' records during the study period (plain rows)."""
    checks: list[tuple[str, datetime, dict]] = field(default_factory=list)  # tank, observed_at, readings
    feedings: list[tuple[str, datetime, str, float, str]] = field(default_factory=list)  # tank, at, food, amount, unit
    water_changes: list[tuple[str, datetime, float | None, str]] = field(default_factory=list)  # tank, at, %, water
    censuses: list[tuple[str, datetime, float]] = field(default_factory=list)  # tank, at, estimate (incl. one before)
    deaths: list[tuple[str, datetime, int]] = field(default_factory=list)  # tank, at, dead removed (checks+removals)
    deviations: list[tuple[str, str, str]] = field(default_factory=list)  # tank or "", rule label, severity label


@dataclass(frozen=True)
class Measuring:
    """Image measurements used for scores: settings that were the same for all, and those that varied."""
    count: int = 0
    settings: dict[str, str] = field(default_factory=dict)
    skimage: str = ""


@dataclass(frozen=True)
class Draft:
    study: StudyFacts
    trials: list[TrialRow]
    tanks: list[TankFacts]
    husbandry: Husbandry
    measuring: Measuring
    versions: dict[str, str]
    first_day: date | None
    last_day: date | None
    validity: list[Result] = field(default_factory=list)
    dishes_died: int = 0


@dataclass(frozen=True)
class Section:
    item: str  # "1", "15", or "" for the validity section
    title: str
    paragraphs: list[str]
    source: str

    @property
    def heading(self) -> str:
        return f"{self.title} (ARRIVE 2.0 item {self.item})" if self.item else self.title
