"""The tank history page: every version of the tank and its records, paginated in the database."""
from datetime import timedelta

import pytest
from django.db import connection
from django.test.utils import CaptureQueriesContext
from django.urls import reverse
from django.utils import timezone

from colonies import services, views
from colonies.history import history_index, page_entries, record_history
from tests.factories import make_check, make_tank


def _checks(tank, user, n, start=0):
    now = timezone.now()
    return [make_check(tank, user=user, ph=7.0, observed_at=now - timedelta(hours=start + i + 1)) for i in range(n)]


def test_history_pages_hold_every_version_newest_first_with_the_correction_diff(client, manager, monkeypatch, db):
    monkeypatch.setattr(views, "HISTORY_PAGE_SIZE", 3)
    tank = make_tank(code="HI-01")
    checks = _checks(tank, manager, 4)
    services.update_check(user=manager, check=checks[0], row={"ph": 7.4}, reason="Misread the meter")
    client.force_login(manager)

    pages = [client.get(reverse("colonies:tank-history", args=[tank.code]), {"page": n}) for n in (1, 2)]

    entries = [e for p in pages for e in p.context["entries"]]
    assert pages[0].context["page"].paginator.count == 6  # tank created, 4 checks, 1 correction
    assert [e["what"] for e in entries].count("Tank #%d" % tank.pk) == 1
    assert [e["when"] for e in entries] == sorted((e["when"] for e in entries), reverse=True)
    newest = entries[0]
    assert newest["action"] == "changed" and newest["reason"] == "Misread the meter"
    assert ("pH", "7.00", "7.40") in [(c.label, c.old, c.new) for c in newest["changes"]]
    assert entries == record_history(tank)


def test_one_page_loads_only_its_entries(db, manager):
    tank = make_tank(code="HI-02")
    _checks(tank, manager, 10)
    rows = list(history_index(tank)[:4])
    assert len(rows) == 4
    assert len(page_entries(tank, rows)) == 4


@pytest.mark.parametrize("page", ["1", "2"])
def test_history_query_count_does_not_grow_with_records(client, manager, monkeypatch, django_assert_max_num_queries,
                                                        db, page):
    monkeypatch.setattr(views, "HISTORY_PAGE_SIZE", 5)
    tank = make_tank(code="HI-03")
    _checks(tank, manager, 6)
    client.force_login(manager)
    url = reverse("colonies:tank-history", args=[tank.code])
    with CaptureQueriesContext(connection) as small:
        assert client.get(url, {"page": page}).status_code == 200

    _checks(tank, manager, 40, start=10)
    # One query per record type present on the page (at most eight), never per record.
    with django_assert_max_num_queries(len(small)):
        response = client.get(url, {"page": page})
    assert response.context["page"].paginator.count == 47
