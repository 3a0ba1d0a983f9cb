"""A rescan of the record rules (deviations.rescan, what `scan_deviations --records` runs) finds exactly what
running them as each check was saved finds, on records with the awkward cases in them."""
import random
from datetime import timedelta

import pytest
from django.db import transaction
from django.test.utils import CaptureQueriesContext
from django.db import connection
from django.utils import timezone

from colonies import check_frames, deviations
from colonies.models import ArchivedEvidence, Census, CareTarget, Check, Deviation
from tests.factories import make_check, make_species, make_tank, make_tank_target, make_user

pytestmark = pytest.mark.django_db
Rule = Deviation.Rule


def _seed(user) -> dict[str, list[Check]]:
    """Four tanks over ~6 months of daily checks (invented values), with: a 40-day gap (longer than the
    35 days of history the rules read), empty readings, two checks at one moment, a derived value outside
    its method's range, a tank override, a tank without targets, excursions, drifts and deaths, one tank
    with a census (deaths as a share of its estimate), checks on a window boundary, voided checks."""
    rng = random.Random(9)
    worms = make_species(targets={"temp_c": (20.0, 24.0), "ph": (6.8, 7.8), "nh3_mg_l": (None, 0.02)})
    fresh = make_tank(code="RS-01", species=worms)
    marine = make_tank(code="RS-02", species=make_species(habitat="marine", targets={
        "do_pct_sat": (80.0, None), "salinity": (30.0, 36.0)}))
    cool = make_tank(code="RS-03", species=worms)
    make_tank_target(cool, "temp_c", 18.0, 22.0)  # 22-24 °C is inside the species band, outside this tank's
    bare = make_tank(code="RS-04", species=make_species())
    Census.objects.create(tank=fresh, recorded_by=user, observed_at=timezone.now() - timedelta(days=120),
                          method="direct", direct_count=300, estimate=300)
    start = timezone.now() - timedelta(days=200)
    checks: dict[str, list[Check]] = {t.code: [] for t in (fresh, marine, cool, bare)}
    for day in [d for d in range(190) if not 70 <= d < 110]:
        at = start + timedelta(days=day, hours=rng.randint(0, 3), microseconds=rng.randint(0, 999_999))
        drift = max(0, day - 150) * 0.08  # creeps toward the upper temperature limit at the end
        checks["RS-01"].append(Check(
            tank=fresh, recorded_by=user, observed_at=at, temp_c=round(21.5 + drift + rng.gauss(0, 0.3), 1),
            ph=None if day % 5 == 0 else round(7.3 + rng.gauss(0, 0.2), 2), tan_mg_l=round(abs(rng.gauss(0.3, 0.3)), 2),
            dead_removed=rng.choice([0, 0, 1, 2, 9, 30]) if day % 17 == 0 else rng.randint(0, 2)))
        sink = max(0, day - 160) * 1.5  # oxygen saturation sinks toward its lower limit at the end
        checks["RS-02"].append(Check(
            tank=marine, recorded_by=user, observed_at=at, temp_c=41.0 if day % 23 == 0 else round(18 + rng.gauss(0, 0.5), 1),
            salinity=round(33.0 + rng.gauss(0, 1.5), 1), do_mg_l=round(rng.gauss(7.6, 0.2) - sink * 0.07, 2),
            dead_removed=rng.randint(0, 6)))
        checks["RS-03"].append(Check(tank=cool, recorded_by=user, observed_at=at + timedelta(minutes=5),
                                     temp_c=round(20.5 + rng.gauss(0, 0.9), 1), ph=7.2, dead_removed=rng.randint(0, 3)))
        checks["RS-04"].append(Check(tank=bare, recorded_by=user, observed_at=at, temp_c=30.0,
                                     dead_removed=rng.choice([0, 1, 40])))
    twin = checks["RS-01"][30]  # a second check at the same moment, other values
    checks["RS-01"].append(Check(tank=fresh, recorded_by=user, observed_at=twin.observed_at, temp_c=25.5, ph=9.1,
                                 dead_removed=12))
    first = min(c.observed_at for cs in checks.values() for c in cs)
    for days in (deviations.WINDOW_DAYS, 2 * deviations.WINDOW_DAYS):  # on the rescan's window boundaries
        checks["RS-03"].append(Check(tank=cool, recorded_by=user, observed_at=first + timedelta(days=days),
                                     temp_c=23.5, ph=7.2, dead_removed=0))
    saved = {code: Check.objects.bulk_create(items) for code, items in checks.items()}
    voided = [saved["RS-01"][12], saved["RS-01"][45], saved["RS-02"][20], saved["RS-01"][-1]]
    Check.objects.filter(pk__in=[c.pk for c in voided]).update(voided_at=timezone.now(), voided_by=user,
                                                               void_reason="wrong tank")
    return saved


