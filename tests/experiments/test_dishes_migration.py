"""Migration experiments 0006: every cohort with trials becomes one dish holding all of them.

Run with Django's migration executor on the test database: back to 0005, rows written with the models
of that state, forward again, then read with today's models. Before dishes every trial was an exposure
of its whole cohort, so one dish per cohort must give the same exposure numbers, rest and doses; and the
tanks' population estimates must not move.
"""
import pytest
from django.db import IntegrityError, connection, transaction
from django.db.migrations.executor import MigrationExecutor

from experiments import reports, services
from experiments.models import Cohort, Dish, Trial
from tests.experiments.builders import days_ago, make_cohort, make_protocol, make_stocked_tank, make_study
from tests.factories import make_user

BEFORE = [("experiments", "0005_text_lengths")]


def _migrate(targets):
    executor = MigrationExecutor(connection)
    executor.loader.build_graph()
    executor.migrate(targets)
    return executor.loader.project_state(targets).apps


def _latest():
    executor = MigrationExecutor(connection)
    return [node for node in executor.loader.graph.leaf_nodes()]


@pytest.mark.django_db(transaction=True)
def test_each_cohort_with_trials_becomes_one_dish_with_the_same_exposures_doses_and_tank_counts():
    from colonies.roles import RESEARCHER
    user = make_user("mig", role=RESEARCHER)
    protocol = make_protocol()
    tank = make_stocked_tank(estimate=1000, reserve=0, user=user, observed_at=days_ago(20), code="MIG-1")
    returned = make_cohort(user=user, protocol=protocol, tank=tank, animals=24, at=days_ago(12))
    running = make_cohort(user=user, protocol=protocol, tank=tank, animals=10, at=days_ago(12))
    died = make_cohort(user=user, protocol=protocol, tank=tank, animals=6, at=days_ago(12))
    idle = make_cohort(user=user, protocol=protocol, tank=tank, animals=5, at=days_ago(12))
    study = make_study(user=user, protocol=protocol, replicates=4)
    assert services.current_population(tank) == 1000 - 24 - 10 - 6 - 5

    old = _migrate(BEFORE)
    OldTrial, OldCohort = old.get_model("experiments", "Trial"), old.get_model("experiments", "Cohort")
    assert "dish" not in {f.name for f in OldTrial._meta.get_fields()}
    slots = iter(study.allocation)

    def old_trial(cohort, at, animals, dose, **extra):
        entry = next(slots)
        return OldTrial.objects.create(
            study_id=study.pk, slot=entry["slot"], code=entry["code"], condition=entry["condition"],
            replicate=entry["replicate"], cohort_id=cohort.pk, protocol_id=protocol.pk, run_at=at, run_by_id=user.pk,
            animals=animals, kind="uv" if dose else "none", dose_mj_cm2=dose, observation_window_s=600, **extra)

    # Cohort "returned": trials of 8 and 6 animals, a voided one of 20 (entered in error), then 20 of the 24
    # went back to the tank. Under the old rule its exposures were 1, 2 (the voided trial does not count).
    old_trial(returned, days_ago(11), 8, 20.0)
    old_trial(returned, days_ago(10.5), 20, 40.0, voided_at=days_ago(10), voided_by_id=user.pk, void_reason="Typo")
    old_trial(returned, days_ago(10), 6, 30.0, mortality_24h=1)
    OldCohort.objects.filter(pk=returned.pk).update(end="returned", ended_at=days_ago(9), ended_by_id=user.pk,
                                                    returned_to_id=tank.pk, returned_count=20, end_note="2 lost")
    old_trial(running, days_ago(11), 10, None)
    old_trial(running, days_ago(9.5), 10, 25.0)
    old_trial(died, days_ago(11), 6, 10.0)
    OldCohort.objects.filter(pk=died.pk).update(end="died", ended_at=days_ago(10), ended_by_id=user.pk,
                                                end_note="Heater failed")
    population = 1000 - 24 - 10 - 6 - 5 + 20  # the returned cohort's 20 animals (arithmetic)

    _migrate(_latest())

    assert services.current_population(tank) == population  # the same animals, now by two routes
    assert services.cohort_movements(tank.pk, days_ago(21)) == [("drawn for trials", -45), ("returned from trials", 20)]
    assert not Dish.objects.filter(cohort=idle).exists()
    assert Trial.objects.filter(dish__isnull=True).count() == 0
    assert all(t.dish.cohort_id == t.cohort_id for t in Trial.objects.select_related("dish"))

    # "returned": one dish of 8 (the largest trial that counts), its end mirrored; the return split 8 + 12.
    dish = Dish.objects.get(cohort=returned)
    cohort = Cohort.objects.get(pk=returned.pk)
    assert (dish.number, dish.animals, dish.set_up_at, dish.set_up_by_id) == (1, 8, cohort.drawn_at, user.pk)
    assert (dish.end, dish.ended_at, dish.ended_by_id, dish.end_note) == ("returned", cohort.ended_at, user.pk, "2 lost")
    assert (dish.returned_to_id, dish.returned_count, cohort.returned_count) == (tank.pk, 8, 12)
    assert cohort.history.first().history_change_reason.startswith("Migration 0006")
    assert cohort.history.first().returned_count == 12 and cohort.history.first().history_type == "~"
    assert dish.history.get().history_type == "+"
    # Exposure numbers, rest and cumulative dose as before (per cohort then, per dish now): 1 then 2, 20 then 50.
    trials = list(Trial.objects.counting().filter(cohort=returned).select_related(
        "study", "cohort__origin_tank", "dish", "protocol", "run_by", "scored_by", "override__recorded_by"))
    rows = reports.ledger_rows(trials, trials, user)
    assert [(r["exposure_number"], r["cumulative_dose_mj_cm2"], r["rest_h"]) for r in rows] == \
        [(1, 20.0, None), (2, 50.0, 24.0)]
    state = services.dish_state(dish, days_ago(0))
    assert (state.exposures, state.cumulative_dose_mj_cm2, state.animals, state.ended) == (2, 50.0, 7, True)

    # "running": still open, its 10 animals in one dish; its next trial counts as exposure 3, after 20 h of rest.
    dish = Dish.objects.get(cohort=running)
    assert (dish.animals, dish.end, dish.is_open) == (10, "", True)
    state = services.dish_state(dish, days_ago(9))
    assert (state.exposures, state.cumulative_dose_mj_cm2, state.last_exposure_at) == \
        (2, 25.0, Trial.objects.filter(cohort=running).latest().run_at)
    # "died": the dish died with it.
    dish = Dish.objects.get(cohort=died)
    assert (dish.animals, dish.end, dish.returned_count, dish.end_note) == (6, "died", None, "Heater failed")

    with pytest.raises(IntegrityError), transaction.atomic():  # Trial.dish is required now
        Trial.objects.filter(cohort=running).update(dish=None)


