"""A small facility for the period report tests: one tank over the week Monday 2 to Sunday 8 November 2026
(TIME_ZONE is UTC in the tests), with the values the tests compute by hand."""
from datetime import date, datetime, timezone as dt_timezone

from colonies.models import Census, Check, DeadRemoval, Deviation, WaterChange
from experiments import services
from experiments.models import Protocol, Trial
from tests.experiments.builders import make_protocol, make_study, record
from tests.factories import make_species, make_tank

FIRST, LAST = date(2026, 11, 2), date(2026, 11, 8)
QUERY = {"period_from": "2026-11-02", "period_to": "2026-11-08", "scope": "facility"}
SECRET_LABELS = ("Zircon glow", "Quasar pulse")  # a blind study's conditions: must appear nowhere


def at(day: int, hour: int = 0, minute: int = 0, month: int = 11) -> datetime:
    return datetime(2026, month, day, hour, minute, tzinfo=dt_timezone.utc)


def build_facility(*, technician, manager, researcher, code="LV-R1", extra_tanks: int = 0):
    species = make_species(targets={"ph": (6.5, 8.0), "temp_c": (18.0, 24.0)})
    tank = make_tank(code=code, species=species, started_on=date(2026, 10, 1))
    Census.objects.create(tank=tank, recorded_by=technician, method=Census.Method.DIRECT, direct_count=1000,
                          estimate=1000, estimate_lower=1000, estimate_upper=1000, observed_at=at(25, 12, month=10))
    # pH: in, out (flagged when saved), in; temperature in throughout. Deaths 3 at a check, 4 removed later.
    Check.objects.create(tank=tank, recorded_by=technician, observed_at=at(2, 9), ph=7.0, temp_c=20.0)
    Check.objects.create(tank=tank, recorded_by=technician, observed_at=at(4, 9), ph=8.5, temp_c=20.0, dead_removed=3,
                         flags={"ph": {"side": "high", "low": 6.5, "high": 8.0}})
    Check.objects.create(tank=tank, recorded_by=technician, observed_at=at(5, 9), ph=7.5, temp_c=20.0)
    DeadRemoval.objects.create(tank=tank, recorded_by=technician, observed_at=at(6, 8), count=4)
    WaterChange.objects.create(tank=tank, recorded_by=technician, observed_at=at(6, 12), percent=30)
    dev = {"tank": tank, "rule": Deviation.Rule.OUT_OF_TARGET, "summary": "test"}
    Deviation.objects.create(**dev, parameter="ph", opened_at=at(4, 10), closed_at=at(5, 10), status="closed",
                             corrective_action="Partial water change", closed_by=manager)
    Deviation.objects.create(**dev, parameter="temp_c", opened_at=at(3, 8), closed_at=at(3, 14), status="closed",
                             corrective_action="Heater reset", closed_by=manager)
    Deviation.objects.create(**dev, parameter="do_mg_l", opened_at=at(7, 8))
    Deviation.objects.create(tank=tank, rule=Deviation.Rule.MISSED_CHECK, summary="test", severity=3,
                             opened_at=at(30, 0, month=10), closed_at=at(3, 12), status="closed",
                             corrective_action="Rota fixed", closed_by=manager)
    Deviation.objects.create(tank=tank, rule=Deviation.Rule.FEEDING_OVERDUE, summary="before the period",
                             opened_at=at(20, 0, month=10), closed_at=at(21, 0, month=10), status="closed",
                             corrective_action="Fed", closed_by=manager)
    # A correction and a void in the period (reasons kept in the history), one correction before it.
    check = Check.objects.get(tank=tank, observed_at=at(5, 9))
    check.temp_c, check._history_user, check._change_reason = 20.5, technician, "Thermometer misread"
    check.save()
    from colonies.models import Check as C
    C.history.filter(id=check.pk, history_type="~").update(history_date=at(5, 10))
    removal = DeadRemoval.objects.get(tank=tank)
    removal.void(user=manager, reason="Entered on the wrong tank")
    DeadRemoval.history.filter(id=removal.pk, history_type="~").update(history_date=at(7, 9))
    for n in range(extra_tanks):
        other = make_tank(code=f"{code}-X{n}", species=species, started_on=date(2026, 10, 1))
        Check.objects.create(tank=other, recorded_by=technician, observed_at=at(3, 9), ph=7.1, temp_c=21.0)
    return tank


def build_trials(*, tank, researcher, manager, blind=False, max_total=100):
    protocol = make_protocol(starts_on=date(2026, 10, 1), approved_on=date(2026, 9, 20), max_animals_total=max_total)
    early = _cohort(researcher, protocol, tank, 5, at(20, 10, month=10))
    cohort = _cohort(researcher, protocol, tank, 10, at(3, 10))
    dish = services.set_up_dish(user=researcher, cohort=cohort, animals=8, at=at(3, 13))
    conditions = SECRET_LABELS if blind else ("sham", "UV low")
    study = make_study(user=researcher, protocol=protocol, conditions=conditions, replicates=2, blinded=blind)
    first = record(study, dish, researcher, at=at(4, 10), now=at(4, 10), animals=8).trial
    record(study, dish, researcher, at=at(5, 12), now=at(5, 12), animals=8)
    # The operator corrects a score, naming the condition in the reason (an operator knows it).
    services.score_trial(user=researcher, trial=first, values={"disperse_s": 130, "aggregate_s": 300},
                         reason=f"re-timed the {first.condition} dish from the video", now=at(6, 9))
    Trial.history.filter(id=first.pk, history_change_reason__startswith="Outcome corrected").update(history_date=at(6, 9))
    return protocol, study, early, cohort, dish


def _cohort(user, protocol: Protocol, tank, animals, when):
    booking = services.book(user=user, protocol=protocol, tank=tank, animals=animals,
                            needed_on=when.date(), today=when.date())
    return services.draw(user=user, booking=booking, at=when)
