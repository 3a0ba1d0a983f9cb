"""Validity criteria (experiments/validity.py, pure): each criterion met, not met and cannot tell on small fixtures,
and refusals that name the field and the allowed range.

The thresholds in the fixtures are the defaults the module offers (OECD TG 225/218 and ASTM E1706 style
criteria; the module docstring marks the guideline values as from memory); the verdicts below are
hand-computed from the listed readings.
"""
from datetime import date, datetime

import pytest

from experiments import validity
from experiments.validity import CANNOT_TELL, MET, NOT_MET, CheckRow, Evidence, TrialRow


def _evidence(*, checks=(), trials=(), blind=False, reference="sham") -> Evidence:
    return Evidence(blind=blind, reference=reference, trials=list(trials), checks=list(checks), tanks=["LV-1"],
                    first_day=date(2026, 11, 2), last_day=date(2026, 11, 4))


def _check(day: int, **readings) -> CheckRow:
    return CheckRow(tank="LV-1", observed_at=datetime(2026, 11, day, 9, 0), readings=readings)


def _one(criterion: dict, evidence: Evidence) -> validity.Result:
    [result] = validity.validity_results(validity.clean_criteria([criterion]), evidence)
    return result


# --- reference survival ----------------------------------------------------------------------------
SHAM = [TrialRow("AAAA", "sham", 10, 1), TrialRow("CCCC", "sham", 10, 0), TrialRow("DDDD", "UV", 10, 9),
        TrialRow("EEEE", "sham", 10, 10, voided=True)]


def test_reference_survival_is_met_from_the_reference_trials_only():
    # Hand-computed: sham trials AAAA and CCCC (EEEE voided, DDDD another condition): 20 animals, 1 dead,
    # 19/20 = 95.0 % alive >= 80 %.
    result = _one({"kind": "reference_survival", "min_pct": 80}, _evidence(trials=SHAM))
    assert result.status == MET
    assert "19 of 20 animals alive at 24 h (95.0 %) in 2 reference trials (AAAA, CCCC" in result.evidence


def test_reference_survival_is_not_met_below_the_minimum():
    # 95.0 % < 96 %
    assert _one({"kind": "reference_survival", "min_pct": 96}, _evidence(trials=SHAM)).status == NOT_MET


@pytest.mark.parametrize("trials,blind,reference,why", [
    (SHAM, True, "sham", "Withheld while the study is blind"),
    (SHAM, False, "", "no reference condition"),
    ([TrialRow("AAAA", "sham", 10, None), TrialRow("CCCC", "sham", 10, 0)], False, "sham",
     "1 of 2 reference trials have no count of dead at 24 h (AAAA)"),
    ([TrialRow("DDDD", "UV", 10, 0)], False, "sham", "No trial of the reference condition"),
])
def test_reference_survival_cannot_tell(trials, blind, reference, why):
    result = _one({"kind": "reference_survival", "min_pct": 80},
                  _evidence(trials=trials, blind=blind, reference=reference))
    assert result.status == CANNOT_TELL
    assert why in result.evidence


# --- oxygen, temperature, pH -----------------------------------------------------------------------
CHECKS = [_check(2, do_mg_l=8.0, do_pct_sat=88.0, temp_c=20.0, ph=7.0),
          _check(3, do_mg_l=3.5, do_pct_sat=38.0, temp_c=21.5, ph=None),
          _check(4, do_mg_l=None, do_pct_sat=None, temp_c=23.0, ph=9.4)]


def test_oxygen_floor_met_not_met_and_cannot_tell():
    # Lowest DO 3.5 mg/L on 3 Nov (2 checks with a reading): >= 3 met, >= 4 not met (one below).
    met = _one({"kind": "oxygen_floor", "min_mg_l": 3}, _evidence(checks=CHECKS))
    assert met.status == MET
    assert "2 checks with dissolved oxygen (tanks LV-1, 2026-11-02 to 2026-11-04): lowest 3.50 mg/L " \
           "(LV-1 2026-11-03 09:00); 0 below 3 mg/L." == met.evidence
    not_met = _one({"kind": "oxygen_floor", "min_mg_l": 4}, _evidence(checks=CHECKS))
    assert (not_met.status, "1 below 4 mg/L" in not_met.evidence) == (NOT_MET, True)
    assert _one({"kind": "oxygen_floor", "min_mg_l": 4}, _evidence(checks=[_check(2, temp_c=20)])).status == CANNOT_TELL


