"""Recording trials against protocol limits, overrides, scoring, blinding and attachments (services)."""
import hashlib

import pytest
from django.core.exceptions import PermissionDenied, ValidationError
from django.core.files.uploadedfile import SimpleUploadedFile

from colonies.models import Deviation
from experiments import services
from experiments.models import Override, Stimulus, Trial
from tests.experiments.builders import days_ago, make_cohort, make_protocol, make_study, record, uv_values


@pytest.fixture
def setup(researcher, protocol):
    cohort = make_cohort(user=researcher, protocol=protocol, at=days_ago(10))
    study = make_study(user=researcher, protocol=protocol, replicates=3)
    return protocol, cohort, study


def test_a_trial_stores_its_derived_values_and_history(setup, researcher):
    _, cohort, study = setup
    result = record(study, cohort, researcher, at=days_ago(9), irradiance=2.5, duration=8)
    trial = Trial.objects.get()
    assert trial.dose_mj_cm2 == 20.0  # 2.5 mW/cm² × 8 s (unit arithmetic)
    assert (trial.condition, trial.code) == (study.allocation[0]["condition"], study.allocation[0]["code"])
    assert result.override is None
    assert trial.history.get().history_user == researcher
    assert trial.scored_by == researcher


def test_electrical_settings_derive_field_and_pulse_train(setup, researcher):
    _, cohort, study = setup
    record(study, cohort, researcher, at=days_ago(9), kind=Stimulus.ELECTRICAL, voltage_v=8.0, electrode_gap_cm=4.0,
           pulse_width_ms=10.0, pulse_count=20, pulse_frequency_hz=2.0, wavelength=None, irradiance=None, duration=None)
    trial = Trial.objects.get()
    assert (trial.field_v_cm, trial.pulse_on_s, trial.train_s, trial.dose_mj_cm2) == (2.0, 0.2, 10.0, None)


def test_settings_of_another_stimulus_type_are_not_stored(setup, researcher):
    _, cohort, study = setup
    record(study, cohort, researcher, at=days_ago(9), kind=Stimulus.NONE, voltage_v=30.0)
    trial = Trial.objects.get()
    assert (trial.voltage_v, trial.irradiance_mw_cm2, trial.dose_mj_cm2) == (None, None, None)


def test_censored_dispersal_is_stored_at_the_window(setup, researcher):
    _, cohort, study = setup
    record(study, cohort, researcher, at=days_ago(9), disperse_s=None, censored=True)
    trial = Trial.objects.get()
    assert (trial.disperse_s, trial.censored, trial.dispersed) == (600.0, True, False)


def test_dispersal_after_the_window_is_refused(setup, researcher):
    _, cohort, study = setup
    with pytest.raises(ValidationError):
        record(study, cohort, researcher, at=days_ago(9), disperse_s=700)
    assert not Trial.objects.exists()


@pytest.mark.parametrize("field,value,words", [
    ("water_temp_c", 60.0, "Water temperature 60 °C is not possible here: allowed range 0–45 °C."),
    ("irradiance_mw_cm2", -1.0, "Irradiance -1 mW/cm² is not possible here: allowed range 0–1000 mW/cm²."),
    ("wavelength_nm", 5000.0, "Wavelength 5000 nm is not possible here: allowed range 200–1100 nm."),
])
def test_physically_impossible_values_are_refused_naming_field_value_and_range(setup, researcher, field, value, words):
    _, cohort, study = setup
    values = {"irradiance": value} if field == "irradiance_mw_cm2" else \
        {"wavelength": value} if field == "wavelength_nm" else {field: value}
    with pytest.raises(ValidationError) as error:
        record(study, cohort, researcher, at=days_ago(9), **values)
    assert words in error.value.message_dict[field]
    assert not Trial.objects.exists()


def test_order_checks_run_before_draw_future_and_early_mortality(setup, researcher):
    _, cohort, study = setup
    with pytest.raises(ValidationError, match="before cohort"):
        record(study, cohort, researcher, at=days_ago(11))
    with pytest.raises(ValidationError, match="in the future"):
        record(study, cohort, researcher, at=days_ago(-1))
    with pytest.raises(ValidationError, match="24 h after"):
        record(study, cohort, researcher, at=days_ago(0.5), mortality_24h=1)
    assert not Trial.objects.exists()


