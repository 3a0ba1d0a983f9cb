"""Protocol amendments never change what earlier trials were allowed.

Each trial records the protocol version in force when it ran (experiments/protocols.py); the limit check
when it is recorded and the ledger use that version. Two managers amending one protocol at once get
distinct version numbers (real connections, as tests/colonies/test_concurrency.py).
"""
import pytest
from django.core.exceptions import ValidationError
from django.db import connection

from colonies.signatures import signatures_for

from experiments import limits, protocols, reports, services
from experiments.models import ProtocolVersion, Trial
from tests.colonies.test_concurrency import run_together
from tests.experiments.builders import days_ago, make_cohort, make_protocol, make_stocked_tank, make_study, record
from tests.factories import make_user

# Light dose = irradiance x time: mW/cm² x s = mJ/cm² (SI units, from memory); 4 mW/cm² for 20 s = 80 mJ/cm².
TIGHTER = {"max_cumulative_dose_mj_cm2": 60}
TIGHTER_UV = {"max_irradiance_mw_cm2": 3.0, "max_dose_mj_cm2": 50.0}


def _amend(protocol, manager, **kwargs):
    uv = protocol.allowances.get(kind="uv")
    values = {name: getattr(protocol, name) for name in ("title", "approver", "starts_on", "expires_on",
                                                          "max_animals_per_trial", "max_exposures_per_group",
                                                          "min_rest_hours", "max_cumulative_dose_mj_cm2", "notes")}
    values.update(TIGHTER)
    allowance = {"kind": "uv", "substance": "", **{k: getattr(uv, k) for k in ("wavelength_min_nm", "wavelength_max_nm",
                                                                              "max_duration_s")}, **TIGHTER_UV}
    return protocols.amend(user=manager, protocol=protocol, values=values, allowances=[allowance],
                           reason="Welfare review: lower light doses", **kwargs)


@pytest.fixture
def setting(db, researcher, manager):
    # UV ≤ 5 mW/cm², ≤ 100 mJ/cm² per exposure, ≤ 150 mJ/cm² per dish, 3 exposures, 20 h rest
    protocol = make_protocol()
    tank = make_stocked_tank(user=researcher)
    cohort = make_cohort(user=researcher, protocol=protocol, tank=tank, animals=30, at=days_ago(6))
    study = make_study(user=researcher, protocol=protocol, replicates=3)
    dishes = [services.set_up_dish(user=researcher, cohort=cohort, animals=10, at=days_ago(5)) for _ in range(3)]
    return protocol, dishes, study


