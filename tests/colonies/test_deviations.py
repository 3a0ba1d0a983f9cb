"""The deviation rules: each triggers in one scenario and stays quiet in another."""
from datetime import timedelta

import pytest
from django.core.management import call_command
from django.utils import timezone

from colonies import deviations
from colonies.flags import Target
from colonies.models import Check, Deviation, Feeding, WaterChange, Census
from tests.factories import make_check, make_species, make_tank

pytestmark = pytest.mark.django_db
Rule = Deviation.Rule


def _tank(**targets):
    species = make_species(targets=targets or {"temp_c": (20.0, 24.0)}, check_interval_hours=24)
    return make_tank(species=species)


def _series(tank, user, key, values, *, start=None, **extra):
    """One check a day with the given values, oldest first; returns the checks."""
    start = start or timezone.now() - timedelta(days=len(values))
    return [make_check(tank, user=user, observed_at=start + timedelta(days=i), **{key: v}, **extra)
            for i, v in enumerate(values)]


# --- severity -----------------------------------------------------------------------------------

@pytest.mark.parametrize("value, expected", [
    (24.3, Deviation.Severity.MINOR),      # 0.3 outside a 4-wide band = 7.5 %
    (25.5, Deviation.Severity.MODERATE),   # 1.5 / 4 = 37.5 %
    (27.0, Deviation.Severity.MAJOR),      # 3 / 4 = 75 %
    (19.8, Deviation.Severity.MINOR),
])
def test_severity_grows_with_distance_outside_the_band(value, expected):
    assert deviations.severity_outside(value, Target(20.0, 24.0)) == expected


def test_severity_of_one_sided_target_scales_with_the_limit():
    # DO saturation >= 30 %: 27 % is 10 % of the limit below it (minor), 10 % is 67 % below (major)
    assert deviations.severity_outside(27.0, Target(30.0, None)) == Deviation.Severity.MINOR
    assert deviations.severity_outside(10.0, Target(30.0, None)) == Deviation.Severity.MAJOR


# --- out of target --------------------------------------------------------------------------------

def test_out_of_target_reading_opens_one_deviation_with_evidence(technician):
    tank = _tank()
    check = make_check(tank, user=technician, temp_c=26.0)
    dev = Deviation.objects.get()
    assert (dev.tank, dev.rule, dev.parameter, dev.status) == (tank, Rule.OUT_OF_TARGET, "temp_c", "open")
    assert dev.severity == Deviation.Severity.MODERATE  # 2 / 4 = 50 %
    assert dev.evidence[0]["check"] == check.pk
    assert dev.evidence[0]["value"] == 26.0 and dev.evidence[0]["high"] == 24.0


def test_in_range_reading_opens_nothing(technician):
    make_check(_tank(), user=technician, temp_c=22.0)
    assert not Deviation.objects.exists()


def test_ongoing_excursion_keeps_one_deviation_and_gains_evidence(technician):
    tank = _tank()
    _series(tank, technician, "temp_c", [25.0, 25.5, 27.5])
    dev = Deviation.objects.get()
    assert dev.evidence_count == 3
    assert dev.severity == Deviation.Severity.MAJOR  # the worst evidence sets the severity


def test_reading_back_in_range_does_not_close_the_deviation(technician):
    tank = _tank()
    _series(tank, technician, "temp_c", [26.0, 22.0])
    dev = Deviation.objects.get()
    assert dev.status == Deviation.Status.OPEN
    assert dev.evidence_count == 1


def test_after_closing_the_rule_can_fire_again(technician):
    tank = _tank()
    make_check(tank, user=technician, temp_c=26.0)
    dev = Deviation.objects.get()
    dev.close(user=technician, corrective_action="Heater replaced", password="pw")
    make_check(tank, user=technician, temp_c=26.5)
    assert Deviation.objects.count() == 2
    assert Deviation.objects.unresolved().get().pk != dev.pk


def test_derived_value_outside_its_target_opens_a_deviation(technician):
    # DO 2.0 mg/L at 23 °C in fresh water is about 23 % of air saturation (Benson & Krause 1984:
    # 8.56 mg/L at 23 °C, from the USGS table — from memory), below a 30 % target.
    tank = _tank(do_pct_sat=(30.0, None))
    make_check(tank, user=technician, do_mg_l=2.0, temp_c=23.0)
    dev = Deviation.objects.get()
    assert (dev.rule, dev.parameter) == (Rule.OUT_OF_TARGET, "do_pct_sat")
    assert 22.0 < dev.evidence[0]["value"] < 25.0


def test_tank_override_is_the_target_the_rule_uses(technician):
    from tests.factories import make_tank_target
    tank = _tank()
    make_tank_target(tank, "temp_c", 18.0, 21.0)
    make_check(tank, user=technician, temp_c=22.5)  # inside the species band, outside the tank's
    assert Deviation.objects.get().parameter == "temp_c"


# --- closing ------------------------------------------------------------------------------------------

