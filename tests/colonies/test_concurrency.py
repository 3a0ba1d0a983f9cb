"""Several people saving at the same moment: nothing lost, no server error.

Real concurrent connections: each thread has its own Django connection (closed when the thread
ends) to the test database, a file on SQLite (settings: TEST NAME) as in production, and a
threading.Barrier releases them together. On PostgreSQL the deviation engine's tank lock is what
is tested; on SQLite, BEGIN IMMEDIATE with a busy timeout and WAL.
"""
import threading
from datetime import timedelta

import pytest
from django.db import connection, transaction
from django.test import Client
from django.urls import reverse
from django.utils import timezone

from colonies import deviations, services
from colonies.deviations import Finding, apply_findings
from colonies.models import Census, Check, Deviation, Feeding, Tank
from colonies.roles import TECHNICIAN
from tests.factories import make_room, make_species, make_tank, make_user

THREADS = 8


def run_together(jobs) -> list:
    """Run each callable in its own thread, all released at once; return their results or errors, in order."""
    barrier = threading.Barrier(len(jobs))
    results: list = [None] * len(jobs)

    def run(i, job):
        try:
            barrier.wait(timeout=10)
            results[i] = job()
        except Exception as error:  # reported by the caller's assertions
            results[i] = error
        finally:
            connection.close()

    threads = [threading.Thread(target=run, args=(i, job)) for i, job in enumerate(jobs)]
    for t in threads:
        t.start()
    for t in threads:
        t.join(timeout=60)
    assert not any(t.is_alive() for t in threads), "a writer is still waiting: deadlock or lock never released"
    return results


def logged_in_clients(n: int) -> list[Client]:
    clients = []
    for i in range(n):
        client = Client()
        client.force_login(make_user(f"tech{i}", role=TECHNICIAN))
        clients.append(client)
    return clients


def poster(client: Client, url: str, data: dict):
    return lambda: client.post(url, data).status_code


@pytest.mark.django_db(transaction=True)
def test_sqlite_file_database_runs_in_wal_mode():
    if connection.vendor != "sqlite":
        pytest.skip("SQLite setting")
    assert not connection.is_in_memory_db()
    with connection.cursor() as cursor:
        cursor.execute("PRAGMA journal_mode")
        assert cursor.fetchone()[0] == "wal"
    assert connection.transaction_mode == "IMMEDIATE"


@pytest.mark.django_db(transaction=True)
def test_technicians_saving_out_of_range_checks_on_one_tank_at_once_all_land_in_one_deviation():
    tank = make_tank(code="RUSH-1", species=make_species(targets={"ph": (6.5, 8.0)}))
    url = reverse("colonies:tank-add", args=[tank.code, "check"])
    jobs = [poster(c, url, {"check-ph": f"{9.0 + i / 10:.1f}"}) for i, c in enumerate(logged_in_clients(THREADS))]

    statuses = run_together(jobs)

    assert statuses == [302] * THREADS  # saved and redirected to the tank page; no 500, no lock error
    checks = set(Check.objects.filter(tank=tank).values_list("pk", flat=True))
    assert len(checks) == THREADS
    deviation = Deviation.objects.unresolved().get(tank=tank, rule=Deviation.Rule.OUT_OF_TARGET, parameter="ph")
    assert {e["check"] for e in deviation.evidence} == checks
    assert deviation.evidence_count == THREADS
    assert deviation.history.count() == THREADS  # opened once, then one version per new piece of evidence


@pytest.mark.django_db(transaction=True)
def test_rounds_over_the_same_tanks_in_opposite_orders_neither_deadlock_nor_lose_evidence():
    species = make_species(targets={"ph": (6.5, 8.0), "temp_c": (20.0, 26.0)})
    room = make_room()
    a, b = make_tank(code="RND-A", room=room, species=species), make_tank(code="RND-B", room=room, species=species)
    users = [make_user(f"rounder{i}", role=TECHNICIAN) for i in range(THREADS)]
    # The round needs the tanks with their targets prefetched, as round_view loads them.
    tanks = {t.code: t for t in Tank.objects.for_round().filter(pk__in=[a.pk, b.pk])}

    def round_for(user, order):
        return lambda: len(services.record_round(
            user=user, rows=[(tanks[code], {"ph": 9.2, "temp_c": 28.0}) for code in order]))

    results = run_together([round_for(u, ["RND-A", "RND-B"] if i % 2 else ["RND-B", "RND-A"])
                            for i, u in enumerate(users)])

    assert results == [2] * THREADS
    for tank in (a, b):
        checks = set(Check.objects.filter(tank=tank).values_list("pk", flat=True))
        assert len(checks) == THREADS
        for parameter in ("ph", "temp_c"):
            deviation = Deviation.objects.unresolved().get(tank=tank, rule=Deviation.Rule.OUT_OF_TARGET,
                                                           parameter=parameter)
            assert {e["check"] for e in deviation.evidence} == checks, (tank.code, parameter)
            assert deviation.evidence_count == THREADS


