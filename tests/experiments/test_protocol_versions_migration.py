"""Migration experiments 0009 (protocol versions): every existing protocol gets version 1 with its terms as they
stand, and every existing trial points to it; backward, the versions go and the trials stay.

Django's migration executor on the test database, as tests/experiments/test_dishes_migration.py.
"""
import pytest
from django.db import connection
from django.db.migrations.executor import MigrationExecutor

from experiments import reports
from experiments.models import Protocol, ProtocolVersion, Trial
from tests.experiments.builders import days_ago, make_cohort, make_protocol, make_stocked_tank, make_study, record
from tests.factories import make_user

MIGRATION = "0011_protocol_versions"


def _graph():
    executor = MigrationExecutor(connection)
    executor.loader.build_graph()
    return executor


def _before():
    """The migration before this one (whatever its number after a merge)."""
    graph = _graph().loader.graph
    node = next(n for n in graph.nodes if n[0] == "experiments" and n[1].endswith("protocol_versions"))
    return [p for p in graph.node_map[node].parents if p[0] == "experiments"]


def _migrate(targets):
    executor = _graph()
    executor.migrate(targets)


def _latest():
    return [n for n in _graph().loader.graph.leaf_nodes()]


def _columns(table: str) -> set[str]:
    with connection.cursor() as cursor:
        return {c.name for c in connection.introspection.get_table_description(cursor, table)}


@pytest.mark.django_db(transaction=True)
def test_existing_protocols_get_version_1_and_their_trials_point_to_it_and_back():
    from colonies.roles import MANAGER
    user = make_user("mig", role=MANAGER)
    used = make_protocol(starts_on=days_ago(30).date())
    unused = make_protocol()
    tank = make_stocked_tank(estimate=1000, reserve=0, user=user, observed_at=days_ago(20), code="MIG-V")
    cohort = make_cohort(user=user, protocol=used, tank=tank, animals=20, at=days_ago(12))
    study = make_study(user=user, protocol=used, replicates=2)
    first = record(study, cohort, user, at=days_ago(10), irradiance=4.0, duration=20.0).trial
    record(study, cohort, user, at=days_ago(9), irradiance=2.0, duration=10.0)
    ledger_before = reports.ledger_rows(*[list(Trial.objects.select_related(
        "study", "cohort__origin_tank", "dish", "protocol", "protocol_version").order_by("run_at"))] * 2, user=user)

    try:
        _migrate(_before())  # backward: the versions go, the trials and protocols stay
        assert "protocol_version_id" not in _columns("experiments_trial")
        assert "experiments_protocolversion" not in connection.introspection.table_names()
        with connection.cursor() as cursor:
            cursor.execute("SELECT COUNT(*) FROM experiments_trial")
            assert cursor.fetchone()[0] == 2
    finally:
        _migrate(_latest())  # forward again

    assert ProtocolVersion.objects.count() == 2  # one per protocol, nothing else
    for protocol in (used, unused):
        protocol = Protocol.objects.prefetch_related("allowances").get(pk=protocol.pk)
        [version] = protocol.versions.all()
        assert version.number == 1
        assert version.terms(protocol) == protocol.terms()  # the terms as they stood
    v1 = used.versions.get()
    assert set(Trial.objects.values_list("protocol_version", flat=True)) == {v1.pk}
    assert v1.effective_from <= Trial.objects.get(pk=first.pk).run_at  # every trial ran under it
    ledger_after = reports.ledger_rows(*[list(Trial.objects.select_related(
        "study", "cohort__origin_tank", "dish", "protocol", "protocol_version").order_by("run_at"))] * 2, user=user)
    strip = [{k: v for k, v in row.items() if k != "trial"} for row in ledger_before]
    assert [{k: v for k, v in row.items() if k != "trial"} for row in ledger_after] == strip