def test_exposure_limit_refuses_the_fourth_trial(setup, researcher):
    _, cohort, study = setup
    for n in (9, 8, 7):
        record(study, cohort, researcher, at=days_ago(n))
    with pytest.raises(services.LimitRefused, match="exposure 4 of dish") as refusal:
        record(study, cohort, researcher, at=days_ago(6))
    assert refusal.value.overridable
    assert Trial.objects.count() == 3


def test_rest_limit_refuses_a_trial_too_soon_after_the_last(setup, researcher):
    _, cohort, study = setup
    record(study, cohort, researcher, at=days_ago(9))
    with pytest.raises(services.LimitRefused, match=r"Rest since the last exposure of dish C-\d{4}-D1 would be 12\.0 h"):
        record(study, cohort, researcher, at=days_ago(8.5))


def test_cumulative_dose_limit(setup, researcher):
    _, cohort, study = setup  # protocol allows 150 mJ/cm² per cohort and 100 per exposure
    record(study, cohort, researcher, at=days_ago(9), irradiance=5, duration=16)  # 80
    with pytest.raises(services.LimitRefused, match="Cumulative dose of dish .* would be 160 mJ/cm²"):
        record(study, cohort, researcher, at=days_ago(8), irradiance=5, duration=16)


def test_animals_per_trial_limit(researcher, protocol):
    cohort = make_cohort(user=researcher, protocol=protocol, animals=20, at=days_ago(10))
    study = make_study(user=researcher, protocol=protocol)
    with pytest.raises(services.LimitRefused, match="Animals per trial 13 is above the protocol maximum of 12"):
        record(study, cohort, researcher, at=days_ago(9), animals=13)


def test_per_exposure_setting_limit(setup, researcher):
    _, cohort, study = setup
    with pytest.raises(services.LimitRefused, match="Irradiance 6 mW/cm² is above the protocol maximum of 5"):
        record(study, cohort, researcher, at=days_ago(9), irradiance=6.0, duration=2)


def test_a_researcher_cannot_override_and_nothing_is_saved(setup, researcher):
    _, cohort, study = setup
    record(study, cohort, researcher, at=days_ago(9))
    with pytest.raises(PermissionDenied):
        record(study, cohort, researcher, at=days_ago(8.9), override_reason="I am sure")
    assert Trial.objects.count() == 1 and not Override.objects.exists()


def test_a_managers_override_saves_the_trial_and_opens_a_deviation(setup, researcher, manager):
    protocol, cohort, study = setup
    for n in (9, 8, 7):
        record(study, cohort, researcher, at=days_ago(n))
    result = record(study, cohort, manager, at=days_ago(6), override_reason="Replacement dish; animals healthy")
    override = Override.objects.get()
    assert override.trial == result.trial and override.recorded_by == manager
    dish = result.trial.dish
    assert override.breaches == [f"This would be exposure 4 of dish {dish.label}; the protocol allows 3."]
    deviation = Deviation.objects.get()
    assert override.deviation == deviation == result.deviation
    assert deviation.rule == Deviation.Rule.PROTOCOL_LIMIT
    assert deviation.tank_id == cohort.origin_tank_id
    assert deviation.subject == f"dish:{dish.pk}"  # the group of animals the limits count
    assert deviation.evidence[0]["reason"] == "Replacement dish; animals healthy"
    assert deviation.evidence[0]["ref"] == f"trial:{result.trial.pk}"
    assert protocol.reference in deviation.summary


def test_override_deviation_of_a_blinded_study_names_the_limit_but_not_the_values(researcher, manager, protocol):
    cohort = make_cohort(user=researcher, protocol=protocol, at=days_ago(10))
    study = make_study(user=researcher, protocol=protocol, replicates=3, blinded=True)
    record(study, cohort, researcher, at=days_ago(9))
    record(study, cohort, manager, at=days_ago(8.9), override_reason="UV arm needed a repeat at 30 mJ/cm²")
    deviation = Deviation.objects.get()
    assert "rest" in deviation.summary and "values hidden while study" in deviation.summary
    assert "30 mJ" not in deviation.summary and "30 mJ" not in str(deviation.evidence)
    assert deviation.evidence[0]["reason"].startswith("hidden while study")


