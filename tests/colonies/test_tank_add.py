"""Recording on the tank page: a check, a feeding, a water change, a census."""
import re
from datetime import timedelta

import pytest

from vermilog.lab_time import lab_moment
from django.urls import reverse
from django.utils import timezone

from colonies import validators
from colonies.models import Census, Check, Feeding, Tank, WaterChange
from tests.factories import make_species, make_tank, page_text


@pytest.fixture
def tank(db):
    return make_tank(code="FW-01", volume_l=2.0, species=make_species(targets={"ph": (6.0, 8.0)}))


def _add(client, tank, kind, data):
    return client.post(reverse("colonies:tank-add", args=[tank.code, kind]), data)


# ---------------------------------------------------------------------------------------------
# Check
# ---------------------------------------------------------------------------------------------
def test_check_from_tank_page_is_saved_with_flags_and_history(client, technician, tank):
    client.force_login(technician)

    response = _add(client, tank, "check", {"check-ph": "8.5", "check-temp_c": "22"})

    assert response.status_code == 302
    assert response["Location"] == tank.get_absolute_url()
    check = Check.objects.get()
    assert (check.ph, check.temp_c, check.recorded_by) == (8.5, 22.0, technician)
    assert check.flags == {"ph": {"value": 8.5, "side": "high", "low": 6.0, "high": 8.0}}
    assert check.needs_corrective_action is True
    history = check.history.get()
    assert (history.history_user, history.history_change_reason) == (technician, "Logged on the tank page")


def test_check_from_tank_page_rejects_impossible_ph_and_saves_nothing(client, technician, tank):
    client.force_login(technician)

    response = _add(client, tank, "check", {"check-ph": "15", "check-temp_c": "22"})

    assert response.status_code == 400
    assert "Tank FW-01, pH: 15 is impossible; allowed range 0 to 14." in page_text(response)
    assert Check.objects.count() == 0


def test_empty_check_is_refused(client, technician, tank):
    client.force_login(technician)

    response = _add(client, tank, "check", {})

    assert response.status_code == 400
    assert "Enter at least one reading or observation." in page_text(response)
    assert Check.objects.count() == 0


def test_nothing_can_be_added_to_a_retired_tank(client, technician, tank):
    Tank.objects.filter(pk=tank.pk).update(status=Tank.Status.RETIRED)
    client.force_login(technician)

    response = _add(client, tank, "check", {"check-ph": "7"})

    assert response.status_code == 302
    assert Check.objects.count() == 0


def test_unknown_record_kind_is_404(client, technician, tank):
    client.force_login(technician)
    assert _add(client, tank, "deletion", {}).status_code == 404


# ---------------------------------------------------------------------------------------------
# Feeding and water change
# ---------------------------------------------------------------------------------------------
def test_feeding_is_saved_with_who_and_history(client, technician, tank):
    client.force_login(technician)

    response = _add(client, tank, "feeding", {"feeding-food": "pellets", "feeding-amount": "0.05", "feeding-unit": "g"})

    assert response.status_code == 302
    feeding = Feeding.objects.get()
    assert (feeding.tank, feeding.food, feeding.amount, feeding.unit, feeding.recorded_by) == (
        tank, "pellets", 0.05, "g", technician)
    assert feeding.history.get().history_change_reason == "Feeding logged"


def test_feeding_with_negative_amount_is_rejected(client, technician, tank):
    client.force_login(technician)

    response = _add(client, tank, "feeding", {"feeding-food": "pellets", "feeding-amount": "-1", "feeding-unit": "g"})

    assert response.status_code == 400
    assert "Amount: -1 g is impossible; allowed range 0 to 1000 g." in page_text(response)
    assert Feeding.objects.count() == 0


def test_water_change_in_litres_is_saved(client, technician, tank):
    client.force_login(technician)

    response = _add(client, tank, "water-change", {"water-litres": "1.5", "water-source_water": "aged tap water"})

    assert response.status_code == 302
    change = WaterChange.objects.get()
    assert (change.percent, change.litres, change.recorded_by) == (None, 1.5, technician)
    assert change.fraction() == 0.75  # 1.5 L of a 2 L tank


