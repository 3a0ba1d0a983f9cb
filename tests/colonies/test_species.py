"""Species care profiles: read by everyone with a role, edited by managers with a reason."""
import re

import pytest
from django.urls import reverse

from colonies.models import CareTarget, Species
from tests.factories import make_species, make_tank, page_text, species_edit_data


@pytest.fixture
def species(db):
    return make_species(scientific_name="Testworm exemplaris", common_name="Test worm", targets={"ph": (6.0, 8.0), "do_pct_sat": (30.0, None)},
                        sources={"feeding_interval_days": "lab setting"})


def test_species_list_counts_tanks_in_use(client, researcher, species):
    make_tank(species=species)
    make_tank(species=species, status="retired")
    client.force_login(researcher)

    response = client.get(reverse("colonies:species-list"))

    listed = {s.scientific_name: s.n_tanks for s in response.context["species_list"]}
    assert listed["Testworm exemplaris"] == 1


def test_species_page_shows_targets_and_sources(client, researcher, species):
    client.force_login(researcher)

    response = client.get(reverse("colonies:species-detail", args=[species.pk]))

    text = page_text(response)
    assert "test value" in text  # the care target's source
    assert ("Feeding interval (days)", "lab setting") in response.context["sources"]
    assert "feeding_interval_days" not in text
    rows = {p.key: t for p, t, _ in response.context["rows"]}
    assert (rows["ph"].low, rows["ph"].high) == (6.0, 8.0)
    assert rows["temp_c"] is None
    assert "salinity" not in rows  # marine only


def test_species_page_shows_derived_targets_with_their_source_and_method(client, researcher, db):
    from colonies import care_defaults, derived
    blackworm = Species.objects.get(scientific_name="Lumbriculus variegatus")  # installed by the migrations
    client.force_login(researcher)

    response = client.get(reverse("colonies:species-detail", args=[blackworm.pk]))

    rows = {p.key: (t, method) for p, t, method in response.context["rows"]}
    target, method = rows["do_pct_sat"]
    # OECD TG 225 (2007): dissolved oxygen not below 30 % of air saturation (the default profile's source)
    assert (target.low, target.high) == (30.0, None) and target.source.startswith(care_defaults.OECD_225)
    assert method == derived.BY_KEY["do_pct_sat"].method
    assert rows["nh3_mg_l"] == (None, derived.BY_KEY["nh3_mg_l"].method)  # shown, with no target set
    text = " ".join(re.sub(r"<[^>]+>", " ", page_text(response)).split())  # what a reader sees
    assert "Oxygen saturation (% air sat.) derived ≥ 30 % air sat." in text
    assert "Emerson et al. 1975" in text and care_defaults.OECD_225 in text


def test_species_page_shows_its_change_history_readably(client, manager, species):
    client.force_login(manager)
    data = species_edit_data(species, reason="Aligned with SOP v3", census_interval_days=7)
    row = next(k for k, v in data.items() if k.startswith("targets-") and v == "do_pct_sat").rsplit("-", 1)[0]
    data[f"{row}-low"] = "40"
    assert client.post(reverse("colonies:species-edit", args=[species.pk]), data).status_code == 302

    response = client.get(reverse("colonies:species-detail", args=[species.pk]))

    changes = {(e["what"], c.label, c.old, c.new) for e in response.context["entries"] for c in e["changes"]}
    assert ("Care profile", "Census interval", "14 days", "7 days") in changes
    assert ("Care target: Oxygen saturation (% air sat.)", "Low", "30", "40") in changes
    text = page_text(response)
    assert "Aligned with SOP v3" in text and "census_interval_days" not in text


def test_manager_edits_profile_and_adds_a_target_with_a_reason(client, manager, species):
    client.force_login(manager)

    response = client.post(reverse("colonies:species-edit", args=[species.pk]), species_edit_data(
        species, reason="Aligned with SOP v3", feeding_interval_days=4,
        new_targets=[("temp_c", 19.0, 23.0, "SOP v3")]))

    assert response.status_code == 302
    species.refresh_from_db()
    assert species.feeding_interval_days == 4
    latest = species.history.order_by("-history_date", "-history_id").first()
    assert (latest.history_user, latest.history_change_reason) == (manager, "Aligned with SOP v3")
    target = CareTarget.objects.get(species=species, parameter="temp_c")
    assert (target.low, target.high, target.source) == (19.0, 23.0, "SOP v3")
    assert target.history.get().history_change_reason == "Aligned with SOP v3"


def test_profile_edit_without_reason_is_refused(client, manager, species):
    client.force_login(manager)

    response = client.post(reverse("colonies:species-edit", args=[species.pk]),
                           species_edit_data(species, reason="", feeding_interval_days=4))

    assert response.status_code == 400
    species.refresh_from_db()
    assert species.feeding_interval_days != 4
    assert species.history.count() == 1


@pytest.mark.parametrize("new_target,field", [
    (("temp_c", 25.0, 19.0, "typo"), "high"),  # low above high
    (("ph", None, None, "x"), None),  # duplicate parameter (ph exists)
    (("do_mg_l", -1.0, 8.0, "typo"), "low"),  # outside the physical range
])
def test_invalid_care_target_is_refused_and_nothing_saved(client, manager, species, new_target, field):
    client.force_login(manager)
    key, low, high, source = new_target
    data = species_edit_data(species, feeding_interval_days=4, new_targets=[(key, "" if low is None else low,
                                                                             "" if high is None else high, source)])

    response = client.post(reverse("colonies:species-edit", args=[species.pk]), data)

    assert response.status_code == 400
    assert CareTarget.objects.filter(species=species).count() == 2  # the fixture's pH and DO % targets only
    species.refresh_from_db()
    assert species.feeding_interval_days != 4
    if field:
        assert field in response.context["targets"].forms[2].errors


