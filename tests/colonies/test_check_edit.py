"""Correcting a check: a reason is required and the earlier values stay in its history."""
import pytest
from django.urls import reverse

from colonies.models import Check
from tests.factories import make_check, make_species, make_tank, page_text


@pytest.fixture
def check(db, technician):
    tank = make_tank(code="FW-01", species=make_species(targets={"ph": (6.0, 8.0)}))
    return make_check(tank, user=technician, ph=9.0, temp_c=22.0)


def _edit(client, check, **data):
    return client.post(reverse("colonies:check-edit", args=[check.pk]), data)


def test_edit_page_is_prefilled_with_the_current_values(client, technician, check):
    client.force_login(technician)

    response = client.get(reverse("colonies:check-edit", args=[check.pk]))

    assert response.status_code == 200
    form = response.context["form"]
    assert (form["ph"].value(), form["temp_c"].value()) == ("9.00", "22.0")


def test_correction_with_reason_keeps_the_old_value_in_history(client, technician, manager, check):
    client.force_login(manager)

    response = _edit(client, check, **{"check-ph": "7.5", "check-temp_c": "22.0",
                                       "reason": "Meter read before it settled"})

    assert response.status_code == 302
    assert response["Location"] == check.get_absolute_url()
    check.refresh_from_db()
    assert (check.ph, check.temp_c) == (7.5, 22.0)
    assert check.flags == {}  # flags recomputed: 7.5 lies within 6-8
    assert check.recorded_by == technician  # who logged it does not change
    latest, original = check.history.order_by("-history_date", "-history_id")
    assert (latest.history_type, latest.ph, latest.history_user, latest.history_change_reason) == (
        "~", 7.5, manager, "Meter read before it settled")
    assert (original.history_type, original.ph, original.history_user) == ("+", 9.0, technician)


def test_check_page_shows_the_correction_in_its_history(client, technician, check):
    client.force_login(technician)
    _edit(client, check, **{"check-ph": "7.5", "check-temp_c": "22.0", "reason": "Typo"})

    response = client.get(reverse("colonies:check-detail", args=[check.pk]))

    newest = response.context["entries"][0]
    assert newest["reason"] == "Typo"
    # pH with the registry's two decimals (colonies/parameters.py), under its label, not the column name
    assert ("pH", "9.00", "7.50") in [(c.label, c.old, c.new) for c in newest["changes"]]
    assert "<strong class=\"field\">pH</strong>: 9.00 → 7.50" in response.content.decode()


@pytest.mark.parametrize("reason", ["", "   "])
def test_correction_without_reason_is_refused_and_changes_nothing(client, technician, check, reason):
    client.force_login(technician)

    response = _edit(client, check, **{"check-ph": "7.5", "check-temp_c": "22.0", "reason": reason})

    assert response.status_code == 400
    assert "reason" in response.context["reason"].errors
    check.refresh_from_db()
    assert check.ph == 9.0
    assert check.history.count() == 1


def test_correction_to_an_impossible_value_is_refused(client, technician, check):
    client.force_login(technician)

    response = _edit(client, check, **{"check-ph": "14.5", "check-temp_c": "22.0", "reason": "Typo"})

    assert response.status_code == 400
    assert "Tank FW-01, pH: 14.5 is impossible; allowed range 0 to 14." in page_text(response)
    check.refresh_from_db()
    assert check.ph == 9.0
    assert check.history.count() == 1


def test_voided_check_cannot_be_corrected(client, technician, check):
    check.void(user=technician, reason="Duplicate")
    client.force_login(technician)

    response = _edit(client, check, **{"check-ph": "7.5", "reason": "Typo"})

    assert response.status_code == 302
    check.refresh_from_db()
    assert check.ph == 9.0
    assert check.history.count() == 2  # created, voided; no correction


def test_edit_of_unknown_check_is_404(client, technician, db):
    client.force_login(technician)
    assert client.get(reverse("colonies:check-edit", args=[999999])).status_code == 404
    assert Check.objects.count() == 0