def test_water_change_without_percent_or_litres_is_rejected(client, technician, tank):
    client.force_login(technician)

    response = _add(client, tank, "water-change", {"water-percent": "", "water-litres": "", "water-note": "topped up"})

    assert response.status_code == 400
    assert "Water change: enter the percent of volume or the litres changed." in page_text(response)
    assert WaterChange.objects.count() == 0


@pytest.mark.parametrize("field,value", [("percent", "-5"), ("percent", "120"), ("litres", "-1")])
def test_water_change_with_impossible_amount_is_rejected(client, technician, tank, field, value):
    client.force_login(technician)

    response = _add(client, tank, "water-change", {f"water-{field}": value})

    assert response.status_code == 400
    assert field in response.context["water_form"].errors
    assert WaterChange.objects.count() == 0


# ---------------------------------------------------------------------------------------------
# Census
# ---------------------------------------------------------------------------------------------
def test_census_by_aliquots_stores_the_estimate_and_its_interval(client, technician, tank):
    client.force_login(technician)

    response = _add(client, tank, "census", {"census-method": "aliquot", "census-aliquot_counts_text": "31, 27 35",
                                             "census-aliquot_ml": "20", "census-total_ml": "1000"})

    assert response.status_code == 302
    census = Census.objects.get()
    assert census.aliquot_counts == [31, 27, 35]
    # N = summed count / sampled fraction = 93 / (3 x 20 / 1000) = 1550 (colonies/population.py docstring).
    assert census.estimate == pytest.approx(1550.0)
    assert 93 <= census.estimate_lower < 1550.0 < census.estimate_upper
    assert census.estimate_method != ""
    assert census.recorded_by == technician


def test_census_by_direct_count_is_exact(client, technician, tank):
    client.force_login(technician)

    response = _add(client, tank, "census", {"census-method": "direct", "census-direct_count": "120"})

    assert response.status_code == 302
    census = Census.objects.get()
    assert (census.estimate, census.estimate_lower, census.estimate_upper) == (120.0, 120.0, 120.0)


def test_census_by_wet_mass_scales_the_subsample(client, technician, tank):
    client.force_login(technician)

    response = _add(client, tank, "census", {"census-method": "mass", "census-total_mass_g": "10",
                                             "census-sample_mass_g": "0.5", "census-sample_count": "40"})

    assert response.status_code == 302
    census = Census.objects.get()
    # N = 40 x 10 g / 0.5 g = 800 (colonies/population.py, gravimetric_estimate).
    assert census.estimate == pytest.approx(800.0)
    assert 40 <= census.estimate_lower < 800.0 < census.estimate_upper


