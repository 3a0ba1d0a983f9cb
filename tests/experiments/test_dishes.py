"""Dishes: the group of animals the protocol's welfare limits count (issue 11, item 1).

A cohort feeds several dishes within its size; exposures, rest and cumulative dose run per dish; a dish
ends (returned to a tank, retired, died) and its returned animals count in the tank's population again.
The worked examples use the default test protocol (tests/experiments/builders.make_protocol): at most
3 exposures per dish, at least 20 h of rest, at most 150 mJ/cm² in total and 12 animals per trial.
"""
import csv
import io
import threading
from datetime import timedelta

import pytest
from django.core.exceptions import PermissionDenied
from django.db import connection
from django.urls import reverse
from django.utils import timezone

from colonies.models import Deviation
from experiments import services
from experiments.models import Cohort, Dish, Override, SlotClaim, Trial
from tests.experiments.builders import days_ago, make_cohort, make_protocol, make_stocked_tank, make_study, uv_values
from tests.factories import make_user, page_text


def trial(study, user, *, dish=None, cohort=None, dish_animals=None, override_reason="", slot=None, **values):
    """Record on an existing dish, or on a new dish set up from `cohort` in the same step, in the first slot
    with no trial that nobody else has claimed (claimed first: only the claimant records a slot)."""
    taken = set(study.trials.counting().values_list("slot", flat=True)) | set(
        SlotClaim.objects.active().filter(study=study).exclude(claimed_by=user).values_list("slot", flat=True))
    slot = slot or next(s["slot"] for s in study.allocation if s["slot"] not in taken)
    where = {"dish": dish} if dish is not None else {"cohort": cohort, "dish_animals": dish_animals}
    services.claim_slot(user=user, study=study, slot=slot)  # only the claimant records a slot (blinding.py)
    return services.record_trial(user=user, study=study, slot=slot, values=uv_values(**values),
                                 override_reason=override_reason, **where)


@pytest.fixture
def drawn(researcher, protocol):
    """The reviewer's cohort: 24 animals drawn ten days ago, and a study with room for many trials."""
    cohort = make_cohort(user=researcher, protocol=protocol, animals=24, at=days_ago(10))
    study = make_study(user=researcher, protocol=protocol, replicates=6)
    return cohort, study


# --- the reviewer's scenario and per-dish limits ---------------------------------------------------------
def test_three_dishes_of_eight_from_24_animals_all_run_in_the_same_hour_are_accepted(drawn, researcher):
    # Worked example (issue 11, the reviewer's report): 24 animals drawn for three dishes of 8. Per cohort the
    # second dish was refused ("rest 0.0 h; requires at least 20 h"); per dish each is a first exposure.
    cohort, study = drawn
    start = days_ago(9)
    results = [trial(study, researcher, cohort=cohort, dish_animals=8, animals=8, at=start + timedelta(minutes=20 * i))
               for i in range(3)]
    dishes = [r.trial.dish for r in results]
    assert [(d.cohort_id, d.number, d.animals) for d in dishes] == [(cohort.pk, n, 8) for n in (1, 2, 3)]
    assert [d.label for d in dishes] == [f"{cohort.label}-D{n}" for n in (1, 2, 3)]
    assert not any(r.override for r in results) and not Override.objects.exists()
    assert services.animals_in_dishes(cohort) == 24
    for d in dishes:
        state = services.dish_state(d, days_ago(0))
        assert (state.exposures, state.cumulative_dose_mj_cm2, state.animals) == (1, 20.0, 8)  # 2 mW/cm² x 10 s