def test_override_deviation_of_a_blinded_study_does_not_name_a_stimulus_limit(researcher, manager, protocol):
    # A dose or irradiance limit would tell every reader of the deviation that the trial was a light condition.
    cohort = make_cohort(user=researcher, protocol=protocol, at=days_ago(10))
    study = make_study(user=researcher, protocol=protocol, replicates=3, blinded=True)
    record(study, cohort, manager, at=days_ago(9), irradiance=5.0, duration=30,  # 150 mJ/cm² > 100 per exposure
           override_reason="Dose step agreed with the welfare officer")
    deviation = Deviation.objects.get()
    assert "a stimulus limit (values hidden while study" in deviation.summary
    assert "dose" not in deviation.summary.lower() and "dose" not in str(deviation.evidence).lower()
    assert deviation.evidence[0]["limits"] == ["a stimulus limit"]


def test_a_second_override_on_the_same_cohort_adds_evidence_to_the_open_deviation(researcher, manager, protocol):
    cohort = make_cohort(user=researcher, protocol=protocol, at=days_ago(10))
    study = make_study(user=researcher, protocol=protocol, replicates=3)
    record(study, cohort, researcher, at=days_ago(9))
    record(study, cohort, manager, at=days_ago(8.9), override_reason="Timing slip 1")
    record(study, cohort, manager, at=days_ago(8.8), override_reason="Timing slip 2")
    deviation = Deviation.objects.get()
    assert deviation.evidence_count == 2


def test_hard_breaches_cannot_be_overridden_even_by_a_manager(setup, manager):
    protocol, cohort, study = setup
    protocol.status = protocol.Status.SUSPENDED
    protocol.save()
    with pytest.raises(services.LimitRefused, match="suspended") as refusal:
        record(study, cohort, manager, at=days_ago(9), override_reason="Please")
    assert not refusal.value.overridable
    assert not Trial.objects.exists() and not Deviation.objects.exists()


def test_a_cohort_from_another_protocol_does_not_fit_the_study(setup, researcher):
    _, _, study = setup
    other = make_cohort(user=researcher, protocol=make_protocol(), at=days_ago(10))
    with pytest.raises(services.Refused, match="was drawn under protocol"):
        record(study, other, researcher, at=days_ago(9))


def test_a_slot_takes_one_trial(setup, researcher):
    _, cohort, study = setup
    record(study, cohort, researcher, slot=1, at=days_ago(9))
    with pytest.raises(services.Refused, match="already has a trial"):
        record(study, cohort, researcher, slot=1, at=days_ago(8))


def test_scoring_corrects_with_history_and_locking_stops_it(setup, researcher):
    _, cohort, study = setup
    result = record(study, cohort, researcher, at=days_ago(9), disperse_s=None, aggregate_s=None)
    trial = result.trial
    assert not trial.is_scored
    services.score_trial(user=researcher, trial=trial, values={"disperse_s": 200.0, "censored": False})
    services.score_trial(user=researcher, trial=trial, values={"disperse_s": 210.0, "censored": False},
                         reason="Misread the timer")
    trial.refresh_from_db()
    assert trial.disperse_s == 210.0
    assert [h.history_change_reason for h in trial.history.order_by("history_id")][-2:] == \
        ["Outcome scored", "Outcome corrected: Misread the timer"]
    study.blinded = True
    study.save()
    services.unblind(user=researcher, study=study, reason="All scored", password="pw")
    with pytest.raises(services.Refused, match="locked"):
        services.score_trial(user=researcher, trial=trial, values={"disperse_s": 5.0}, reason="late")


def test_the_owner_unblinds_with_a_reason_and_outcomes_lock_first(researcher, manager, protocol):
    from colonies.roles import RESEARCHER
    from tests.factories import make_user
    study = make_study(user=researcher, protocol=protocol, blinded=True)
    assert study.hides_conditions_from(manager) and study.hides_conditions_from(researcher)  # the owner too
    with pytest.raises(PermissionDenied):
        services.unblind(user=make_user("rival", role=RESEARCHER), study=study, reason="curious", password="pw")
    with pytest.raises(services.Refused, match="reason"):
        services.unblind(user=researcher, study=study, reason="", password="pw")
    services.unblind(user=researcher, study=study, reason="Analysis plan complete", password="pw")
    study.refresh_from_db()
    assert study.unblinded_by == researcher and study.outcomes_locked_at <= study.unblinded_at
    assert not study.hides_conditions_from(manager)