def test_closing_needs_a_corrective_action(technician):
    make_check(_tank(), user=technician, temp_c=26.0)
    dev = Deviation.objects.get()
    with pytest.raises(ValueError, match="Corrective action"):
        dev.close(user=technician, corrective_action="   ", password="pw")
    dev.refresh_from_db()
    assert dev.status == Deviation.Status.OPEN
    dev.acknowledge(user=technician)
    dev.close(user=technician, corrective_action="Heater replaced; 22.1 °C next morning", password="pw")
    dev.refresh_from_db()
    assert dev.status == Deviation.Status.CLOSED and dev.closed_by == technician and dev.closed_at
    assert dev.history.filter(history_change_reason="Closed with corrective action").exists()


def test_database_refuses_a_closed_deviation_without_action(technician):
    from django.db import IntegrityError, transaction
    make_check(_tank(), user=technician, temp_c=26.0)
    with pytest.raises(IntegrityError), transaction.atomic():
        Deviation.objects.update(status="closed", closed_at=timezone.now())


# --- mortality ----------------------------------------------------------------------------------------

def test_mortality_above_baseline_opens_a_deviation(technician):
    tank = _tank()
    _series(tank, technician, "temp_c", [22.0] * 14, dead_removed=1)
    make_check(tank, user=technician, temp_c=22.0, dead_removed=9)
    # baseline 1 per check; Poisson limit 1 + 3 sqrt(1) = 4; 9 is above it
    dev = Deviation.objects.get(rule=Rule.MORTALITY)
    assert dev.evidence[0]["dead"] == 9 and dev.evidence[0]["limit"] == 4.0


def test_mortality_within_baseline_opens_nothing(technician):
    tank = _tank()
    _series(tank, technician, "temp_c", [22.0] * 14, dead_removed=6)
    make_check(tank, user=technician, temp_c=22.0, dead_removed=7)  # baseline 6, limit 6 + 3 sqrt 6 = 13.3
    assert not Deviation.objects.filter(rule=Rule.MORTALITY).exists()


# --- drift --------------------------------------------------------------------------------------------

def test_drift_toward_the_upper_limit_warns_before_a_breach(technician):
    tank = _tank(temp_c=(20.0, 25.0))
    baseline = [22.0, 22.2, 21.9, 22.1, 22.0, 21.8, 22.1, 22.0, 22.2, 21.9, 22.0, 22.1]
    # still inside 20-25; the EWMA (λ = 0.3) reaches 24.08, inside the outer quarter (>= 23.75)
    rising = [22.6, 23.2, 23.7, 24.0, 24.3, 24.5, 24.7]
    _series(tank, technician, "temp_c", baseline + rising)
    dev = Deviation.objects.get(rule=Rule.DRIFT)
    assert dev.parameter == "temp_c" and "EWMA" in dev.summary and "NIST" in dev.summary
    assert not Deviation.objects.filter(rule=Rule.OUT_OF_TARGET).exists()


def test_steady_readings_do_not_drift(technician):
    tank = _tank(temp_c=(20.0, 26.0))
    values = [22.0, 22.2, 21.9, 22.1, 22.0, 21.8, 22.1, 22.0, 22.2, 21.9, 22.0, 22.1,
              22.0, 21.9, 22.2, 22.1, 21.8, 22.0, 22.1]
    _series(tank, technician, "temp_c", values)
    assert not Deviation.objects.exists()


def test_shift_in_the_middle_of_the_band_does_not_warn(technician):
    # An EWMA signal far from either limit is not a husbandry problem: the zone rule keeps it quiet.
    tank = _tank(temp_c=(10.0, 34.0))
    baseline = [22.0, 22.2, 21.9, 22.1, 22.0, 21.8, 22.1, 22.0, 22.2, 21.9, 22.0, 22.1]
    _series(tank, technician, "temp_c", baseline + [23.0, 23.2, 23.1, 23.3, 23.2, 23.1, 23.2])
    assert not Deviation.objects.filter(rule=Rule.DRIFT).exists()


# --- time rules and the scan --------------------------------------------------------------------------

def test_missed_check_opens_after_interval_and_grace(technician):
    tank = _tank()
    make_check(tank, user=technician, observed_at=timezone.now() - timedelta(hours=29), temp_c=22.0)
    findings, _ = deviations.scan(dry_run=True)
    assert Rule.MISSED_CHECK not in {f.rule for f in findings if f.tank_id == tank.pk}  # 24 h + 6 h grace
    Check.objects.update(observed_at=timezone.now() - timedelta(hours=31))
    findings, outcome = deviations.scan()
    dev = Deviation.objects.get(rule=Rule.MISSED_CHECK)
    assert dev.tank == tank and "overdue" in dev.summary