def test_a_second_trial_on_the_same_dish_within_the_rest_is_refused_and_a_manager_may_override(
        drawn, researcher, manager):
    cohort, study = drawn
    first = trial(study, researcher, cohort=cohort, dish_animals=8, animals=8, at=days_ago(9)).trial
    other = trial(study, researcher, cohort=cohort, dish_animals=8, animals=8, at=days_ago(9)).trial
    with pytest.raises(services.LimitRefused) as refusal:
        trial(study, researcher, dish=first.dish, animals=8, at=days_ago(9) + timedelta(hours=12))
    [breach] = refusal.value.breaches
    assert (breach.limit, breach.value, breach.allowed) == ("rest", 12.0, 20)  # 12 h of the 20 h required
    assert breach.message == (f"Rest since the last exposure of dish {first.dish.label} would be 12.0 h; the protocol "
                              "requires at least 20 h.")
    # The other dish of the same cohort is another group of animals: its own rest starts at its own trial.
    assert trial(study, researcher, dish=other.dish, animals=8, at=days_ago(8)).override is None
    with pytest.raises(PermissionDenied):
        trial(study, researcher, dish=first.dish, animals=8, at=days_ago(9) + timedelta(hours=12),
              override_reason="I am sure")
    result = trial(study, manager, dish=first.dish, animals=8, at=days_ago(9) + timedelta(hours=12),
                   override_reason="Arena booked twice; animals active")
    assert result.override.breaches == [breach.message]
    assert result.deviation.subject == f"dish:{first.dish.pk}" and first.dish.label in result.deviation.summary
    assert Deviation.objects.count() == 1


def test_exposures_count_per_dish_the_fourth_on_one_dish_is_refused(drawn, researcher):
    cohort, study = drawn
    dish = services.set_up_dish(user=researcher, cohort=cohort, animals=8, at=days_ago(9.5))
    for day in (9, 8, 7):
        trial(study, researcher, dish=dish, animals=8, at=days_ago(day))
    with pytest.raises(services.LimitRefused, match=f"This would be exposure 4 of dish {dish.label}; the protocol "
                                                    "allows 3."):
        trial(study, researcher, dish=dish, animals=8, at=days_ago(6))
    # A fresh dish of the same cohort starts at exposure 1 the same day.
    fresh = trial(study, researcher, cohort=cohort, dish_animals=8, animals=8, at=days_ago(6)).trial
    assert services.dish_state(fresh.dish, days_ago(0)).exposures == 1
    assert Trial.objects.filter(dish=dish).count() == 3


def test_cumulative_dose_is_per_dish(drawn, researcher):
    cohort, study = drawn
    a = trial(study, researcher, cohort=cohort, dish_animals=8, animals=8, at=days_ago(9), irradiance=5,
              duration=16).trial  # 5 mW/cm² x 16 s = 80 mJ/cm²
    b = trial(study, researcher, cohort=cohort, dish_animals=8, animals=8, at=days_ago(9), irradiance=5,
              duration=16).trial
    with pytest.raises(services.LimitRefused, match=f"Cumulative dose of dish {a.dish.label} would be 160 mJ/cm²; "
                                                    "the protocol allows 150 mJ/cm²"):
        trial(study, researcher, dish=a.dish, animals=8, at=days_ago(8), irradiance=5, duration=16)
    # 80 + 70 = 150 on dish b is at the limit, not over it; per cohort it would have been 230.
    trial(study, researcher, dish=b.dish, animals=8, at=days_ago(8), irradiance=5, duration=14)
    assert services.dish_state(b.dish, days_ago(0)).cumulative_dose_mj_cm2 == 150.0
    assert services.dish_state(a.dish, days_ago(0)).cumulative_dose_mj_cm2 == 80.0


def test_a_trial_may_not_use_more_animals_than_its_dish_holds_alive(drawn, researcher, manager):
    cohort, study = drawn
    first = trial(study, researcher, cohort=cohort, dish_animals=8, animals=8, at=days_ago(9), mortality_24h=2).trial
    with pytest.raises(services.LimitRefused) as refusal:  # 8 put in, 2 dead at 24 h: 6 alive (arithmetic)
        trial(study, manager, dish=first.dish, animals=7, at=days_ago(8), override_reason="Please")
    assert [b.limit for b in refusal.value.breaches] == ["group_animals"] and not refusal.value.overridable
    assert "more than dish" in str(refusal.value) and "holds alive (6)" in str(refusal.value)
    assert trial(study, researcher, dish=first.dish, animals=6, at=days_ago(8)).override is None


def test_a_new_dish_smaller_than_the_trial_is_refused_and_nothing_is_set_up(drawn, researcher):
    cohort, study = drawn
    with pytest.raises(services.LimitRefused, match=r"Animals in the trial 8 is more than dish .* holds alive \(5\)"):
        trial(study, researcher, cohort=cohort, dish_animals=5, animals=8, at=days_ago(9))
    assert not Dish.objects.exists() and not Trial.objects.exists()  # one transaction: no dish without its trial