def test_a_manager_who_must_see_unblinds_with_a_reason_kept_in_the_history(researcher, manager, protocol):
    study = make_study(user=researcher, protocol=protocol, blinded=True)
    with pytest.raises(services.Refused, match="reason"):
        services.unblind(user=manager, study=study, reason=" ", password="pw")
    services.unblind(user=manager, study=study, reason="Welfare review of dish deaths", password="pw")
    study.refresh_from_db()
    assert (study.unblinded_by, study.unblind_reason) == (manager, "Welfare review of dish deaths")
    latest = study.history.latest("history_date")
    assert latest.history_user == manager and "Welfare review of dish deaths" in latest.history_change_reason


def test_exclude_and_void_need_reasons_and_void_frees_the_exposure(setup, researcher):
    _, cohort, study = setup
    first = record(study, cohort, researcher, at=days_ago(9)).trial
    services.exclude_trial(user=researcher, trial=first, reason="Clump never formed")
    assert services.dish_state(first.dish, days_ago(0)).exposures == 1  # excluded trials still exposed animals
    with pytest.raises(services.Refused):
        services.void_trial(user=researcher, trial=first, reason="")
    services.void_trial(user=researcher, trial=first, reason="Entered under the wrong study")
    assert services.dish_state(first.dish, days_ago(0)).exposures == 0


def test_attachment_is_stored_with_its_sha256(setup, researcher, settings, tmp_path):
    settings.MEDIA_ROOT = tmp_path
    _, cohort, study = setup
    trial = record(study, cohort, researcher, at=days_ago(9)).trial
    body = b"\x89PNG fake image bytes"
    upload = SimpleUploadedFile("dish-07.png", body, content_type="image/png")
    attachment = services.add_attachment(user=researcher, trial=trial, upload=upload, kind="photo")
    # SHA-256 by FIPS 180-4, computed independently with hashlib
    assert attachment.sha256 == hashlib.sha256(body).hexdigest()
    assert attachment.size_bytes == len(body)
    assert services.file_checksum(attachment) == attachment.sha256


def test_uv_values_builder_is_inside_the_default_protocol(researcher, protocol):
    assert services.limits.check_exposure(protocol.terms(), services.limits.GroupState("C", 10, False, 0, None, 0),
                                          services.limits.Proposal(days_ago(1), 10, "uv", {"dose_mj_cm2": 20.0,
                                                                                           "irradiance_mw_cm2": 2,
                                                                                           "duration_s": 10,
                                                                                           "wavelength_nm": 365}),
                                          days_ago(1).date()) == []
    assert uv_values()["kind"] == Stimulus.UV


def test_visible_light_below_the_uv_edge_is_refused_not_checked_against_the_light_allowance(researcher):
    light = {"kind": Stimulus.LIGHT, "max_irradiance_mw_cm2": 50.0, "max_duration_s": 600}
    protocol = make_protocol(allowances=(light,))
    cohort = make_cohort(user=researcher, protocol=protocol, at=days_ago(10))
    study = make_study(user=researcher, protocol=protocol)
    with pytest.raises(ValidationError) as error:
        record(study, cohort, researcher, at=days_ago(9), kind=Stimulus.LIGHT, wavelength=365.0)
    [message] = error.value.message_dict["wavelength_nm"]
    assert "365 nm is ultraviolet" in message and "400 nm" in message and "Ultraviolet light" in message
    assert not Trial.objects.exists()
    record(study, cohort, researcher, at=days_ago(9), kind=Stimulus.LIGHT, wavelength=470.0)  # blue light passes


def test_correcting_a_scored_trial_without_a_reason_is_refused_and_changes_nothing(setup, researcher):
    _, cohort, study = setup
    trial = record(study, cohort, researcher, at=days_ago(9)).trial  # scored on entry: 120 s
    with pytest.raises(services.Refused, match="give a reason"):
        services.score_trial(user=researcher, trial=trial, values={"disperse_s": 5.0}, reason="  ")
    trial.refresh_from_db()
    assert trial.disperse_s == 120 and trial.history.count() == 1


def test_a_draw_in_the_future_is_refused(researcher, protocol):
    from datetime import timedelta

    from django.utils import timezone

    from experiments.models import Cohort
    from tests.experiments.builders import make_stocked_tank, today
    tank = make_stocked_tank(user=researcher)
    booking = services.book(user=researcher, protocol=protocol, tank=tank, animals=5, needed_on=today())
    with pytest.raises(services.Refused, match="in the future"):
        services.draw(user=researcher, booking=booking, at=timezone.now() + timedelta(hours=1))
    assert not Cohort.objects.exists()
