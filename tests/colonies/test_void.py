"""Voiding: a record disappears from lists and exports but stays in the database and its history."""
from datetime import timedelta

import pytest
from django.urls import reverse
from django.utils import timezone

from colonies.models import Census, Check, Feeding, WaterChange
from tests.factories import csv_rows, make_check, make_tank, page_text


@pytest.fixture
def tank(db):
    return make_tank(code="FW-01")


@pytest.fixture
def check(tank, technician):
    return make_check(tank, user=technician, ph=7.0)


def _void(client, kind, pk, reason):
    return client.post(reverse("colonies:void", args=[kind, pk]), {"reason": reason})


def test_void_with_reason_hides_the_check_but_keeps_it_with_who_and_why(client, technician, tank, check):
    other = make_check(tank, user=technician, ph=7.2, observed_at=timezone.now() - timedelta(hours=3))
    client.force_login(technician)

    response = _void(client, "check", check.pk, "Entered on the wrong tank")

    assert response.status_code == 302
    assert response["Location"] == tank.get_absolute_url()
    check.refresh_from_db()  # still in the database
    assert check.is_voided
    assert (check.voided_by, check.void_reason) == (technician, "Entered on the wrong tank")
    latest = check.history.order_by("-history_date", "-history_id").first()
    assert (latest.history_user, latest.history_change_reason) == (technician, "Voided: Entered on the wrong tank")
    assert latest.voided_at is not None

    page = client.get(reverse("colonies:tank-detail", args=[tank.code]))
    assert [r["check"].pk for r in page.context["rows"]] == [other.pk]


def test_voided_check_is_left_out_of_the_csv_unless_asked_for(client, technician, tank, check):
    kept = make_check(tank, user=technician, ph=7.2)
    client.force_login(technician)
    _void(client, "check", check.pk, "Duplicate")

    default = csv_rows(client.get(reverse("colonies:checks-csv")))
    with_voided = csv_rows(client.get(reverse("colonies:checks-csv"), {"include_voided": "on"}))

    assert [row[0] for row in default[1:]] == [str(kept.pk)]
    header = with_voided[0]
    rows = {row[0]: dict(zip(header, row)) for row in with_voided[1:]}
    assert set(rows) == {str(check.pk), str(kept.pk)}
    assert (rows[str(check.pk)]["voided"], rows[str(check.pk)]["void_reason"]) == ("1", "Duplicate")
    assert rows[str(kept.pk)]["voided"] == "0"


def test_tank_history_page_shows_the_voiding_with_user_and_reason(client, technician, tank, check):
    client.force_login(technician)
    _void(client, "check", check.pk, "Meter not calibrated")

    response = client.get(reverse("colonies:tank-history", args=[tank.code]))

    entries = [e for e in response.context["entries"] if e["what"] == f"Check #{check.pk}"]
    assert [e["action"] for e in entries] == ["voided", "created"]
    assert (entries[0]["who"], entries[0]["reason"]) == (technician, "Voided: Meter not calibrated")
    assert "Voided: Meter not calibrated" in page_text(response)


@pytest.mark.parametrize("reason", ["", "   "])
def test_void_without_reason_is_refused(client, technician, check, reason):
    client.force_login(technician)

    response = _void(client, "check", check.pk, reason)

    assert response.status_code == 400
    check.refresh_from_db()
    assert not check.is_voided
    assert check.history.count() == 1


def test_voiding_twice_changes_nothing(client, technician, manager, check):
    check.void(user=technician, reason="Duplicate")
    client.force_login(manager)

    response = _void(client, "check", check.pk, "Again")

    assert response.status_code == 302
    check.refresh_from_db()
    assert (check.voided_by, check.void_reason) == (technician, "Duplicate")
    assert check.history.count() == 2


@pytest.mark.parametrize("kind,make", [
    ("feeding", lambda tank, user: Feeding.objects.create(tank=tank, recorded_by=user, food="pellets", amount=0.1)),
    ("water-change", lambda tank, user: WaterChange.objects.create(tank=tank, recorded_by=user, percent=50)),
    ("census", lambda tank, user: Census.objects.create(tank=tank, recorded_by=user, method="direct", direct_count=5,
                                                        estimate=5)),
])
def test_other_records_are_voided_and_hidden_from_the_tank_page(client, technician, tank, kind, make):
    record = make(tank, technician)
    client.force_login(technician)

    response = _void(client, kind, record.pk, "Wrong tank")

    assert response.status_code == 302
    record.refresh_from_db()
    assert (record.is_voided, record.voided_by, record.void_reason) == (True, technician, "Wrong tank")
    page = client.get(reverse("colonies:tank-detail", args=[tank.code]))
    listed = {"feeding": "feedings", "water-change": "water_changes", "census": "censuses"}[kind]
    assert list(page.context[listed]) == []


def test_void_of_unknown_kind_is_404(client, technician, check):
    client.force_login(technician)
    assert _void(client, "tank", check.pk, "No").status_code == 404
    assert Check.objects.current().count() == 1


def test_tank_history_includes_splits_and_pages_instead_of_cutting_off(client, technician):
    from colonies.services import NewTank, record_split
    from colonies.views import HISTORY_PAGE_SIZE
    from tests.factories import make_check, make_tank

    source = make_tank(code="HS-01")
    record_split(user=technician, source=source, source_before=500, stayed=300,
                 parts=[(NewTank(code="HS-02", volume_l=2.0), 200)])
    for i in range(HISTORY_PAGE_SIZE):
        make_check(source, user=technician, temp_c=20.0 + i / 1000)
    client.force_login(technician)
    first = client.get(reverse("colonies:tank-history", args=["HS-01"]))
    assert first.context["page"].paginator.count == HISTORY_PAGE_SIZE + 3  # tank, split, split part + checks
    last = client.get(reverse("colonies:tank-history", args=["HS-01"]), {"page": 2})
    whats = {e["what"].split(" #")[0] for e in last.context["entries"]}
    assert {"Split", "Split part", "Tank"} <= whats
    child = client.get(reverse("colonies:tank-history", args=["HS-02"]))
    assert any(e["what"].startswith("Split part") for e in child.context["entries"])