def test_a_refused_trial_leaves_no_new_dish(drawn, researcher):
    cohort, study = drawn
    with pytest.raises(services.LimitRefused, match="Irradiance 6 mW/cm²"):
        trial(study, researcher, cohort=cohort, dish_animals=8, animals=8, at=days_ago(9), irradiance=6, duration=2)
    assert not Dish.objects.exists() and services.animals_in_dishes(cohort) == 0


def test_record_trial_needs_exactly_one_of_a_dish_or_a_cohort(drawn, researcher):
    cohort, study = drawn
    dish = services.set_up_dish(user=researcher, cohort=cohort, animals=8, at=days_ago(9.5))
    for where in ({}, {"dish": dish, "cohort": cohort}):
        with pytest.raises(services.Refused, match="Dish: choose an open dish, or a cohort"):
            services.record_trial(user=researcher, study=study, slot=1, values=uv_values(at=days_ago(9)), **where)


def test_a_trial_before_its_dish_was_set_up_is_refused(drawn, researcher):
    from django.core.exceptions import ValidationError
    cohort, study = drawn
    dish = services.set_up_dish(user=researcher, cohort=cohort, animals=8, at=days_ago(8))
    with pytest.raises(ValidationError, match=f"before dish {dish.label} was set up"):
        trial(study, researcher, dish=dish, animals=8, at=days_ago(9))


# --- the cohort's size: no overdraw, also under concurrency ---------------------------------------------
def test_dishes_never_take_more_animals_than_the_cohort_holds(drawn, researcher):
    cohort, study = drawn
    services.set_up_dish(user=researcher, cohort=cohort, animals=8, at=days_ago(9))
    services.set_up_dish(user=researcher, cohort=cohort, animals=8, at=days_ago(9))
    with pytest.raises(services.Refused) as refusal:
        services.set_up_dish(user=researcher, cohort=cohort, animals=10, at=days_ago(9))
    assert str(refusal.value) == (f"Animals in the dish 10 is not possible: allowed range 1–8 (the animals of cohort "
                                  f"{cohort.label} not in a dish yet, of 24 drawn). Nothing was set up.")
    services.set_up_dish(user=researcher, cohort=cohort, animals=8, at=days_ago(9))
    with pytest.raises(services.Refused, match=f"all 24 animals of cohort {cohort.label} are in dishes already"):
        trial(study, researcher, cohort=cohort, animals=1, at=days_ago(8))
    assert Dish.objects.count() == 3 and not Trial.objects.exists()


def test_a_dish_cannot_be_set_up_from_an_ended_cohort_or_before_the_draw(researcher, protocol):
    cohort = make_cohort(user=researcher, protocol=protocol, animals=10, at=days_ago(10))
    with pytest.raises(services.Refused, match="before cohort"):
        services.set_up_dish(user=researcher, cohort=cohort, animals=2, at=days_ago(11))
    with pytest.raises(services.Refused, match="in the future"):
        services.set_up_dish(user=researcher, cohort=cohort, animals=2, at=timezone.now() + timedelta(hours=2))
    services.end_cohort(user=researcher, cohort=cohort, end=Cohort.End.DIED)
    with pytest.raises(services.Refused, match="has ended"):
        services.set_up_dish(user=researcher, cohort=cohort, animals=2)
    assert not Dish.objects.exists()


