"""The methods draft page and download, and the validity criteria on the study page, from the records.

Numbers are checked against values computed directly from the fixture's rows (numpy as the reference for
medians); the blinding test searches every response for the condition labels, the stimulus value and the
seed; query counts are asserted at two data sizes. Access per role and 405s are in test_access.py.
"""
import numpy as np
import pytest
from django.urls import reverse

from colonies.models import Census, Deviation, Feeding, WaterChange
from colonies.roles import RESEARCHER
from experiments import methods, methods_records, services
from experiments.models import Study
from tests.experiments.builders import days_ago, make_cohort, make_stocked_tank, make_study, record
from tests.factories import make_check, make_user, page_text

GLOW, SHAM = "Obsidian-glow", "Sable-sham"
SEED = 7310442


def _study(researcher, protocol, technician, *, n_cohorts=1, blinded=False, code="meth-1"):
    """A tank LV-M1 (2 L) with checks, feedings, water changes and censuses; `n_cohorts` cohorts of 30 animals
    drawn from it 10 days ago, each with one dish run three times (days 9, 8 and 7 ago)."""
    tank = make_stocked_tank(estimate=1000, reserve=0, user=technician, code=f"LV-{code[-2:].upper()}",
                             volume_l=2.0, observed_at=days_ago(20))
    study = make_study(user=researcher, protocol=protocol, conditions=(SHAM, GLOW), replicates=2 * n_cohorts,
                       blinded=blinded, code=code, seed=SEED)
    for _ in range(n_cohorts):
        cohort = make_cohort(user=researcher, protocol=protocol, tank=tank, animals=30, at=days_ago(10))
        for day, dead in ((9, 1), (8, 0), (7, 2)):
            record(study, cohort, researcher, at=days_ago(day), animals=10, mortality_24h=dead,
                   irradiance=2.345, water_temp_c=20.0 + day / 10)
    for day, temp, ph, do in ((9.5, 20.0, 7.0, 8.0), (8.5, 23.0, 7.2, 6.0), (7.5, 21.0, None, 7.0)):
        make_check(tank, user=technician, observed_at=days_ago(day), temp_c=temp, ph=ph, do_mg_l=do)
    make_check(tank, user=technician, observed_at=days_ago(15), temp_c=30.0, do_mg_l=1.0)  # before the period
    make_check(tank, user=technician, observed_at=days_ago(3), temp_c=10.0, do_mg_l=1.0)  # after it
    for day, amount in ((9.6, 0.1), (8.6, 0.3), (7.6, 0.2)):
        Feeding.objects.create(tank=tank, recorded_by=technician, observed_at=days_ago(day), food="spirulina",
                               amount=amount, unit="g")
    WaterChange.objects.create(tank=tank, recorded_by=technician, observed_at=days_ago(8.4), percent=50,
                               source_water="aged tap water")
    Census.objects.create(tank=tank, recorded_by=technician, method=Census.Method.DIRECT, direct_count=800,
                          estimate=800, observed_at=days_ago(8.3))
    return study


@pytest.fixture
def study(researcher, protocol, technician):
    return _study(researcher, protocol, technician)


def _text(client, user, study, name="experiments:study-methods"):
    client.force_login(user)
    response = client.get(reverse(name, args=[study.code]))
    assert response.status_code == 200
    return page_text(response) if name == "experiments:study-methods" else response.content.decode()


