"""Protocol limits against a proposed exposure (pure Python, no Django).

`check_exposure` compares one proposed trial with what its protocol approves and with the
earlier exposures of its group of animals (a dish: animals taken from a cohort into one dish). It returns a list of `Breach`es, each with the limit, the value it
would reach and the limit's value. Two kinds:

- hard: the protocol does not cover the work at all (not approved, outside its dates, a stimulus
  type it does not list, a dish that has ended, more animals than the dish holds alive). Nobody
  can override these; amend the protocol or pick other animals.
- welfare: a numeric maximum (per-exposure settings, animals per trial, exposures per dish, rest
  between exposures, cumulative dose). A manager may override with a reason; the override is kept
  and opens a deviation.

Every trial counts as an exposure of its dish, sham and control trials included: the animals
were handled, moved and observed. Only a light or UV dose adds to the cumulative dose. Dishes of
one cohort are separate groups of animals: each has its own count, rest and dose.
"""
from __future__ import annotations

from dataclasses import dataclass, field
from datetime import date, datetime, timedelta

HARD = "hard"
NO_STIMULUS = "none"
WELFARE = "welfare"


@dataclass(frozen=True)
class Breach:
    limit: str  # a short key, e.g. "exposures", "rest", "cumulative_dose", "irradiance"
    kind: str  # HARD or WELFARE
    message: str
    value: float | None = None
    allowed: float | None = None

    @property
    def overridable(self) -> bool:
        return self.kind == WELFARE


@dataclass(frozen=True)
class ProtocolTerms:
    reference: str
    status_ok: bool  # approved (not draft, suspended or closed)
    status_label: str
    starts_on: date
    expires_on: date
    max_animals_per_trial: int
    max_exposures_per_group: int
    min_rest_hours: float
    max_cumulative_dose_mj_cm2: float | None
    # stimulus kind -> {setting key: (label, unit, maximum)} plus optional wavelength band and substances
    allowances: dict[str, "AllowanceTerms"] = field(default_factory=dict)


@dataclass(frozen=True)
class AllowanceTerms:
    kind_label: str
    maxima: dict[str, tuple[str, str, float]]  # setting key -> (label, unit, maximum)
    wavelength_band: tuple[float | None, float | None] = (None, None)
    substances: dict[str, float | None] = field(default_factory=dict)  # lower-case name -> max µM (None: no max)


@dataclass(frozen=True)
class GroupState:
    """One group of animals (a dish) as the limits see it."""

    label: str  # e.g. "C-0012-D2"
    animals: int  # animals alive in the group: those put in less known deaths
    ended: bool  # the dish (or its cohort) has ended or was voided
    exposures: int  # earlier exposures that count (not voided)
    last_exposure_at: datetime | None  # the nearest earlier exposure
    cumulative_dose_mj_cm2: float
    next_exposure_at: datetime | None = None  # the nearest later one, when a trial is entered late


@dataclass(frozen=True)
class Proposal:
    at: datetime
    animals: int
    kind: str
    settings: dict[str, float | None]  # setting key -> value, including derived dose and field
    substance: str = ""


def protocol_problem(terms: ProtocolTerms, on: date) -> str:
    """Why the protocol cannot be used on `on`, or "" when it can."""
    if not terms.status_ok:
        return f"Protocol {terms.reference} is {terms.status_label.lower()}, not approved: it cannot be booked or used."
    if on < terms.starts_on:
        return f"Protocol {terms.reference} starts on {terms.starts_on:%d %b %Y}; it cannot be used on {on:%d %b %Y}."
    if on > terms.expires_on:
        return f"Protocol {terms.reference} expired on {terms.expires_on:%d %b %Y}; it cannot be used on {on:%d %b %Y}."
    return ""


def _fmt(value: float) -> str:
    return f"{value:.4g}"