@pytest.mark.django_db(transaction=True)
def test_two_simultaneous_dish_set_ups_cannot_overdraw_a_cohort():
    """Real concurrent connections (one per thread): the cohort row lock (PostgreSQL) or BEGIN IMMEDIATE
    (SQLite) makes the second set-up count again after the first; 16 + 16 > 24, so one is refused."""
    from colonies.roles import RESEARCHER
    users = [make_user(f"dish{i}", role=RESEARCHER) for i in range(2)]
    cohort = make_cohort(user=users[0], protocol=make_protocol(), animals=24, at=days_ago(2))
    barrier = threading.Barrier(len(users))
    outcomes: dict[str, str] = {}

    def attempt(user):
        try:
            barrier.wait(timeout=10)
            services.set_up_dish(user=user, cohort=cohort, animals=16)
            outcomes[user.username] = "set up"
        except services.Refused as refusal:
            outcomes[user.username] = str(refusal)
        except Exception as error:  # pragma: no cover - reported by the assertion below
            outcomes[user.username] = f"error: {error!r}"
        finally:
            connection.close()

    threads = [threading.Thread(target=attempt, args=(u,)) for u in users]
    for t in threads:
        t.start()
    for t in threads:
        t.join(timeout=60)
    assert sorted(o if o == "set up" else o[:40] for o in outcomes.values()) == \
        ["Animals in the dish 16 is not possible: ", "set up"], outcomes
    assert [o for o in outcomes.values() if o != "set up"][0].startswith(
        "Animals in the dish 16 is not possible: allowed range 1–8")
    assert list(Dish.objects.values_list("animals", flat=True)) == [16]


@pytest.mark.django_db(transaction=True)
def test_two_simultaneous_trials_setting_up_dishes_cannot_overdraw_a_cohort():
    """The same race through record_trial (a new dish in the trial's step): one trial and one dish saved."""
    from colonies.roles import RESEARCHER
    owner = make_user("owner", role=RESEARCHER)
    protocol = make_protocol()
    cohort = make_cohort(user=owner, protocol=protocol, animals=16, at=days_ago(2))
    study = make_study(user=owner, protocol=protocol, replicates=2)
    for slot in (1, 2):
        services.claim_slot(user=owner, study=study, slot=slot)
    barrier = threading.Barrier(2)
    outcomes: list[str] = []

    def attempt(slot):
        try:
            barrier.wait(timeout=10)
            services.record_trial(user=owner, study=study, slot=slot, cohort=cohort, dish_animals=10,
                                  values=uv_values(at=days_ago(1)))
            outcomes.append("saved")
        except services.Refused as refusal:
            outcomes.append(str(refusal))
        except Exception as error:  # pragma: no cover - reported by the assertion below
            outcomes.append(f"error: {error!r}")
        finally:
            connection.close()

    threads = [threading.Thread(target=attempt, args=(slot,)) for slot in (1, 2)]
    for t in threads:
        t.start()
    for t in threads:
        t.join(timeout=60)
    assert sorted(o[:40] for o in outcomes) == ["Animals in the dish 10 is not possible: ", "saved"], outcomes
    assert Dish.objects.count() == 1 and Trial.objects.count() == 1


# --- ends: dishes, then the cohort; returns count in the tank's population -------------------------------
def test_a_dish_returned_to_a_tank_counts_in_its_population_and_on_the_tank_page(client, researcher, protocol,
                                                                                  technician):
    tank = make_stocked_tank(estimate=1000, reserve=100, user=technician, code="LV-D1")
    # Drawn after the census (two days ago), so the draw counts against it.
    cohort = make_cohort(user=researcher, protocol=protocol, tank=tank, animals=24, at=days_ago(1.5))
    study = make_study(user=researcher, protocol=protocol)
    dish = trial(study, researcher, cohort=cohort, dish_animals=8, animals=8, at=days_ago(1.2),
                 mortality_24h=1).trial.dish
    assert services.current_population(tank) == 976  # 1000 - 24 drawn (arithmetic)
    services.end_dish(user=researcher, dish=dish, end=Dish.End.RETURNED, returned_to=tank, returned_count=7)
    assert services.current_population(tank) == 983  # + 7 returned alive
    assert services.available(tank) == 883  # - reserve 100
    client.force_login(researcher)
    summary = client.get(reverse("colonies:tank-detail", args=[tank.code])).context["summary"]
    assert ("returned from trials", 7) in summary.movements and summary.now_estimate == 983
    # The cohort ends for the 16 animals never put in a dish; together 7 + 14 come back, never counted twice.
    with pytest.raises(services.Refused, match=r"allowed range 0–16 \(the cohort's animals never put in a dish\)"):
        services.end_cohort(user=researcher, cohort=cohort, end=Cohort.End.RETURNED, returned_to=tank,
                            returned_count=24)
    services.end_cohort(user=researcher, cohort=cohort, end=Cohort.End.RETURNED, returned_to=tank, returned_count=14)
    assert services.current_population(tank) == 997  # 1000 - 24 + 7 + 14
    assert services.cohort_movements(tank.pk, days_ago(2)) == [("drawn for trials", -24), ("returned from trials", 21)]