@pytest.mark.parametrize("data,message", [
    pytest.param({"census-method": "aliquot", "census-aliquot_counts_text": "12", "census-aliquot_ml": "2000",
                  "census-total_ml": "1000"}, "Aliquot volume: 2000 mL is impossible; allowed range 0.001 to 1000 mL (the total volume).",
                 id="aliquot-larger-than-total"),
    pytest.param({"census-method": "aliquot", "census-aliquot_counts_text": "12, x", "census-aliquot_ml": "20",
                  "census-total_ml": "1000"}, "Aliquot counts: 'x' is not a whole number.", id="count-not-a-number"),
    pytest.param({"census-method": "aliquot", "census-aliquot_counts_text": "12, -3", "census-aliquot_ml": "20",
                  "census-total_ml": "1000"}, "Aliquot counts: -3 is impossible", id="negative-count"),
    pytest.param({"census-method": "mass", "census-total_mass_g": "1", "census-sample_mass_g": "2",
                  "census-sample_count": "10"},
                 "Subsample mass: 2 g is impossible; allowed range 0.0001 to 1 g (the total wet mass).",
                 id="sample-heavier-than-total"),
    pytest.param({"census-method": "direct"}, "Direct count: enter the number of animals counted.", id="no-count"),
    pytest.param({"census-method": "aliquot", "census-aliquot_counts_text": "99999999999999999999999",
                  "census-aliquot_ml": "20", "census-total_ml": "1000"}, "allowed range 0 to 1,000,000",
                 id="absurd-count"),
    pytest.param({"census-method": "mass", "census-total_mass_g": "1e300", "census-sample_mass_g": "1e-300",
                  "census-sample_count": "10"},
                 "Total wet mass: 1e+300 g is impossible; allowed range 0.0001 to 100000 g.", id="unit-mistake"),
    pytest.param({"census-method": "mass", "census-total_mass_g": "10000", "census-sample_mass_g": "0.0001",
                  "census-sample_count": "100000"}, "is impossible (allowed up to 1e+08)", id="estimate-too-large"),
    pytest.param({"census-method": "mass", "census-total_mass_g": "10", "census-sample_mass_g": "1",
                  "census-sample_count": "10000000000000000000"},
                 "Animals in subsample: 10000000000000000000 animals is impossible; allowed range 1 to 1000000 animals.",
                 id="subsample-count-1e19"),
    pytest.param({"census-method": "direct", "census-direct_count": "1e19"}, "Direct count: enter a whole number.",
                 id="count-in-e-notation"),
])
def test_bad_census_data_is_a_form_error_and_nothing_is_saved(client, technician, tank, data, message):
    client.force_login(technician)

    response = _add(client, tank, "census", data)

    assert response.status_code == 400
    assert message in page_text(response)
    assert Census.objects.count() == 0


def test_absurd_dead_count_is_rejected_not_a_server_error(client, technician, tank):
    client.force_login(technician)
    response = _add(client, tank, "check", {"check-dead_removed": "99999999999999999999"})
    assert response.status_code == 400
    assert "dead removed: 99999999999999999999 is impossible; allowed range 0 to 1,000,000." in page_text(response)
    assert Check.objects.count() == 0


# ---------------------------------------------------------------------------------------------
# Observed time: now by default, back-dating within the tank's life, shown as a late entry
# ---------------------------------------------------------------------------------------------
@pytest.fixture
def old_tank(db):
    return make_tank(code="FW-02", volume_l=2.0, started_on=timezone.localdate() - timedelta(days=30))


@pytest.mark.parametrize("kind,prefix,data,model", [
    ("feeding", "feeding", {"food": "pellets", "amount": "0.05", "unit": "g"}, Feeding),
    ("water-change", "water", {"percent": "50"}, WaterChange),
    ("census", "census", {"method": "direct", "direct_count": "120"}, Census),
])
def test_an_entry_without_a_time_is_observed_now_and_a_back_dated_one_at_its_time(client, technician, old_tank, kind,
                                                                                    prefix, data, model):
    client.force_login(technician)
    posted = {f"{prefix}-{k}": v for k, v in data.items()}
    assert _add(client, old_tank, kind, {**posted, f"{prefix}-observed_at": ""}).status_code == 302
    now_record = model.objects.get()
    assert abs(now_record.observed_at - timezone.now()) < timedelta(minutes=1) and not now_record.is_late_entry

    when = timezone.localtime() - timedelta(days=2)
    assert _add(client, old_tank, kind, {**posted, f"{prefix}-observed_at": when.strftime("%Y-%m-%dT%H:%M")}
                ).status_code == 302
    late = model.objects.exclude(pk=now_record.pk).get()
    assert late.observed_at == when.replace(second=0, microsecond=0) and late.is_late_entry
    assert abs(late.recorded_at - timezone.now()) < timedelta(minutes=1)  # entered now, by the server's clock
    page = page_text(client.get(old_tank.get_absolute_url()))
    assert page.count('late entry</span>') == 1