def test_draft_numbers_equal_those_computed_from_the_records(client, researcher, study):
    text = _text(client, researcher, study, "experiments:study-methods-md")
    # The checks inside the period: temperatures 20, 23, 21 °C (the 30 and 10 °C checks are outside it).
    assert np.median([20.0, 23.0, 21.0]) == 21.0
    assert "temperature median 21.0 °C (range 20.0–23.0 °C, n = 3)" in text
    assert "dissolved oxygen median 7.00 mg/L (range 6.00–8.00 mg/L, n = 3)" in text
    assert "pH median 7.10 (range 7.00–7.20, n = 2)" in text
    # Feedings 1.0 and 1.0 days apart (9.6, 8.6, 7.6 days ago); amounts 0.1, 0.3, 0.2 g.
    assert "Fed 3 times (spirulina; amount median 0.20 g (range 0.10–0.30 g, n = 3); every median 1.0 days" in text
    # Census 1000 before the period and 800 in it, tank 2 L: 500 and 400 animals/L.
    assert "median 450 animals/L (range 400–500 animals/L, n = 2)" in text
    # Three trials of 10 animals on one dish holding the cohort's 30; dead at 24 h 1 + 0 + 2 = 3.
    assert "3 trials were recorded (voided trials not counted), on 1 dish holding 30 animals in all, from 1 cohort." \
        in text
    assert "Trials per dish: median 3.0 (range 3.0–3.0, n = 1)" in text
    assert "Dead 24 h after a trial: 3 in 3 trials with a count, whose arenas held 30 animals" in text
    assert "3 checks, 3 feedings, 1 water change, 2 censuses" in text
    assert f"seed {SEED}" in text and "Lumbriculus" not in text  # the species is the test species, by name
    assert study.protocol.reference in text


def test_adverse_events_count_the_dishes_deviations_whenever_opened_and_the_tanks_in_the_period(
        client, researcher, study):
    dish = study.trials.first().dish
    tank = dish.cohort.origin_tank
    rule = Deviation.Rule
    Deviation.objects.create(rule=rule.PROTOCOL_LIMIT, subject=dish.subject, severity=Deviation.Severity.MAJOR,
                             opened_at=days_ago(1), last_seen_at=days_ago(1), summary="Rest limit overridden")
    Deviation.objects.create(tank=tank, rule=rule.MISSED_CHECK, opened_at=days_ago(30), last_seen_at=days_ago(30),
                             summary="No check")  # before the period: not this study's
    text = _text(client, researcher, study, "experiments:study-methods-md")
    assert "Protocol limit overridden (major) × 1" in text
    assert rule.MISSED_CHECK.label not in text


def test_the_download_is_markdown_named_by_the_study(client, researcher, study):
    client.force_login(researcher)
    response = client.get(reverse("experiments:study-methods-md", args=[study.code]))
    assert response["Content-Type"] == "text/markdown; charset=utf-8"
    assert response["Content-Disposition"] == f'attachment; filename="methods-{study.code}.md"'
    assert response.content.decode().startswith(f"# Methods draft: {study.code}")


def test_blind_draft_shows_pooled_numbers_only_for_everyone(client, researcher, manager, protocol, technician):
    study = _study(researcher, protocol, technician, blinded=True, code="meth-b")
    operator = researcher  # the owner ran the trials here: even the operator's draft is pooled
    for user in (operator, manager):
        for name in ("experiments:study-methods", "experiments:study-methods-md"):
            text = _text(client, user, study, name)
            for secret in (GLOW, SHAM, "2.345", str(SEED)):
                assert secret not in text, (user, name, secret)
            assert "3 trials were recorded" in text
    services.unblind(user=researcher, study=study, reason="All scored", password="pw")
    text = _text(client, manager, study, "experiments:study-methods-md")
    assert GLOW in text and str(SEED) in text and "2.345" in text


@pytest.mark.parametrize("n", [1, 3])
def test_query_counts_do_not_grow_with_the_data(client, content_types_cached, researcher, protocol, technician, manager,
                                                django_assert_max_num_queries, n):
    study = _study(researcher, protocol, technician, n_cohorts=n, code=f"meth-q{n}")
    methods_records.set_validity_criteria(user=researcher, study=study, criteria=[
        {"kind": "temperature_band", "low_c": 18, "high_c": 24}, {"kind": "reference_survival", "min_pct": 80}])
    client.force_login(manager)
    # session, user, roles, study; trials, measurements, checks, feedings, water changes, censuses, removals,
    # deviations. The study page: its own 6 and one for the source tanks' checks.
    pages = {reverse("experiments:study-methods", args=[study.code]): 12,
             reverse("experiments:study-methods-md", args=[study.code]): 12,
             study.get_absolute_url(): 8}  # 8: with the validity evidence and the signatures
    for url, limit in pages.items():
        with django_assert_max_num_queries(limit):
            assert client.get(url).status_code == 200


