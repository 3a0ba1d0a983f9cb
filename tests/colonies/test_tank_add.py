"""Recording on the tank page: a check, a feeding, a water change, a census."""
import pytest
from django.urls import reverse

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