@pytest.mark.parametrize("shift,expected", [(timedelta(days=-31), "is impossible"), (timedelta(hours=1), "is in the future")])
def test_an_entry_time_before_the_tank_or_in_the_future_is_refused(client, technician, old_tank, shift, expected):
    client.force_login(technician)
    when = timezone.localtime() + shift
    response = _add(client, old_tank, "feeding", {"feeding-food": "pellets", "feeding-amount": "0.05",
                                                  "feeding-unit": "g",
                                                  "feeding-observed_at": when.strftime("%Y-%m-%dT%H:%M")})
    assert response.status_code == 400
    start = timezone.localtime(validators.start_of(old_tank.started_on))
    assert (f"Observed at: {lab_moment(when)} {expected}; allowed range {lab_moment(start)} (when tank FW-02 "
            f"was started) to") in page_text(response)
    assert not Feeding.objects.exists()


def test_the_forms_time_inputs_start_empty_not_at_the_moment_the_page_was_drawn(client, technician, tank):
    client.force_login(technician)
    text = page_text(client.get(tank.get_absolute_url()))
    for prefix in ("feeding", "water", "census"):
        assert f'<input type="datetime-local" name="{prefix}-observed_at"' in text
        assert not re.search(rf'name="{prefix}-observed_at" value=', text)


# ---------------------------------------------------------------------------------------------
# Pre-filled food, amount and source water
# ---------------------------------------------------------------------------------------------
def test_feeding_and_water_forms_start_from_the_species_defaults_then_the_last_entry(client, technician):
    species = make_species(default_food="liver paste", default_feeding_amount=0.3, default_feeding_unit="mL",
                           default_source_water="1x salts", water_change_fraction=1.0)
    tank = make_tank(code="FW-03", species=species)
    client.force_login(technician)
    page = client.get(tank.get_absolute_url())
    feeding, water = page.context["feeding_form"], page.context["water_form"]
    assert (feeding["food"].value(), feeding["amount"].value(), feeding["unit"].value()) == ("liver paste", "0.3", "mL")
    assert (water["percent"].value(), water["source_water"].value()) == ("100", "1x salts")
    assert "Pre-filled from the species' defaults." in page_text(page)

    _add(client, tank, "feeding", {"feeding-food": "bloodworm", "feeding-amount": "0.5", "feeding-unit": "g"})
    _add(client, tank, "water-change", {"water-litres": "1.5", "water-source_water": "aged tap water"})
    page = client.get(tank.get_absolute_url())
    feeding, water = page.context["feeding_form"], page.context["water_form"]
    assert (feeding["food"].value(), feeding["amount"].value(), feeding["unit"].value()) == ("bloodworm", "0.5", "g")
    assert (water["percent"].value(), water["litres"].value(), water["source_water"].value()) == (
        None, "1.5", "aged tap water")
    assert "Pre-filled from the last feeding" in page_text(page)


def test_a_tank_with_no_entry_and_no_species_default_offers_an_empty_feeding(client, technician, tank):
    client.force_login(technician)
    feeding = client.get(tank.get_absolute_url()).context["feeding_form"]
    assert (feeding["food"].value(), feeding["amount"].value()) == (None, None)


# ---------------------------------------------------------------------------------------------
# Census: one fieldset per method
# ---------------------------------------------------------------------------------------------
def test_census_form_groups_each_methods_fields_in_its_own_fieldset(client, technician, tank):
    client.force_login(technician)
    text = page_text(client.get(tank.get_absolute_url()))
    sets = dict(re.findall(r'<fieldset class="census-method" data-method="(\w+)">(.*?)</fieldset>', text, re.S))
    names = {method: set(re.findall(r'name="census-(\w+)"', body)) for method, body in sets.items()}
    assert names == {"direct": {"direct_count"}, "aliquot": {"aliquot_counts_text", "aliquot_ml", "total_ml"},
                     "mass": {"total_mass_g", "sample_mass_g", "sample_count"}}
    assert "data-census-method" in text and "js/census_form.js" in text
    assert "Aliquot volume (mL)" in text and "Animals in subsample" in text


def test_census_validation_is_unchanged_a_missing_methods_value_is_refused(client, technician, tank):
    client.force_login(technician)
    response = _add(client, tank, "census", {"census-method": "aliquot", "census-direct_count": "120"})
    assert response.status_code == 400
    assert "Aliquot counts: enter the counts, the aliquot volume and the total volume." in page_text(response)
    assert not Census.objects.exists()