def test_a_voided_dish_returns_nothing_and_frees_its_animals(researcher, protocol, technician):
    tank = make_stocked_tank(estimate=500, reserve=0, user=technician)
    cohort = make_cohort(user=researcher, protocol=protocol, tank=tank, animals=10, at=days_ago(3))
    dish = services.set_up_dish(user=researcher, cohort=cohort, animals=10, at=days_ago(2))
    with pytest.raises(services.Refused, match="reason"):
        services.void_dish(user=researcher, dish=dish, reason=" ")
    services.void_dish(user=researcher, dish=dish, reason="Counted twice")
    dish.refresh_from_db()
    assert dish.is_voided and dish.history.first().history_change_reason == "Voided: Counted twice"
    assert services.animals_in_dishes(cohort) == 0
    again = services.set_up_dish(user=researcher, cohort=cohort, animals=10, at=days_ago(1))
    assert again.number == 2  # numbers are never reused
    with pytest.raises(services.Refused, match="is voided"):
        services.end_dish(user=researcher, dish=dish, end=Dish.End.DIED)


def test_a_dish_with_trials_cannot_be_voided(drawn, researcher):
    cohort, study = drawn
    dish = trial(study, researcher, cohort=cohort, dish_animals=8, animals=8, at=days_ago(9)).trial.dish
    with pytest.raises(services.Refused, match="has 1 trial: its animals were exposed"):
        services.void_dish(user=researcher, dish=dish, reason="Mistake")


def test_dish_end_checks_name_the_field(drawn, researcher, technician):
    cohort, study = drawn
    dish = trial(study, researcher, cohort=cohort, dish_animals=8, animals=8, at=days_ago(5)).trial.dish
    tank = cohort.origin_tank
    other_species = make_stocked_tank(user=technician)
    cases = [
        ({"end": Dish.End.RETURNED, "returned_to": tank, "returned_count": 9},
         "Animals returned 9 is not possible: allowed range 0–8 (the animals put in the dish)."),
        ({"end": Dish.End.RETURNED, "returned_to": None, "returned_count": 8}, "Returned to / Animals returned"),
        ({"end": Dish.End.RETURNED, "returned_to": other_species, "returned_count": 8}, "holds another species"),
        ({"end": Dish.End.RETIRED, "method": " "}, "Retired: say which method was used."),
        ({"end": Cohort.End.IN_DISHES}, "End: 'dishes' is not one of"),
        ({"end": Dish.End.DIED, "at": days_ago(6)}, f"is before the last trial on dish {dish.label} ran"),
    ]
    for kwargs, words in cases:
        with pytest.raises(services.Refused) as refusal:
            services.end_dish(user=researcher, dish=dish, **kwargs)
        assert words in str(refusal.value), (kwargs, str(refusal.value))
    services.end_dish(user=researcher, dish=dish, end=Dish.End.RETIRED, method="Fixed for histology (SOP 12)")
    with pytest.raises(services.Refused, match="has already ended"):
        services.end_dish(user=researcher, dish=dish, end=Dish.End.DIED)
    with pytest.raises(services.LimitRefused, match=f"Dish {dish.label} has ended"):
        trial(study, researcher, dish=dish, animals=8, at=days_ago(1))


def test_the_cohort_ends_after_its_dishes_and_only_for_animals_never_in_a_dish(drawn, researcher):
    cohort, study = drawn
    dishes = [services.set_up_dish(user=researcher, cohort=cohort, animals=8, at=days_ago(9)) for _ in range(3)]
    with pytest.raises(services.Refused) as refusal:
        services.end_cohort(user=researcher, cohort=cohort, end=Cohort.End.DIED)
    assert str(refusal.value) == (f"Cohort {cohort.label} still has 3 open dishes ({', '.join(d.label for d in dishes)})"
                                  ": record each dish's end first. Nothing was changed.")
    for d in dishes:
        services.end_dish(user=researcher, dish=d, end=Dish.End.DIED, note="Heater failed")
    with pytest.raises(services.Refused, match="all 24 animals .* went into dishes"):
        services.end_cohort(user=researcher, cohort=cohort, end=Cohort.End.DIED)
    services.end_cohort(user=researcher, cohort=cohort, end=Cohort.End.IN_DISHES)
    cohort.refresh_from_db()
    assert cohort.end == Cohort.End.IN_DISHES and cohort.returned_count is None