def check_exposure(terms: ProtocolTerms, group: GroupState, proposal: Proposal, on: date) -> list[Breach]:
    breaches: list[Breach] = []
    problem = protocol_problem(terms, on)
    if problem:
        breaches.append(Breach("protocol", HARD, problem))
    if group.ended:
        breaches.append(Breach("group_ended", HARD, f"Dish {group.label} has ended; it cannot be used again."))
    if proposal.animals > group.animals:
        breaches.append(Breach("group_animals", HARD,
                               f"Animals in the trial {proposal.animals} is more than dish {group.label} holds alive "
                               f"({group.animals}).", proposal.animals, group.animals))
    allowance = terms.allowances.get(proposal.kind)
    if proposal.kind == NO_STIMULUS:
        pass  # sham handling is part of every trial a protocol approves
    elif allowance is None:
        breaches.append(Breach("stimulus", HARD, f"Protocol {terms.reference} does not allow stimulus type "
                                                 f"'{proposal.kind}'."))
    else:
        breaches += _setting_breaches(allowance, proposal)

    if proposal.animals > terms.max_animals_per_trial:
        breaches.append(Breach("animals", WELFARE,
                               f"Animals per trial {proposal.animals} is above the protocol maximum of "
                               f"{terms.max_animals_per_trial}.", proposal.animals, terms.max_animals_per_trial))
    exposures = group.exposures + 1
    if exposures > terms.max_exposures_per_group:
        breaches.append(Breach("exposures", WELFARE,
                               f"This would be exposure {exposures} of dish {group.label}; the protocol allows "
                               f"{terms.max_exposures_per_group}.", exposures, terms.max_exposures_per_group))
    if terms.min_rest_hours > 0:
        gaps = []
        if group.last_exposure_at is not None:
            gaps.append(("since the last", (proposal.at - group.last_exposure_at) / timedelta(hours=1)))
        if group.next_exposure_at is not None:
            gaps.append(("before the next", (group.next_exposure_at - proposal.at) / timedelta(hours=1)))
        for where, rest_h in gaps:
            if rest_h < terms.min_rest_hours:
                breaches.append(Breach("rest", WELFARE,
                                       f"Rest {where} exposure of dish {group.label} would be {rest_h:.1f} h; "
                                       f"the protocol requires at least {terms.min_rest_hours:g} h.",
                                       round(rest_h, 2), terms.min_rest_hours))
    dose = proposal.settings.get("dose_mj_cm2") or 0.0
    if terms.max_cumulative_dose_mj_cm2 is not None and dose:
        total = group.cumulative_dose_mj_cm2 + dose
        if total > terms.max_cumulative_dose_mj_cm2:
            breaches.append(Breach("cumulative_dose", WELFARE,
                                   f"Cumulative dose of dish {group.label} would be {_fmt(total)} mJ/cm²; the "
                                   f"protocol allows {_fmt(terms.max_cumulative_dose_mj_cm2)} mJ/cm².",
                                   total, terms.max_cumulative_dose_mj_cm2))
    return breaches


def _setting_breaches(allowance: AllowanceTerms, proposal: Proposal) -> list[Breach]:
    out = []
    for key, (label, unit, maximum) in allowance.maxima.items():
        value = proposal.settings.get(key)
        if value is not None and value > maximum:
            out.append(Breach(key, WELFARE, f"{label} {_fmt(value)} {unit} is above the protocol maximum of "
                                            f"{_fmt(maximum)} {unit} for {allowance.kind_label}.", value, maximum))
    low, high = allowance.wavelength_band
    wavelength = proposal.settings.get("wavelength_nm")
    if wavelength is not None and ((low is not None and wavelength < low) or (high is not None and wavelength > high)):
        band = f"{_fmt(low) if low is not None else '…'}–{_fmt(high) if high is not None else '…'} nm"
        out.append(Breach("wavelength", WELFARE, f"Wavelength {_fmt(wavelength)} nm is outside the approved band "
                                                 f"{band}.", wavelength, None))
    if allowance.substances:
        name = proposal.substance.strip().lower()
        if name not in allowance.substances:
            allowed = ", ".join(sorted(allowance.substances))
            out.append(Breach("substance", HARD, f"Substance '{proposal.substance}' is not approved by the "
                                                 f"protocol (approved: {allowed})."))
        else:
            maximum = allowance.substances[name]
            conc = proposal.settings.get("concentration_um")
            if maximum is not None and conc is not None and conc > maximum:
                out.append(Breach("concentration", WELFARE, f"Concentration {_fmt(conc)} µM of {proposal.substance} "
                                                            f"is above the protocol maximum of {_fmt(maximum)} µM.",
                                  conc, maximum))
    return out