def _state() -> list[tuple]:
    archived = {}
    for a in ArchivedEvidence.objects.all():
        archived.setdefault(a.deviation_id, []).append(a.ref)
    return sorted((d.tank_id, d.rule, d.parameter, d.subject, d.severity, d.status, d.opened_at, d.last_seen_at,
                   d.summary, d.evidence_count, d.evidence, sorted(archived.get(d.pk, [])))
                  for d in Deviation.objects.all())


def _rolled_back(run) -> list[tuple]:
    with transaction.atomic():
        run()
        state = _state()
        transaction.set_rollback(True)
    assert not Deviation.objects.exists()
    return state


def test_a_rescan_opens_what_the_check_by_check_path_opens():
    checks = _seed(make_user("rescan-tech"))
    every = sorted(Check.objects.all(), key=lambda c: (c.observed_at, c.pk))
    assert (every[-1].observed_at - every[0].observed_at).days > 2 * deviations.WINDOW_DAYS  # several windows
    now = timezone.now()

    def one_by_one():
        for check in every:  # as if each was saved on its own, voided ones included (they judge nothing)
            deviations.evaluate_checks([check], now=now)

    expected = _rolled_back(one_by_one)
    as_a_batch = _rolled_back(lambda: deviations.evaluate_checks(every, now=now))
    report = deviations.rescan(now=now)

    assert _state() == expected == as_a_batch
    assert report.checks == Check.objects.current().count() == len(every) - 4
    found = {(d[0], d[1], d[2]) for d in expected}
    tank = {code: items[0].tank_id for code, items in checks.items()}
    assert {(tank["RS-01"], Rule.DRIFT, "temp_c"), (tank["RS-01"], Rule.MORTALITY, ""),
            (tank["RS-02"], Rule.OUT_OF_TARGET, "do_pct_sat"), (tank["RS-02"], Rule.DRIFT, "do_pct_sat"),
            (tank["RS-03"], Rule.OUT_OF_TARGET, "temp_c"), (tank["RS-04"], Rule.MORTALITY, "")} <= found
    assert not any(t == tank["RS-04"] and rule != Rule.MORTALITY for t, rule, _ in found)  # no targets there
    voided = set(Check.objects.voided().values_list("pk", flat=True))
    assert not any(e.get("check") in voided for d in expected for e in d[10])


def test_a_rescan_judges_old_checks_by_the_targets_in_force_now_while_their_flags_keep_those_shown_then(technician):
    tank = make_tank(species=make_species(targets={"temp_c": (20.0, 24.0)}))
    start = timezone.now() - timedelta(days=10)
    old = [make_check(tank, user=technician, observed_at=start + timedelta(days=i), temp_c=23.0) for i in range(3)]
    assert not Deviation.objects.exists() and all(c.flags == {} for c in old)
    CareTarget.objects.filter(species=tank.species, parameter="temp_c").update(high=22.5)  # a tighter profile

    now = timezone.now()
    expected = _rolled_back(lambda: [deviations.evaluate_checks([c], now=now) for c in old])
    deviations.rescan(now=now)

    assert _state() == expected
    deviation = Deviation.objects.get()
    assert (deviation.rule, deviation.evidence_count, deviation.evidence[0]["high"]) == (Rule.OUT_OF_TARGET, 3, 22.5)
    assert all(c.flags == {} for c in Check.objects.all())  # what the technician was shown is unchanged


def test_frames_hold_at_most_a_window_and_its_history_and_judge_each_check_once(technician):
    tank = make_tank(species=make_species(targets={"temp_c": (20.0, 24.0)}))
    start = timezone.now() - timedelta(days=300)
    Check.objects.bulk_create([Check(tank=tank, recorded_by=technician, observed_at=start + timedelta(hours=12 * i),
                                     temp_c=22.0) for i in range(600)])
    judged = []
    for frame in check_frames.frames(start=start, stop=timezone.now()):
        span = timedelta(microseconds=int(frame.at.max() - frame.at.min()))
        assert span < timedelta(days=deviations.WINDOW_DAYS + deviations.HISTORY_DAYS)
        judged += frame.pk[frame.judge].tolist()
    assert sorted(judged) == sorted(Check.objects.values_list("pk", flat=True))


@pytest.mark.parametrize("tanks", [2, 6])
def test_rescan_reads_in_a_number_of_queries_set_by_the_time_span_not_the_tanks(technician, tanks):
    species = make_species(targets={"temp_c": (20.0, 24.0)})
    start = timezone.now() - timedelta(days=150)
    for n in range(tanks):
        tank = make_tank(species=species)
        Check.objects.bulk_create([Check(tank=tank, recorded_by=technician, observed_at=start + timedelta(days=d),
                                         temp_c=22.0) for d in range(150)])
    with CaptureQueriesContext(connection) as queries:
        deviations.rescan(dry_run=True)
    # span, tanks + their targets and overrides, then per WINDOW_DAYS of the 150 days (3 windows) one read of
    # checks and one of dead-animal removals (the mortality rule's baseline)
    assert len(queries) == 1 + 3 + 3 * 2