@pytest.mark.django_db(transaction=True)
def test_migration_0006_reverses_to_one_return_per_cohort():
    from colonies.roles import RESEARCHER
    user = make_user("back", role=RESEARCHER)
    protocol = make_protocol()
    tank = make_stocked_tank(estimate=500, reserve=0, user=user, observed_at=days_ago(20))
    cohort = make_cohort(user=user, protocol=protocol, tank=tank, animals=12, at=days_ago(5))
    study = make_study(user=user, protocol=protocol)
    services.claim_slot(user=user, study=study, slot=1)  # only the claimant records a slot
    trial = services.record_trial(user=user, study=study, slot=1, cohort=cohort, dish_animals=8, values={
        "animals": 8, "kind": "none", "run_at": days_ago(4), "vessel": "dish"}).trial
    services.end_dish(user=user, dish=trial.dish, end="returned", returned_to=tank, returned_count=7)
    services.end_cohort(user=user, cohort=cohort, end="returned", returned_to=tank, returned_count=4)
    assert services.current_population(tank) == 500 - 12 + 7 + 4

    old = _migrate(BEFORE)
    back = old.get_model("experiments", "Cohort").objects.get(pk=cohort.pk)
    assert back.returned_count == 11  # 4 + the dish's 7: one return per cohort again (arithmetic)
    _migrate(_latest())
    # Forward again the split is the migration's own (the dish returns its 8, at most the 11): the dish's own
    # 7 + 4 is not recoverable from one number, but the tank receives the same 11.
    dish, cohort = Trial.objects.get().dish, Cohort.objects.get()
    assert (dish.returned_count, cohort.returned_count, dish.set_up_at) == (8, 3, cohort.drawn_at)
    assert services.current_population(tank) == 500 - 12 + 11