def test_study_page_states_each_criterion_with_its_evidence(client, researcher, study):
    methods_records.set_validity_criteria(user=researcher, study=study, criteria=[
        {"kind": "temperature_band", "low_c": 18, "high_c": 22}, {"kind": "reference_survival", "min_pct": 80},
        {"kind": "oxygen_floor", "min_mg_l": 5}, {"kind": "ph_band", "low": 6, "high": 9}])
    client.force_login(researcher)
    results = {r.kind: r for r in client.get(study.get_absolute_url()).context["validity"]}
    # Tank temperatures 20-23 °C: 23 is above 22, not met. DO 6-8 mg/L >= 5: met. pH 7.0-7.2 within 6-9: met.
    assert results["temperature_band"].status == "not met"
    assert "3 checks of the source tanks" in results["temperature_band"].evidence
    assert "3 trial arenas: 20.7–20.9 °C" in results["temperature_band"].evidence  # 20 + day/10, days 7-9
    assert results["oxygen_floor"].status == "met" and "lowest 6.00 mg/L" in results["oxygen_floor"].evidence
    assert results["ph_band"].status == "met"
    ref = [t for t in study.trials.all() if t.condition == SHAM]
    animals, dead = sum(t.animals for t in ref), sum(t.mortality_24h for t in ref)
    expected = "met" if 100 * (animals - dead) / animals >= 80 else "not met"
    assert results["reference_survival"].status == expected
    assert f"{animals - dead} of {animals} animals alive" in results["reference_survival"].evidence
    draft = client.get(reverse("experiments:study-methods", args=[study.code]))
    assert "Validity criteria" in page_text(draft) and "NOT MET" in page_text(draft)


def test_criteria_form_saves_and_bad_values_name_the_field_and_range(client, researcher, study):
    client.force_login(researcher)
    url = reverse("experiments:study-validity", args=[study.code])
    response = client.post(url, {"use": ["ph_band", "oxygen_floor"], "ph_band.low": "6", "ph_band.high": "9",
                                 "oxygen_floor.min_mg_l": "45"}, follow=True)
    assert "Dissolved oxygen, minimum: 45 is outside the allowed range 0 to 30 mg/L." in page_text(response)
    study.refresh_from_db()
    assert study.validity_criteria == []  # nothing saved
    client.post(url, {"use": ["ph_band"], "ph_band.low": "6", "ph_band.high": "9"})
    study.refresh_from_db()
    assert study.validity_criteria == [{"kind": "ph_band", "low": 6.0, "high": 9.0}]
    assert study.history.first().history_change_reason == "Validity criteria declared"


def test_criteria_are_fixed_after_unblinding_and_owned_by_the_owner(client, researcher, protocol, technician):
    study = _study(researcher, protocol, technician, blinded=True, code="meth-u")
    other = make_user("olaf", role=RESEARCHER)
    client.force_login(other)
    url = reverse("experiments:study-validity", args=[study.code])
    assert client.post(url, {"use": ["ph_band"], "ph_band.low": "6", "ph_band.high": "9"}).status_code == 403
    services.unblind(user=researcher, study=study, reason="All scored", password="pw")
    client.force_login(researcher)
    response = client.post(url, {"use": ["ph_band"], "ph_band.low": "6", "ph_band.high": "9"}, follow=True)
    assert "fixed once outcomes are locked" in page_text(response)
    assert Study.objects.get(pk=study.pk).validity_criteria == []


def test_blind_study_cannot_tell_reference_survival(client, researcher, protocol, technician):
    study = _study(researcher, protocol, technician, blinded=True, code="meth-s")
    methods_records.set_validity_criteria(user=researcher, study=study,
                                          criteria=[{"kind": "reference_survival", "min_pct": 80}])
    client.force_login(researcher)
    [result] = client.get(study.get_absolute_url()).context["validity"]
    assert result.status == "cannot tell" and "blind" in result.evidence


def test_software_versions_in_the_draft_are_the_installed_ones(client, researcher, study):
    text = _text(client, researcher, study, "experiments:study-methods-md")
    versions = methods.software_versions()
    assert f"SciPy {versions['scipy']}" in text and f"statsmodels {versions['statsmodels']}" in text