def test_species_edit_of_unknown_species_is_404(client, manager):
    client.force_login(manager)
    assert client.get(reverse("colonies:species-edit", args=[999999])).status_code == 404
    assert Species.objects.filter(pk=999999).count() == 0


# ---------------------------------------------------------------------------------------------
# Measurement plans on the care profile
# ---------------------------------------------------------------------------------------------
def test_species_page_says_which_plans_are_defaults_and_which_the_profile_sets(client, researcher, species):
    from colonies.models import MeasurementPlan

    MeasurementPlan.objects.create(species=species, parameter="ph", cadence="every_n_days", every_days=3)
    client.force_login(researcher)

    plans = {p.key: plan for p, plan in client.get(reverse("colonies:species-detail", args=[species.pk])).context["plans"]}

    assert (plans["ph"].text(), plans["ph"].source) == ("every 3 days", "species")
    assert (plans["temp_c"].text(), plans["temp_c"].source) == ("daily", "default")
    assert "salinity" not in plans  # marine only


def test_manager_sets_a_measurement_plan_with_a_reason_kept_in_its_history(client, manager, species):
    client.force_login(manager)
    data = species_edit_data(species, reason="Weekly nitrate per SOP 4",
                             new_plans=[{"parameter": "no3_mg_l", "cadence": "weekly", "weekday": 2,
                                         "after_water_change": True}])

    response = client.post(reverse("colonies:species-edit", args=[species.pk]), data)

    assert response.status_code == 302, page_text(response)
    plan = species.measurement_plans.get(parameter="no3_mg_l")
    assert plan.as_plan("species").text() == "weekly on Wednesday, after each water change"
    version = plan.history.get()
    assert (version.history_user, version.history_change_reason) == (manager, "Weekly nitrate per SOP 4")


@pytest.mark.parametrize("plan,field,words", [
    ({"parameter": "ph", "cadence": "weekly"}, "weekday", "Weekday: choose the day of the week"),
    ({"parameter": "ph", "cadence": "every_n_days"}, "every_days", "Every N days: give the number of days (2 to 90)"),
    ({"parameter": "ph", "cadence": "every_n_days", "every_days": 200}, "every_days", "Every N days"),
])
def test_an_incomplete_plan_is_refused_naming_the_field_and_nothing_is_saved(client, manager, species, plan, field, words):
    client.force_login(manager)

    response = client.post(reverse("colonies:species-edit", args=[species.pk]),
                           species_edit_data(species, common_name="Renamed", new_plans=[plan]))

    assert response.status_code == 400
    assert words in page_text(response)
    species.refresh_from_db()
    assert species.common_name == "Test worm" and not species.measurement_plans.exists()


def test_a_plan_keeps_no_stray_day_or_weekday(client, manager, species):
    client.force_login(manager)
    client.post(reverse("colonies:species-edit", args=[species.pk]),
                species_edit_data(species, new_plans=[{"parameter": "ph", "cadence": "daily", "every_days": 5,
                                                       "weekday": 3}]))
    plan = species.measurement_plans.get()
    assert (plan.cadence, plan.every_days, plan.weekday) == ("daily", None, None)


# ---------------------------------------------------------------------------------------------
# Husbandry defaults (pre-filled on the feeding and water-change forms of a tank with no entry yet)
# ---------------------------------------------------------------------------------------------
def test_manager_sets_the_feeding_and_water_defaults_and_the_profile_shows_them(client, manager, species):
    client.force_login(manager)
    response = client.post(reverse("colonies:species-edit", args=[species.pk]), species_edit_data(
        species, default_food="liver paste", default_feeding_amount="0.3", default_feeding_unit="mL",
        default_source_water="1x planarian salts"))
    assert response.status_code == 302
    species.refresh_from_db()
    assert (species.default_food, species.default_feeding_amount, species.default_feeding_unit,
            species.default_source_water) == ("liver paste", 0.3, "mL", "1x planarian salts")
    assert species.history.first().history_change_reason == "Reviewed against the SOP"
    text = page_text(client.get(species.get_absolute_url()))
    assert "0.3 mL liver paste" in text and "1x planarian salts" in text


@pytest.mark.parametrize("amount,unit,message", [
    ("2000", "g", "Default feeding amount: 2000 g is impossible; allowed range 0 to 1000 g."),
    ("101", "pinch", "Default feeding amount: 101 pinch is impossible; allowed range 0 to 100 pinch."),
    ("-1", "mg", "Default feeding amount: -1 is impossible; allowed range 0 to 1000000."),
])
def test_an_impossible_default_amount_for_its_unit_is_refused(client, manager, species, amount, unit, message):
    client.force_login(manager)
    response = client.post(reverse("colonies:species-edit", args=[species.pk]), species_edit_data(
        species, default_food="pellets", default_feeding_amount=amount, default_feeding_unit=unit))
    assert response.status_code == 400
    assert message in page_text(response)
    species.refresh_from_db()
    assert species.default_feeding_amount is None


def test_the_database_refuses_a_default_amount_above_its_units_maximum(species):
    from django.db import IntegrityError, transaction
    with pytest.raises(IntegrityError), transaction.atomic():
        Species.objects.filter(pk=species.pk).update(default_feeding_amount=150, default_feeding_unit="pinch")


def test_the_back_office_species_form_has_the_defaults(client, superuser, species):
    client.force_login(superuser)
    text = page_text(client.get(reverse("admin:colonies_species_change", args=[species.pk])))
    for name in ("default_food", "default_feeding_amount", "default_feeding_unit", "default_source_water"):
        assert f'name="{name}"' in text
