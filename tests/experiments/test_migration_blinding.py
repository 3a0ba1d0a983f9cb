"""Migration experiments 0007: existing data get what the new rules need, faithfully.

Studies compared every condition with their first one: it becomes the explicit reference. A 24 h
count already recorded gets the time the history first shows it; none was entered after unblinding
(outcomes were locked until now).
"""
from datetime import timedelta

import pytest
from django.db import connection
from django.db.migrations.executor import MigrationExecutor
from django.utils import timezone

from experiments import services
from experiments.models import Study, Trial
from tests.experiments.builders import make_cohort, make_protocol, make_study, record
from tests.factories import make_user

BEFORE = ("experiments", "0005_text_lengths")
AFTER = ("experiments", "0007_blinding_claims_late_outcomes_reference")


def _latest():
    executor = MigrationExecutor(connection)
    return next(node for node in executor.loader.graph.leaf_nodes() if node[0] == "experiments")


def _migrate(target):
    executor = MigrationExecutor(connection)
    executor.loader.build_graph()
    executor.migrate([target])


def _migrate_latest():
    """Back to the newest migrations, so that the current models (and the tests after this one) find their columns."""
    executor = MigrationExecutor(connection)
    executor.migrate(executor.loader.graph.leaf_nodes())


@pytest.mark.django_db(transaction=True)
def test_existing_studies_get_their_first_condition_and_counts_their_first_recorded_time():
    owner = make_user("rhea")
    protocol = make_protocol()
    now = timezone.now()
    cohort = make_cohort(user=owner, protocol=protocol, at=now - timedelta(days=5))
    study = make_study(user=owner, protocol=protocol, conditions=("control", "UV 10", "UV 20"), code="old")
    make_study(user=owner, protocol=protocol, conditions=("only",), code="one")
    trial = record(study, cohort, owner, at=now - timedelta(days=4), now=now - timedelta(days=4)).trial
    counted_at = now - timedelta(days=3)
    services.score_trial(user=owner, trial=trial, values={"mortality_24h": 1}, now=counted_at)
    try:
        _migrate(BEFORE)  # the columns go; the rows and their history stay
        with connection.cursor() as cursor:  # as a study and a count entered before this migration
            cursor.execute("SELECT COUNT(*) FROM experiments_study")
            assert cursor.fetchone()[0] == 2
        _migrate(AFTER)
    finally:
        _migrate_latest()  # later migrations (0010 adds a study column, 0011 protocol versions) leave what 0007 wrote

    assert Study.objects.get(code="old").reference_condition == "control"
    assert Study.objects.get(code="one").reference_condition == "only"
    trial = Trial.objects.get()
    assert trial.mortality_24h == 1
    assert trial.mortality_24h_entered_at == trial.history.filter(mortality_24h__isnull=False).earliest(
        "history_date").history_date
    assert trial.mortality_24h_after_unblinding is False
