"""Protocol limits against a proposed exposure (experiments/limits.py): every limit, both sides of it."""
from dataclasses import replace
from datetime import date, datetime, timedelta, timezone

import pytest

from experiments import limits
from experiments.limits import AllowanceTerms, GroupState, Proposal, ProtocolTerms

DAY = date(2026, 3, 10)
AT = datetime(2026, 3, 10, 12, 0, tzinfo=timezone.utc)

TERMS = ProtocolTerms(
    reference="P-1", status_ok=True, status_label="Approved", starts_on=date(2026, 1, 1), expires_on=date(2026, 12, 31),
    max_animals_per_trial=12, max_exposures_per_group=3, min_rest_hours=20, max_cumulative_dose_mj_cm2=100,
    allowances={
        "uv": AllowanceTerms("Ultraviolet light", {"irradiance_mw_cm2": ("Irradiance", "mW/cm²", 5.0),
                                                   "duration_s": ("Duration", "s", 60.0),
                                                   "dose_mj_cm2": ("Dose per exposure", "mJ/cm²", 50.0)},
                             wavelength_band=(340, 400)),
        "electrical": AllowanceTerms("Electrical", {"voltage_v": ("Voltage", "V", 12.0),
                                                    "field_v_cm": ("Field strength", "V/cm", 4.0),
                                                    "pulse_width_ms": ("Pulse width", "ms", 50.0),
                                                    "pulse_count": ("Pulse count", "pulses", 100)}),
        "thermal": AllowanceTerms("Thermal", {"temp_step_abs_c": ("Temperature step (size)", "°C", 4.0),
                                              "temp_rate_c_min": ("Temperature ramp rate", "°C/min", 1.0)}),
        "chemical": AllowanceTerms("Chemical", {}, substances={"caffeine": 500.0}),
    },
)
FRESH = GroupState(label="C-0001-D1", animals=10, ended=False, exposures=0, last_exposure_at=None, cumulative_dose_mj_cm2=0)
UV = Proposal(at=AT, animals=10, kind="uv", settings={"wavelength_nm": 365, "irradiance_mw_cm2": 2, "duration_s": 10,
                                                     "dose_mj_cm2": 20})


def keys(breaches):
    return [b.limit for b in breaches]


def test_a_proposal_inside_every_limit_passes():
    assert limits.check_exposure(TERMS, FRESH, UV, DAY) == []


def test_values_exactly_at_the_limits_pass():
    cohort = replace(FRESH, exposures=2, last_exposure_at=AT - timedelta(hours=20), cumulative_dose_mj_cm2=50)
    proposal = replace(UV, animals=12, settings={"wavelength_nm": 400, "irradiance_mw_cm2": 5, "duration_s": 10,
                                                 "dose_mj_cm2": 50})
    assert limits.check_exposure(TERMS, replace(cohort, animals=12), proposal, DAY) == []


@pytest.mark.parametrize("terms,day,word", [
    (replace(TERMS, status_ok=False, status_label="Draft"), DAY, "draft, not approved"),
    (TERMS, date(2027, 1, 1), "expired on 31 Dec 2026"),  # dates the lab's way (vermilog/formats)
    (TERMS, date(2025, 12, 31), "starts on 01 Jan 2026"),
])
def test_an_unapproved_or_expired_protocol_is_a_hard_refusal(terms, day, word):
    [breach] = limits.check_exposure(terms, FRESH, UV, day)
    assert breach.limit == "protocol" and not breach.overridable
    assert word in breach.message


def test_a_stimulus_type_the_protocol_does_not_list_cannot_be_overridden():
    [breach] = limits.check_exposure(TERMS, FRESH, replace(UV, kind="mechanical", settings={}), DAY)
    assert breach.limit == "stimulus" and not breach.overridable


def test_sham_handling_needs_no_allowance_but_still_counts_as_an_exposure():
    sham = Proposal(at=AT, animals=10, kind="none", settings={})
    assert limits.check_exposure(TERMS, FRESH, sham, DAY) == []
    assert keys(limits.check_exposure(TERMS, replace(FRESH, exposures=3), sham, DAY)) == ["exposures"]


def test_an_ended_dish_and_more_animals_than_it_holds_alive_are_hard():
    breaches = limits.check_exposure(TERMS, replace(FRESH, ended=True, animals=8), UV, DAY)
    assert keys(breaches) == ["group_ended", "group_animals"]
    assert not any(b.overridable for b in breaches)
    assert breaches[1].message == "Animals in the trial 10 is more than dish C-0001-D1 holds alive (8)."