@pytest.mark.parametrize("model, rule, fields", [
    (Feeding, Rule.FEEDING_OVERDUE, {"food": "pellets", "amount": 0.1}),
    (WaterChange, Rule.WATER_CHANGE_OVERDUE, {"percent": 50}),
    (Census, Rule.CENSUS_OVERDUE, {"method": "direct", "direct_count": 100, "estimate": 100}),
])
def test_overdue_husbandry_opens_and_recent_does_not(technician, model, rule, fields):
    tank = _tank()
    long_ago = timezone.now() - timedelta(days=60)
    model.objects.create(tank=tank, recorded_by=technician, observed_at=long_ago, **fields)
    deviations.scan()
    assert Deviation.objects.filter(rule=rule, tank=tank).count() == 1
    Deviation.objects.all().delete()
    model.objects.update(observed_at=timezone.now() - timedelta(hours=1))
    deviations.scan()
    assert not Deviation.objects.filter(rule=rule, tank=tank).exists()


def test_scan_is_idempotent(technician):
    tank = _tank()
    make_check(tank, user=technician, observed_at=timezone.now() - timedelta(days=3), temp_c=22.0)
    deviations.scan()
    before = list(Deviation.objects.values_list("pk", "evidence_count", "last_seen_at"))
    history_before = Deviation.history.count()
    deviations.scan()
    assert list(Deviation.objects.values_list("pk", "evidence_count", "last_seen_at")) == before
    assert Deviation.history.count() == history_before
    assert len(before) >= 1


def test_scan_command_dry_run_writes_nothing_and_prints_a_summary(technician, capsys):
    tank = _tank()
    make_check(tank, user=technician, observed_at=timezone.now() - timedelta(days=3), temp_c=22.0)
    call_command("scan_deviations", "--dry-run")
    out = capsys.readouterr().out
    assert "Dry run" in out and "nothing written" in out
    assert not Deviation.objects.exists()
    call_command("scan_deviations")
    first = capsys.readouterr().out.strip()
    call_command("scan_deviations")
    second = capsys.readouterr().out.strip()
    assert "opened" in first and "0 opened, 0 updated" in second
    assert len(first.splitlines()) == 1


def test_voided_check_does_not_feed_the_rules(technician):
    tank = _tank()
    check = make_check(tank, user=technician, temp_c=22.0)
    check.void(user=technician, reason="wrong tank")
    assert deviations.evaluate_checks([check]).created == []


def test_correcting_an_old_check_does_not_reopen_a_closed_deviation(technician):
    from colonies import services

    tank = _tank()
    check = make_check(tank, user=technician, temp_c=26.0)
    dev = Deviation.objects.get()
    dev.close(user=technician, corrective_action="Heater replaced", password="pw")
    services.update_check(user=technician, check=check, row={"note": "typo fixed"}, reason="note was wrong")
    assert Deviation.objects.count() == 1
    assert Deviation.objects.get().status == Deviation.Status.CLOSED


def test_a_correction_keeps_the_flags_of_unchanged_readings(technician):
    from colonies import services
    from colonies.models import CareTarget

    tank = _tank()
    check = make_check(tank, user=technician, temp_c=26.0, ph=7.0)
    CareTarget.objects.filter(species=tank.species, parameter="temp_c").update(high=30.0)  # targets change later
    services.update_check(user=technician, check=check, row={"ph": 7.1}, reason="pH re-read")
    check.refresh_from_db()
    assert check.flags["temp_c"]["high"] == 24.0  # still the flag shown when 26.0 was logged


# ---------------------------------------------------------------------------------------------
# Corrective actions typed with a flagged value reach the deviation (issue 10)
# ---------------------------------------------------------------------------------------------
def test_the_action_typed_on_the_round_is_recorded_on_the_deviation_it_opens(client, technician):
    from django.urls import reverse

    from tests.factories import make_room, make_species, make_tank, round_data

    room = make_room(code="ca-1")
    tank = make_tank(code="CA-01", room=room, species=make_species(targets={"temp_c": (21.0, 25.0)}))
    client.force_login(technician)

    client.post(reverse("colonies:round-room", args=[room.code]),
                round_data({"CA-01": {"temp_c": "27.5", "corrective_action": "Heater thermostat reset to 23 °C"}}))

    dev = Deviation.objects.get(tank=tank, rule=Deviation.Rule.OUT_OF_TARGET)
    assert dev.status == Deviation.Status.OPEN  # recorded, not closed: closing is a person's decision
    assert dev.corrective_action.endswith(f"{technician.username}: Heater thermostat reset to 23 °C")
    assert dev.evidence[-1]["action"] == "Heater thermostat reset to 23 °C"
    page = client.get(dev.get_absolute_url())
    assert page.context["form"].initial["corrective_action"] == dev.corrective_action  # closing starts from it


def test_an_action_added_to_the_check_later_reaches_its_open_deviation_once(technician):
    from colonies import services
    from tests.factories import make_check, make_species, make_tank

    tank = make_tank(species=make_species(targets={"ph": (6.0, 8.0)}))
    check = make_check(tank, user=technician, ph=9.2)
    dev = Deviation.objects.get(tank=tank, parameter="ph")
    assert dev.corrective_action == ""

    for _ in range(2):
        services.update_check(user=technician, check=check, row={"corrective_action": "Partial water change, 30 %"},
                              reason="Action added after the round")
    dev.refresh_from_db()
    assert dev.corrective_action.count("Partial water change, 30 %") == 1
    assert dev.history.first().history_change_reason == "Corrective action added to the check"
