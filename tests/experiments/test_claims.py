"""Claiming a slot: "I will run slot N" (services.claim_slot, the new-trial page).

Open slots are listed by number and code only; the operator who claims one sees its condition and
only they record it; another operator claims another slot; a manager (or the claimant) releases a
stale claim with a reason. Two operators claiming the same slot at once: one wins.
"""
import threading

import pytest
from django.core.exceptions import PermissionDenied
from django.db import connection
from django.urls import reverse

from colonies.roles import MANAGER, RESEARCHER
from experiments import services
from experiments.models import SlotClaim, Trial
from tests.experiments.builders import days_ago, make_cohort, make_protocol, make_study, record, uv_values
from tests.factories import make_user, page_text

CONDITIONS = ("Lumen-alpha", "Lumen-beta", "Lumen-gamma")


@pytest.fixture
def blind(researcher, protocol):
    cohort = make_cohort(user=researcher, protocol=protocol, at=days_ago(10))
    study = make_study(user=researcher, protocol=protocol, conditions=CONDITIONS, replicates=2, blinded=True)
    return cohort, study


def _new_trial_page(client, study, **params) -> str:
    response = client.get(reverse("experiments:trial-new", args=[study.code]), params)
    assert response.status_code == 200
    return response.content.decode()


def test_open_slots_show_number_and_code_only_until_claimed(client, researcher, manager, blind):
    _, study = blind
    client.force_login(researcher)
    page = _new_trial_page(client, study)
    assert all(label not in page for label in CONDITIONS)
    assert all(f"I will run slot {a['slot']}" in page and a["code"] in page for a in study.allocation)
    assert "Save trial" not in page  # no form before a claim

    response = client.post(reverse("experiments:slot-claim", args=[study.code, 3]))

    assert response.status_code == 302 and response["Location"].endswith("?slot=3")
    page = _new_trial_page(client, study, slot=3)
    slot3 = study.slot(3)
    assert slot3["condition"] in page and "Save trial" in page
    assert [label for label in CONDITIONS if label in page] == [slot3["condition"]]  # only the claimed slot's
    claim = SlotClaim.objects.get()
    assert (claim.slot, claim.claimed_by, claim.is_active) == (3, researcher, True)
    assert claim.history.get().history_user == researcher
    client.force_login(manager)
    page = _new_trial_page(client, study)
    assert slot3["condition"] not in page and "claimed by rhea" in page and "I will run slot 3" not in page


def test_only_the_claimant_records_the_slot(client, researcher, manager, blind):
    cohort, study = blind
    services.claim_slot(user=researcher, study=study, slot=1)
    with pytest.raises(services.Refused, match="Slot 1 .* was claimed by rhea .*; claim another open slot"):
        services.claim_slot(user=manager, study=study, slot=1)
    with pytest.raises(services.Refused, match="claimed by rhea"):
        services.record_trial(user=manager, study=study, slot=1, cohort=cohort, values=uv_values())
    with pytest.raises(services.Refused, match="is not claimed: claim it first"):
        services.record_trial(user=manager, study=study, slot=2, cohort=cohort, values=uv_values())
    client.force_login(manager)  # the form offers only the slots one claimed
    data = {"slot": "1", "cohort": str(cohort.pk), "run_at": days_ago(2).strftime("%Y-%m-%dT%H:%M"),
            "vessel": "dish", "animals": "10", "kind": "uv", "wavelength_nm": "365", "irradiance_mw_cm2": "2",
            "duration_s": "10"}
    services.claim_slot(user=manager, study=study, slot=2)
    response = client.post(reverse("experiments:trial-new", args=[study.code]), data)
    assert response.status_code == 400 and "Slot" in page_text(response)
    assert not Trial.objects.exists()

    trial = services.record_trial(user=researcher, study=study, slot=1, cohort=cohort, values=uv_values()).trial

    assert trial.run_by == researcher
    with pytest.raises(services.Refused, match="already has a trial"):
        services.claim_slot(user=manager, study=study, slot=1)


def test_claiming_a_slot_one_holds_again_changes_nothing_and_bad_slots_are_named(researcher, blind):
    _, study = blind
    first = services.claim_slot(user=researcher, study=study, slot=2)
    assert services.claim_slot(user=researcher, study=study, slot=2) == first
    assert SlotClaim.history.count() == 1
    with pytest.raises(services.Refused, match=r"Slot 99 is not in the allocation of study .* \(1–6\)"):
        services.claim_slot(user=researcher, study=study, slot=99)


def test_only_the_owner_or_a_manager_claims(blind):
    _, study = blind
    with pytest.raises(PermissionDenied, match="may claim slots"):
        services.claim_slot(user=make_user("olaf", role=RESEARCHER), study=study, slot=1)