def test_an_amendment_leaves_earlier_trials_within_their_limits_and_holds_new_trials_to_the_new_ones(
        setting, researcher, manager):
    protocol, dishes, study = setting
    first = record(study, dishes[0], researcher, at=days_ago(3), irradiance=4.0, duration=20.0).trial  # 80 mJ/cm²
    assert first.protocol_version.number == 1

    version = _amend(protocol, manager, now=days_ago(0.5))  # in force from 12 h ago

    assert version.number == 2 and version.max_cumulative_dose_mj_cm2 == 60
    first.refresh_from_db()
    assert first.protocol_version.number == 1  # unchanged by the amendment
    # The earlier trial against its own terms: within every limit; against the new ones it would not be.
    proposal = limits.Proposal(at=first.run_at, animals=first.animals, kind=first.kind, settings=first.settings(),
                               substance="")
    state = services.dish_state(first.dish, first.run_at, exclude_trial=first.pk)  # as when it was recorded
    assert limits.check_exposure(first.protocol_version.terms(protocol), state, proposal, first.run_at.date()) == []
    under_new = limits.check_exposure(version.terms(protocol), state, proposal, first.run_at.date())
    assert {b.limit for b in under_new} == {"irradiance_mw_cm2", "dose_mj_cm2", "cumulative_dose"}

    # The ledger shows the earlier trial against version 1: 80 of 150 mJ/cm², nothing over a limit.
    trials = list(Trial.objects.counting().select_related("study", "cohort__origin_tank", "dish", "protocol",
                                                           "protocol_version"))
    row = reports.ledger_rows(trials, trials, manager)[0]
    assert (row["protocol_version"], row["cumulative_dose_mj_cm2"], row["max_cumulative_dose_mj_cm2"],
            row["over_limit"]) == (1, 80.0, 150.0, "")

    # A new trial of the same dish is held to version 2: 20 mJ/cm² more makes 100 > 60 mJ/cm².
    with pytest.raises(services.LimitRefused) as refused:
        record(study, first.dish, researcher, at=days_ago(0.1), irradiance=2.0, duration=10.0)
    assert [b.limit for b in refused.value.breaches] == ["cumulative_dose"]
    assert "60 mJ/cm²" in str(refused.value)
    # Another dish within the new limits passes, under version 2; above the new irradiance it is refused.
    fresh = record(study, dishes[1], researcher, at=days_ago(0.1), irradiance=2.0, duration=10.0)
    assert fresh.trial.protocol_version == version
    with pytest.raises(services.LimitRefused) as refused:
        record(study, dishes[2], researcher, at=days_ago(0.1), irradiance=4.0, duration=10.0)  # 4 > 3 mW/cm²
    assert [b.limit for b in refused.value.breaches] == ["irradiance_mw_cm2"]


def test_a_trial_entered_after_an_amendment_but_run_before_it_is_held_to_the_terms_of_its_time(
        setting, researcher, manager):
    protocol, dishes, study = setting
    _amend(protocol, manager, now=days_ago(0.5))  # from 12 h ago on: irradiance ≤ 3 mW/cm²

    late = record(study, dishes[0], researcher, at=days_ago(2), irradiance=4.0, duration=10.0)  # run before it

    assert late.trial.protocol_version.number == 1 and late.override is None


def test_amending_a_signed_protocol_needs_the_managers_signature_and_saves_nothing_without_it(setting, manager):
    protocol, _, _ = setting
    protocols.version_at(protocol, days_ago(10))
    protocol.status = protocol.Status.DRAFT
    protocol.save()
    protocols.approve(user=manager, protocol=protocol, password="pw")
    before = (ProtocolVersion.objects.count(), protocol.history.count(), protocol.signatures.count())

    for password in (None, "wrong"):
        with pytest.raises(ValidationError) as refusal:
            _amend(protocol, manager, password=password)
        assert "Password" in str(refusal.value)
        protocol.refresh_from_db()
        assert (ProtocolVersion.objects.count(), protocol.history.count(), protocol.signatures.count()) == before
        assert protocol.max_cumulative_dose_mj_cm2 == 150

    version = _amend(protocol, manager, password="pw")
    assert version.number == 2
    assert [s.signature.meaning for s in signatures_for(protocol)] == ["approved", "amended"]
    assert all(s.current for s in signatures_for(protocol)[1:])


@pytest.mark.django_db(transaction=True)
def test_two_managers_amending_one_protocol_at_once_get_distinct_version_numbers():
    from colonies.roles import MANAGER
    managers = [make_user(f"boss{i}", role=MANAGER) for i in range(4)]
    protocol = make_protocol()
    protocols.version_at(protocol, days_ago(10))  # version 1

    def amend_as(manager):
        def job():
            try:
                return _amend(type(protocol).objects.get(pk=protocol.pk), manager).number
            finally:
                connection.close()
        return job

    results = run_together([amend_as(m) for m in managers])

    assert not [r for r in results if isinstance(r, Exception)], results
    assert sorted(results) == [2, 3, 4, 5]  # each amendment its own number, none twice
    numbers = list(ProtocolVersion.objects.filter(protocol=protocol).values_list("number", flat=True))
    assert sorted(numbers) == [1, 2, 3, 4, 5]