def test_animals_per_trial_above_the_maximum():
    [b] = limits.check_exposure(TERMS, replace(FRESH, animals=20), replace(UV, animals=13), DAY)
    assert (b.limit, b.value, b.allowed, b.overridable) == ("animals", 13, 12, True)


def test_exposures_per_dish_above_the_maximum():
    cohort = replace(FRESH, exposures=3, last_exposure_at=AT - timedelta(days=2))
    [b] = limits.check_exposure(TERMS, cohort, UV, DAY)
    assert (b.limit, b.value, b.allowed) == ("exposures", 4, 3)
    assert b.message == "This would be exposure 4 of dish C-0001-D1; the protocol allows 3."


def test_rest_since_the_last_exposure_below_the_minimum():
    [b] = limits.check_exposure(TERMS, replace(FRESH, exposures=1, last_exposure_at=AT - timedelta(hours=19.5)), UV, DAY)
    assert (b.limit, b.value, b.allowed) == ("rest", 19.5, 20)
    assert "19.5 h" in b.message and "at least 20 h" in b.message


def test_rest_before_a_later_exposure_counts_when_a_trial_is_entered_late():
    cohort = replace(FRESH, exposures=1, next_exposure_at=AT + timedelta(hours=5))
    [b] = limits.check_exposure(TERMS, cohort, UV, DAY)
    assert b.limit == "rest" and "before the next" in b.message


def test_cumulative_dose_above_the_maximum():
    cohort = replace(FRESH, exposures=2, last_exposure_at=AT - timedelta(days=1), cumulative_dose_mj_cm2=90)
    [b] = limits.check_exposure(TERMS, cohort, UV, DAY)
    assert (b.limit, b.value, b.allowed) == ("cumulative_dose", 110, 100)


@pytest.mark.parametrize("kind,values,limit", [
    ("uv", {"irradiance_mw_cm2": 6, "duration_s": 5, "dose_mj_cm2": 30, "wavelength_nm": 365}, "irradiance_mw_cm2"),
    ("uv", {"irradiance_mw_cm2": 0.5, "duration_s": 61, "dose_mj_cm2": 30.5, "wavelength_nm": 365}, "duration_s"),
    ("uv", {"irradiance_mw_cm2": 5, "duration_s": 11, "dose_mj_cm2": 55, "wavelength_nm": 365}, "dose_mj_cm2"),
    ("uv", {"irradiance_mw_cm2": 1, "duration_s": 5, "dose_mj_cm2": 5, "wavelength_nm": 320}, "wavelength"),
    ("electrical", {"voltage_v": 13, "field_v_cm": 3.25}, "voltage_v"),
    ("electrical", {"voltage_v": 10, "field_v_cm": 5}, "field_v_cm"),
    ("electrical", {"voltage_v": 5, "pulse_width_ms": 60}, "pulse_width_ms"),
    ("electrical", {"voltage_v": 5, "pulse_count": 101}, "pulse_count"),
    ("thermal", {"temp_step_abs_c": 5}, "temp_step_abs_c"),
    ("thermal", {"temp_step_abs_c": 2, "temp_rate_c_min": 1.5}, "temp_rate_c_min"),
])
def test_each_per_exposure_setting_above_its_maximum_is_a_welfare_breach(kind, values, limit):
    breaches = limits.check_exposure(TERMS, FRESH, Proposal(at=AT, animals=10, kind=kind, settings=values), DAY)
    assert keys(breaches) == [limit]
    assert breaches[0].overridable


def test_chemical_substance_must_be_approved_and_its_concentration_within_the_maximum():
    other = Proposal(at=AT, animals=10, kind="chemical", settings={"concentration_um": 10}, substance="nicotine")
    [b] = limits.check_exposure(TERMS, FRESH, other, DAY)
    assert b.limit == "substance" and not b.overridable
    strong = replace(other, substance="Caffeine", settings={"concentration_um": 600})
    [b] = limits.check_exposure(TERMS, FRESH, strong, DAY)
    assert (b.limit, b.value, b.allowed) == ("concentration", 600, 500)


def test_no_cumulative_limit_means_no_cumulative_check():
    terms = replace(TERMS, max_cumulative_dose_mj_cm2=None)
    cohort = replace(FRESH, exposures=1, last_exposure_at=AT - timedelta(days=1), cumulative_dose_mj_cm2=1e6)
    assert limits.check_exposure(terms, cohort, UV, DAY) == []