def test_a_cohort_with_animals_outside_dishes_cannot_claim_all_went_into_dishes(researcher, protocol):
    cohort = make_cohort(user=researcher, protocol=protocol, animals=10, at=days_ago(3))
    services.set_up_dish(user=researcher, cohort=cohort, animals=8, at=days_ago(2))
    services.end_dish(user=researcher, dish=cohort.dishes.get(), end=Dish.End.DIED)
    with pytest.raises(services.Refused, match="2 animals of cohort .* never went into a dish"):
        services.end_cohort(user=researcher, cohort=cohort, end=Cohort.End.IN_DISHES)


# --- pages ------------------------------------------------------------------------------------------------
def _trial_form(study, **fields):
    slot = next(s["slot"] for s in study.allocation
                if not Trial.objects.counting().filter(study=study, slot=s["slot"]).exists())
    services.claim_slot(user=study.owner, study=study, slot=slot)  # the owner runs it: claimed first (blinding.py)
    data = {"slot": str(slot), "run_at": days_ago(2).strftime("%Y-%m-%dT%H:%M"), "vessel": "glass Petri dish",
            "animals": "8", "kind": "uv", "wavelength_nm": "365", "irradiance_mw_cm2": "2", "duration_s": "10",
            "disperse_s": "130"}
    data.update(fields)
    return reverse("experiments:trial-new", args=[study.code]), data


def test_trial_page_sets_up_a_new_dish_or_picks_an_open_one(client, drawn, researcher):
    cohort, study = drawn
    client.force_login(researcher)
    url, data = _trial_form(study, cohort=str(cohort.pk), dish_animals="8")
    assert client.post(url, data).status_code == 302
    dish = Dish.objects.get()
    assert dish.animals == 8 and dish.set_up_by == researcher
    url, data = _trial_form(study, dish=str(dish.pk), run_at=days_ago(1).strftime("%Y-%m-%dT%H:%M"))
    page = page_text(client.get(url))  # the form, for the slot just claimed
    assert f"{dish.label} · 8 animals" in page and "New dish from a cohort" in page
    response = client.post(url, data)
    assert response.status_code == 302 and Dish.objects.count() == 1
    assert list(dish.trials.values_list("animals", flat=True)) == [8, 8]


def test_trial_page_names_the_field_for_a_mismatched_or_missing_group_and_an_overdraw(client, drawn, researcher,
                                                                                      protocol):
    cohort, study = drawn
    other = make_cohort(user=researcher, protocol=protocol, animals=8, at=days_ago(10))
    dish = services.set_up_dish(user=researcher, cohort=other, animals=8, at=days_ago(9))
    client.force_login(researcher)
    url, data = _trial_form(study, dish=str(dish.pk), cohort=str(cohort.pk))
    response = client.post(url, data)
    assert response.status_code == 400
    assert f"Dish {dish.label} is from cohort {other.label}, not {cohort.label}" in page_text(response)
    url, data = _trial_form(study)
    assert "Choose an open dish, or the cohort to set up a new dish from." in page_text(client.post(url, data))
    url, data = _trial_form(study, cohort=str(cohort.pk), dish_animals="30", animals="8")
    response = client.post(url, data)
    assert response.status_code == 400
    assert "Animals in the dish 30 is not possible: allowed range 1–24" in page_text(response)
    assert not Trial.objects.exists() and Dish.objects.count() == 1