def test_oxygen_saturation_floor_at_the_guidelines_30_percent():
    # OECD TG 225's floor is 30 % of air saturation (from memory); lowest 38 % here, so met; at 40 % not met.
    assert _one({"kind": "oxygen_saturation_floor", "min_pct": 30}, _evidence(checks=CHECKS)).status == MET
    assert _one({"kind": "oxygen_saturation_floor", "min_pct": 40}, _evidence(checks=CHECKS)).status == NOT_MET
    assert _one({"kind": "oxygen_saturation_floor", "min_pct": 30}, _evidence()).status == CANNOT_TELL


def test_temperature_band_reads_the_tanks_and_the_trial_arenas():
    arenas = [TrialRow("AAAA", "", 10, None, water_temp_c=21.0), TrialRow("CCCC", "", 10, None, water_temp_c=24.5),
              TrialRow("EEEE", "", 10, None, voided=True, water_temp_c=40.0)]
    # Tanks 20.0-23.0 °C and arenas 21.0-24.5 °C (the voided trial's 40 °C left out): within 19-25, not 19-24.
    wide = _one({"kind": "temperature_band", "low_c": 19, "high_c": 25}, _evidence(checks=CHECKS, trials=arenas))
    assert wide.status == MET
    assert "3 checks of the source tanks" in wide.evidence and "2 trial arenas: 21.0–24.5 °C" in wide.evidence
    narrow = _one({"kind": "temperature_band", "low_c": 19, "high_c": 24}, _evidence(checks=CHECKS, trials=arenas))
    assert narrow.status == NOT_MET and "trial CCCC" in narrow.evidence
    assert _one({"kind": "temperature_band", "low_c": 19, "high_c": 25}, _evidence()).status == CANNOT_TELL


def test_ph_band_six_to_nine():
    # pH 7.0 and 9.4 (one check without pH): 9.4 is outside OECD's 6-9 (from memory), inside 6-9.5.
    assert _one({"kind": "ph_band", "low": 6, "high": 9}, _evidence(checks=CHECKS)).status == NOT_MET
    assert _one({"kind": "ph_band", "low": 6, "high": 9.5}, _evidence(checks=CHECKS)).status == MET
    no_ph = _evidence(checks=[_check(2, temp_c=20)])
    assert _one({"kind": "ph_band", "low": 6, "high": 9}, no_ph).status == CANNOT_TELL


# --- validation --------------------------------------------------------------------------------------
@pytest.mark.parametrize("criterion,key,message", [
    ({"kind": "reference_survival", "min_pct": 120}, "reference_survival.min_pct",
     "Reference survival at 24 h, minimum: 120 is outside the allowed range 0 to 100 %."),
    ({"kind": "oxygen_floor", "min_mg_l": "lots"}, "oxygen_floor.min_mg_l",
     "Dissolved oxygen, minimum: 'lots' is not a number; allowed range 0 to 30 mg/L."),
    ({"kind": "ph_band", "low": 8, "high": 7}, "ph_band.high",
     "pH band, high: 7 is below the low end 8; allowed range 8 to 14."),
    ({"kind": "temperature_band", "low_c": -10, "high_c": 20}, "temperature_band.low_c",
     "Temperature band, low: -10 is outside the allowed range -5 to 50 °C."),
    ({"kind": "oxygen_floor", "min_mg_l": float("nan")}, "oxygen_floor.min_mg_l", "is not a number"),
    ({"kind": "moon_phase"}, "criteria", "unknown criterion 'moon_phase'; allowed: reference_survival"),
])
def test_bad_criteria_name_the_field_and_the_allowed_range(criterion, key, message):
    with pytest.raises(validity.CriteriaError) as error:
        validity.clean_criteria([criterion])
    assert message in error.value.errors[key]


def test_a_criterion_given_twice_is_refused_and_good_ones_come_back_in_order():
    with pytest.raises(validity.CriteriaError, match="given twice"):
        validity.clean_criteria([{"kind": "ph_band", "low": 6, "high": 9}] * 2)
    clean = validity.clean_criteria([{"kind": "ph_band", "low": "6", "high": "9"},
                                     {"kind": "oxygen_floor", "min_mg_l": "4"}])
    assert clean == [{"kind": "oxygen_floor", "min_mg_l": 4.0}, {"kind": "ph_band", "low": 6.0, "high": 9.0}]