@pytest.mark.django_db(transaction=True)
def test_simultaneous_feedings_and_censuses_are_all_saved():
    tank = make_tank(code="FEED-1", species=make_species(max_density_per_l=10))
    clients = logged_in_clients(THREADS)
    feed = reverse("colonies:tank-add", args=[tank.code, "feeding"])
    census = reverse("colonies:tank-add", args=[tank.code, "census"])
    jobs = [poster(c, feed, {"feeding-food": "pellets", "feeding-amount": "0.05", "feeding-unit": "g"})
            if i % 2 else poster(c, census, {"census-method": "direct", "census-direct_count": str(100 + i)})
            for i, c in enumerate(clients)]

    statuses = run_together(jobs)

    assert statuses == [302] * THREADS
    assert Feeding.objects.filter(tank=tank).count() == THREADS // 2
    censuses = set(Census.objects.filter(tank=tank).values_list("pk", flat=True))
    assert len(censuses) == THREADS // 2
    # 100+ animals in 2 L is above 10/L: every census is evidence on one stocking-density deviation.
    deviation = Deviation.objects.unresolved().get(tank=tank, rule=Deviation.Rule.STOCKING_DENSITY)
    assert {e["ref"] for e in deviation.evidence} == {f"census:{pk}" for pk in censuses}


@pytest.mark.django_db(transaction=True)
def test_closing_a_deviation_loaded_before_new_evidence_keeps_that_evidence():
    tank = make_tank(code="CLOSE-1", species=make_species(targets={"ph": (6.5, 8.0)}))
    closer, *techs = [make_user(f"c{i}", role=TECHNICIAN) for i in range(THREADS)]
    first = services.record_check(user=closer, tank=tank, row={"ph": 9.0})
    stale = Deviation.objects.get(tank=tank)  # as the detail page loaded it, before the others saved

    later = run_together([lambda u=u: services.record_check(user=u, tank=tank, row={"ph": 9.5}).pk for u in techs])
    stale.close(user=closer, corrective_action="Water changed, pH back to 7.4", password="pw")

    closed = Deviation.objects.get(pk=stale.pk)
    assert closed.status == Deviation.Status.CLOSED
    assert {e["check"] for e in closed.evidence} == {first.pk, *later}
    assert closed.evidence_count == THREADS
    assert closed.history.first().evidence == closed.evidence  # the closing version records it all too


@pytest.mark.django_db(transaction=True)
def test_findings_about_no_tank_at_once_share_one_deviation():
    now = timezone.now()

    def finding(i):
        return Finding(None, Deviation.Rule.PROTOCOL_LIMIT, Deviation.Severity.MODERATE, f"limit overridden #{i}",
                       {"ref": f"trial:{i}"}, now - timedelta(minutes=i), subject="cohort:shared")

    def apply(i):
        with transaction.atomic():
            return len(apply_findings([finding(i)], now=now).created)

    results = run_together([lambda i=i: apply(i) for i in range(THREADS)])

    assert sorted(results) == [0] * (THREADS - 1) + [1], results
    deviation = Deviation.objects.unresolved().get(tank__isnull=True, subject="cohort:shared")
    assert {e["ref"] for e in deviation.evidence} == {f"trial:{i}" for i in range(THREADS)}


@pytest.mark.django_db(transaction=True)
def test_a_rescan_while_technicians_save_rounds_neither_deadlocks_nor_loses_or_doubles_evidence():
    species = make_species(targets={"ph": (6.5, 8.0)})
    room = make_room()
    tanks = [make_tank(code=f"RSC-{i}", room=room, species=species) for i in range(4)]
    importer, *savers = [make_user(f"rescan{i}", role=TECHNICIAN) for i in range(THREADS)]
    # 150 days of out-of-range pH stored without the rules (as an import leaves them): the rescan commits
    # three windows, each locking all four tanks, while rounds over the same tanks lock them too.
    start = timezone.now() - timedelta(days=150)
    Check.objects.bulk_create([Check(tank=t, recorded_by=importer, observed_at=start + timedelta(days=d), ph=9.0)
                               for t in tanks for d in range(150)])
    loaded = list(Tank.objects.for_round().filter(pk__in=[t.pk for t in tanks]))

    def round_by(user, i):
        order = loaded if i % 2 else loaded[::-1]
        return lambda: len(services.record_round(user=user, rows=[(t, {"ph": 9.1 + i / 10}) for t in order]))

    results = run_together([lambda: deviations.rescan().checks] + [round_by(u, i) for i, u in enumerate(savers)])

    assert results[0] >= 600 and results[1:] == [4] * len(savers), results
    for tank in tanks:
        checks = set(Check.objects.filter(tank=tank).values_list("pk", flat=True))
        deviation = Deviation.objects.unresolved().get(tank=tank, rule=Deviation.Rule.OUT_OF_TARGET, parameter="ph")
        refs = [e["ref"] for e in deviation.evidence] + list(deviation.archived_evidence.values_list("ref", flat=True))
        assert sorted(refs) == sorted(f"check:{pk}:ph" for pk in checks)  # every check once: none lost, none twice
        assert deviation.evidence_count == len(checks) == 150 + len(savers)