def test_cohort_page_lists_dishes_with_exposures_24h_outcome_and_end(client, drawn, researcher, technician):
    cohort, study = drawn
    a = trial(study, researcher, cohort=cohort, dish_animals=8, animals=8, at=days_ago(9), mortality_24h=1).trial.dish
    trial(study, researcher, dish=a, animals=7, at=days_ago(8), mortality_24h=2)
    b = trial(study, researcher, cohort=cohort, dish_animals=8, animals=8, at=days_ago(9)).trial.dish
    services.end_dish(user=researcher, dish=b, end=Dish.End.RETURNED, returned_to=cohort.origin_tank, returned_count=8)
    client.force_login(technician)
    response = client.get(cohort.get_absolute_url())
    rows = {r["dish"].pk: r for r in response.context["dish_rows"]}
    # a: 2 exposures, 20 + 20 mJ/cm², 1 + 2 dead at 24 h of 8 put in: 5 alive (arithmetic)
    assert (rows[a.pk]["exposures"], rows[a.pk]["cumulative_dose_mj_cm2"], rows[a.pk]["dead_24h"],
            rows[a.pk]["alive"]) == (2, 40.0, 3, 5)
    assert rows[a.pk]["next_allowed"] == Trial.objects.filter(dish=a).latest().run_at + timedelta(hours=20)
    assert (rows[b.pk]["exposures"], rows[b.pk]["mortality_recorded"], rows[b.pk]["next_allowed"]) == (1, 0, None)
    text = page_text(response)
    assert "(2 of 2 trials counted)" in text and "8 alive to" in text
    assert "In dishes</dt><dd>16 (8 not in a dish)" in text
    assert "End a dish" not in text and "Set up a dish" not in text  # technicians read


def test_ending_a_dish_and_setting_one_up_through_the_cohort_page(client, drawn, researcher):
    cohort, study = drawn
    dish = trial(study, researcher, cohort=cohort, dish_animals=8, animals=8, at=days_ago(9)).trial.dish
    client.force_login(researcher)
    page = page_text(client.get(cohort.get_absolute_url()))
    assert "End a dish" in page and "Set up a dish" in page and "Record the end of each open dish first" in page
    response = client.post(reverse("experiments:dish-end", args=[cohort.pk]),
                           {"dish": dish.pk, "end": "returned", "returned_to": cohort.origin_tank_id,
                            "returned_count": "9"})
    assert response.status_code == 400
    assert "Animals returned 9 is not possible: allowed range 0–8 (the animals put in dish" in page_text(response)
    response = client.post(reverse("experiments:dish-end", args=[cohort.pk]),
                           {"dish": dish.pk, "end": "returned", "returned_to": cohort.origin_tank_id,
                            "returned_count": "8"})
    assert response.status_code == 302 and response["Location"] == dish.get_absolute_url()
    dish.refresh_from_db()
    assert (dish.end, dish.returned_count, dish.ended_by) == (Dish.End.RETURNED, 8, researcher)
    response = client.post(reverse("experiments:dish-new", args=[cohort.pk]), {"animals": "17"})
    assert response.status_code == 400
    assert "Animals in the dish 17 is not possible: allowed range 1–16" in page_text(response)
    assert client.post(reverse("experiments:dish-new", args=[cohort.pk]), {"animals": "16"}).status_code == 302
    assert cohort.dishes.get(number=2).animals == 16


def test_only_who_drew_the_cohort_set_up_the_dish_or_a_manager_may_change_dishes(client, drawn, researcher, manager):
    cohort, study = drawn
    dish = trial(study, researcher, cohort=cohort, dish_animals=8, animals=8, at=days_ago(9)).trial.dish
    stranger = make_user("rory", role="researcher")
    client.force_login(stranger)
    assert client.post(reverse("experiments:dish-new", args=[cohort.pk]), {"animals": "2"}).status_code == 403
    assert client.post(reverse("experiments:dish-end", args=[cohort.pk]),
                       {"dish": dish.pk, "end": "died"}).status_code == 403
    empty = services.set_up_dish(user=researcher, cohort=cohort, animals=2)
    assert client.post(reverse("experiments:dish-void", args=[empty.pk]), {"reason": "x"}).status_code == 403
    assert not Dish.objects.filter(end="died").exists() and not Dish.objects.voided().exists()
    client.force_login(manager)
    assert client.post(reverse("experiments:dish-void", args=[empty.pk]), {"reason": "Set up twice"}).status_code == 302
    assert client.post(reverse("experiments:dish-end", args=[cohort.pk]),
                       {"dish": dish.pk, "end": "died"}).status_code == 302
    dish.refresh_from_db()
    empty.refresh_from_db()
    assert dish.end == Dish.End.DIED and dish.ended_by == manager and empty.voided_by == manager