def test_a_manager_releases_a_stale_claim_with_a_reason_and_the_slot_opens(client, researcher, manager, blind):
    cohort, study = blind
    claim = services.claim_slot(user=researcher, study=study, slot=4)
    other = make_user("olga", role=MANAGER)
    client.force_login(make_user("olaf", role=RESEARCHER))  # not the claimant, not a manager
    assert client.post(reverse("experiments:slot-release", args=[study.code, 4]), {"reason": "x"}).status_code == 403
    with pytest.raises(services.Refused, match="Reason"):
        services.release_claim(user=manager, claim=claim, reason="  ")

    services.release_claim(user=manager, claim=claim, reason="Operator on leave this week")

    claim.refresh_from_db()
    assert (claim.released_by, claim.release_reason, claim.is_active) == (manager, "Operator on leave this week", False)
    assert claim.history.latest("history_date").history_change_reason == "Claim released: Operator on leave this week"
    services.claim_slot(user=other, study=study, slot=4)
    trial = services.record_trial(user=other, study=study, slot=4, cohort=cohort, values=uv_values()).trial
    assert trial.run_by == other
    with pytest.raises(services.Refused, match="has its trial"):
        services.release_claim(user=manager, claim=SlotClaim.objects.active().get(slot=4), reason="tidy up")


def test_the_claimant_releases_from_the_page(client, researcher, blind):
    _, study = blind
    services.claim_slot(user=researcher, study=study, slot=5)
    client.force_login(researcher)
    response = client.post(reverse("experiments:slot-release", args=[study.code, 5]), {"reason": "Wrong slot"})
    assert response.status_code == 302
    assert not SlotClaim.objects.active().exists()
    response = client.post(reverse("experiments:slot-release", args=[study.code, 5]), {"reason": "Again"})
    assert response.status_code == 404  # no active claim left


def test_a_voided_trial_leaves_its_slot_to_the_claimant(researcher, manager, blind):
    cohort, study = blind
    trial = record(study, cohort, researcher, slot=1, at=days_ago(9)).trial
    services.void_trial(user=researcher, trial=trial, reason="Wrong cohort entered")
    with pytest.raises(services.Refused, match="claimed by rhea"):
        services.claim_slot(user=manager, study=study, slot=1)
    again = services.record_trial(user=researcher, study=study, slot=1, dish=trial.dish,  # the same animals
                                  values=uv_values(at=days_ago(8))).trial
    assert again.slot == 1 and again.run_by == researcher


@pytest.mark.django_db(transaction=True)
def test_two_operators_claiming_the_same_slot_at_once_one_wins():
    """Real concurrent connections, one per thread, released together by a barrier: a row lock on the study
    (PostgreSQL), BEGIN IMMEDIATE with a busy timeout (SQLite); the partial unique constraint backs them up."""
    owner = make_user("rhea", role=RESEARCHER)
    operators = [make_user(f"op{i}", role=MANAGER) for i in range(6)]
    protocol = make_protocol()
    study = make_study(user=owner, protocol=protocol, conditions=CONDITIONS, replicates=2, blinded=True)
    barrier = threading.Barrier(len(operators))
    outcomes: dict[str, str] = {}

    def attempt(user):
        try:
            barrier.wait(timeout=10)
            services.claim_slot(user=user, study=study, slot=1)
            outcomes[user.username] = "claimed"
        except services.Refused as refusal:
            outcomes[user.username] = str(refusal)
        except Exception as error:  # pragma: no cover - reported by the assertions below
            outcomes[user.username] = f"error: {error!r}"
        finally:
            connection.close()

    threads = [threading.Thread(target=attempt, args=(u,)) for u in operators]
    for t in threads:
        t.start()
    for t in threads:
        t.join(timeout=60)
    assert len(outcomes) == len(operators), outcomes
    winners = [name for name, outcome in outcomes.items() if outcome == "claimed"]
    assert len(winners) == 1, outcomes
    claim = SlotClaim.objects.active().get(study=study, slot=1)
    assert claim.claimed_by.username == winners[0]
    for name, outcome in outcomes.items():
        if name != winners[0]:
            assert f"was claimed by {winners[0]}" in outcome and outcome.endswith("claim another open slot."), outcome


@pytest.mark.parametrize("n", [1, 4])
def test_new_trial_page_queries_do_not_grow_with_slots_and_claims(client, researcher, manager, protocol,
                                                                   django_assert_max_num_queries, n):
    study = make_study(user=researcher, protocol=protocol, conditions=CONDITIONS, replicates=2 * n, blinded=True,
                       code=f"claims-{n}")
    for slot in range(1, n + 1):
        services.claim_slot(user=researcher, study=study, slot=slot)
        services.claim_slot(user=manager, study=study, slot=n + slot)
    make_cohort(user=researcher, protocol=protocol, at=days_ago(3))
    client.force_login(researcher)
    with django_assert_max_num_queries(10):  # session, user, roles, study, trials, claims, cohorts, dishes, allowances...
        response = client.get(reverse("experiments:trial-new", args=[study.code]))
        assert response.status_code == 200