def test_ledger_runs_its_totals_per_dish(client, drawn, researcher, manager):
    cohort, study = drawn
    a = trial(study, researcher, cohort=cohort, dish_animals=8, animals=8, at=days_ago(9)).trial.dish
    b = trial(study, researcher, cohort=cohort, dish_animals=8, animals=8, at=days_ago(9)).trial.dish
    trial(study, researcher, dish=a, animals=8, at=days_ago(8))
    client.force_login(manager)
    body = b"".join(client.get(reverse("experiments:ledger-csv")).streaming_content).decode()
    rows = [(r["cohort"], r["dish"], r["exposure_number"], r["cumulative_dose_mj_cm2"], r["rest_h"])
            for r in csv.DictReader(io.StringIO(body))]
    assert rows == [(cohort.label, a.label, "1", "20", ""), (cohort.label, a.label, "2", "40", "24"),
                    (cohort.label, b.label, "1", "20", "")]
    text = page_text(client.get(reverse("experiments:ledger")))
    assert a.label in text and b.label in text


@pytest.mark.parametrize("n", [1, 4])
def test_cohort_page_and_ledger_query_counts_do_not_grow_with_dishes(client, manager, researcher, protocol, technician,
                                                                    django_assert_max_num_queries, n):
    tank = make_stocked_tank(estimate=5000, reserve=0, user=technician)
    cohort = make_cohort(user=researcher, protocol=protocol, tank=tank, animals=8 * n + 2, at=days_ago(10))
    study = make_study(user=researcher, protocol=protocol, replicates=4, code=f"dq-{n}")
    for i in range(n):
        dish = trial(study, researcher, cohort=cohort, dish_animals=8, animals=8, at=days_ago(9), mortality_24h=1)
        trial(study, researcher, dish=dish.trial.dish, animals=7, at=days_ago(8))
        if i % 2:
            services.end_dish(user=researcher, dish=dish.trial.dish, end=Dish.End.RETURNED, returned_to=tank,
                              returned_count=6)
    services.set_up_dish(user=researcher, cohort=cohort, animals=2)  # one without trials (a void button)
    client.force_login(manager)
    # Session, user, roles, then the cohort, its trials, its dishes and the tanks to return to.
    for url, limit in ((cohort.get_absolute_url(), 7), (reverse("experiments:ledger"), 7),
                       (reverse("experiments:ledger-csv"), 5)):
        with django_assert_max_num_queries(limit):
            response = client.get(url)
            assert response.status_code == 200
            b"".join(response.streaming_content) if response.streaming else response.content


def test_back_office_lists_dishes_read_only_with_their_history(client, drawn, researcher):
    cohort, study = drawn
    study.blinded = True
    study.save()
    dish = trial(study, researcher, cohort=cohort, dish_animals=8, animals=8, at=days_ago(9),
                 irradiance=2.345).trial.dish
    services.end_dish(user=researcher, dish=dish, end=Dish.End.DIED, note="Heater failed")
    staff = make_user("mira", role="manager", is_staff=True)
    client.force_login(staff)
    for url in (reverse("admin:experiments_dish_changelist"), reverse("admin:experiments_dish_change", args=[dish.pk]),
                reverse("admin:experiments_dish_history", args=[dish.pk])):
        response = client.get(url)
        assert response.status_code == 200, url
        text = page_text(response)
        assert "2.345" not in text and "Ultraviolet" not in text and study.conditions[1] not in text  # blinded
    assert "Heater failed" in page_text(client.get(reverse("admin:experiments_dish_history", args=[dish.pk])))
    assert client.get(reverse("admin:experiments_dish_add")).status_code == 403
    assert client.get(reverse("admin:experiments_dish_delete", args=[dish.pk])).status_code == 403
    assert client.post(reverse("admin:experiments_dish_change", args=[dish.pk]), {"animals": 1}).status_code == 403
