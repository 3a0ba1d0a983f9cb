"""Dead animals removed outside the round (colonies.models.DeadRemoval): mortality per 1,000 animal-days, the
mortality rule, the tank figure's deaths and the tank history count each dead animal once, from the record
that removed it (a check's own count or a removal), and a removal is not a check."""
from datetime import timedelta
from types import SimpleNamespace

import pytest
from django.core.cache import cache
from django.urls import reverse
from django.utils import timezone

from colonies import deviations, health_series, services
from colonies.models import Census, DeadRemoval, Deviation
from tests.factories import make_check, make_room, make_species, make_tank


@pytest.fixture(autouse=True)
def _empty_cache():
    cache.clear()
    yield
    cache.clear()


@pytest.fixture
def world(db):
    species = make_species(scientific_name="Testworm moribundus")
    tank = make_tank(code="A-01", room=make_room(code="wet-1"), species=species, volume_l=20.0,
                     started_on=timezone.localdate() - timedelta(days=200))
    return SimpleNamespace(species=species, tank=tank)


def remove(tank, user, count, at):
    """Dead animals removed outside the round, saved as the many-tanks screen saves them."""
    return services.record_batch(user=user, records=[DeadRemoval(tank=tank, count=count, observed_at=at)])[0]


def _steady_population(tank, user, n=1000):
    for days_ago in (60, 1):
        Census.objects.create(tank=tank, recorded_by=user, method=Census.Method.DIRECT, direct_count=n, estimate=n,
                              estimate_lower=n, estimate_upper=n, observed_at=timezone.now() - timedelta(days=days_ago))


# ---------------------------------------------------------------------------------------------
# Mortality per 1,000 animal-days
# ---------------------------------------------------------------------------------------------
def test_removals_and_check_counts_each_count_once_in_mortality(client, world, technician):
    # 1000 animals throughout the 30-day period: 30,000 animal-days. Deaths: 30 at a check + 15 removed outside
    # the round = 45 -> 45 / 30,000 x 1000 = 1.50 per 1,000 animal-days (hand-worked, as in test_population_views).
    _steady_population(world.tank, technician)
    now = timezone.now()
    make_check(world.tank, user=technician, dead_removed=30, observed_at=now - timedelta(days=20))
    remove(world.tank, technician, 15, now - timedelta(days=5))
    remove(world.tank, technician, 99, now - timedelta(days=45))  # before the period
    client.force_login(technician)
    m = client.get(world.tank.get_absolute_url()).context["summary"].mortality
    assert (m.deaths, round(m.animal_days)) == (45, 30_000)
    assert m.rate == pytest.approx(1.5)
    overview = client.get(reverse("colonies:health-overview"))
    row = next(r for r in overview.context["rows"] if r["tank"].code == "A-01")
    assert row["summary"].mortality.deaths == 45
    assert row["checks"] == 1  # a removal is not a check


def test_a_voided_removal_no_longer_counts(world, technician):
    now = timezone.now()
    removal = remove(world.tank, technician, 15, now - timedelta(days=5))
    make_check(world.tank, user=technician, dead_removed=2, observed_at=now - timedelta(days=4))
    counts = lambda: health_series.check_counts([world.tank.pk], now - timedelta(days=30), now)[world.tank.pk]  # noqa: E731
    assert counts()["dead"] == 17
    removal.void(user=technician, reason="Entered on the wrong tank")
    assert counts()["dead"] == 2


def test_a_tank_with_removals_only_has_its_deaths_and_no_checks(world, technician):
    now = timezone.now()
    remove(world.tank, technician, 4, now - timedelta(days=2))
    assert health_series.check_counts([world.tank.pk], now - timedelta(days=30), now)[world.tank.pk] == {
        "tank_id": world.tank.pk, "dead": 4, "checks": 0, "flagged": 0}


def test_the_figures_deaths_per_day_add_removals_to_the_days_check(world, technician):
    now = timezone.localtime()
    day = now.replace(hour=8, minute=0, second=0, microsecond=0) - timedelta(days=3)
    make_check(world.tank, user=technician, dead_removed=2, observed_at=day)
    remove(world.tank, technician, 5, day + timedelta(hours=6))
    start, end = health_series.window(30)
    deaths = [r for r in health_series.tank_plot_rows(world.tank, start, end) if r["series"] == "deaths"]
    assert [(r["at"].date(), r["value"]) for r in deaths] == [(day.date(), 7)]


def test_a_new_removal_changes_the_tanks_figure_version_and_the_facility_version(world, technician):
    before = (health_series.records_versions([world.tank.pk])[world.tank.pk], health_series.facility_version())
    remove(world.tank, technician, 3, timezone.now())
    after = (health_series.records_versions([world.tank.pk])[world.tank.pk], health_series.facility_version())
    assert before[0] != after[0] and before[1] != after[1]


# ---------------------------------------------------------------------------------------------
# The mortality rule
# ---------------------------------------------------------------------------------------------
def _daily_checks(tank, user, dead, days, end):
    """One check a day with `dead` removed, the last at `end`."""
    for i in range(days):
        make_check(tank, user=user, temp_c=22.0, dead_removed=dead, observed_at=end - timedelta(days=days - 1 - i))


def test_a_removal_above_the_baseline_opens_a_mortality_deviation_once(world, technician):
    # 14 checks with 1 dead each: baseline 1/check, limit 1 + 3 x sqrt(1) = 4 (the rule's Poisson limit).
    now = timezone.now()
    _daily_checks(world.tank, technician, 1, 14, now - timedelta(hours=3))
    removal = remove(world.tank, technician, 9, now - timedelta(hours=1))
    deviation = Deviation.objects.get(tank=world.tank, rule=Deviation.Rule.MORTALITY)
    assert deviation.evidence == [{
        "ref": f"removal:{removal.pk}", "removal": removal.pk, "at": deviations.local_text(removal.observed_at), "dead": 9,
        "baseline": 1.0, "limit": 4.0, "fraction_of_estimate": None}]
    assert deviations.evaluate_removals([removal]).created == [] and deviations.evaluate_removals([removal]).updated == []
    assert Deviation.objects.get(pk=deviation.pk).evidence_count == 1


def test_a_removal_within_the_baseline_opens_nothing(world, technician):
    now = timezone.now()
    _daily_checks(world.tank, technician, 6, 14, now - timedelta(hours=3))
    remove(world.tank, technician, 7, now - timedelta(hours=1))  # baseline 6, limit 6 + 3 sqrt 6 = 13.3
    assert not Deviation.objects.filter(rule=Deviation.Rule.MORTALITY).exists()


def test_removals_raise_the_baseline_of_later_checks_and_are_counted_once(world, technician):
    # Checks on days 1-14 with 1 dead each and a removal of 14 on day 7, then a check with 5 dead on day 15.
    # Baseline for that check: (14 x 1 + 14) / 14 checks = 2.0, limit 2 + 3 sqrt 2 = 6.24: 5 is within it.
    # (Without the removal the baseline would be 1.0, limit 4.0, and 5 would open a deviation.)
    start = timezone.now() - timedelta(days=16)
    for day in range(1, 15):
        make_check(world.tank, user=technician, temp_c=22.0, dead_removed=1, observed_at=start + timedelta(days=day))
    removal = remove(world.tank, technician, 14, start + timedelta(days=7, hours=4))
    check = make_check(world.tank, user=technician, temp_c=22.0, dead_removed=5, observed_at=start + timedelta(days=15))
    deviation = Deviation.objects.get(tank=world.tank, rule=Deviation.Rule.MORTALITY)
    refs = [e["ref"] for e in deviation.evidence]
    assert refs == [f"removal:{removal.pk}"]  # the removal itself was above its baseline; the check was not
    assert f"check:{check.pk}:dead" not in refs


def test_a_removal_sets_off_nothing_a_check_would_not_and_is_not_a_check_done(world, technician):
    now = timezone.now()
    remove(world.tank, technician, 3, now)  # below MORTALITY_MIN_DEAD
    assert not Deviation.objects.exists()
    _, outcome = deviations.scan(now + timedelta(hours=30))
    missed = Deviation.objects.filter(rule=Deviation.Rule.MISSED_CHECK, tank=world.tank)
    assert missed.count() == 1  # the removal did not stand in for the daily check


def test_the_rescan_of_checks_reads_removals_in_the_baseline_as_when_saved(world, technician):
    start = timezone.now() - timedelta(days=16)
    for day in range(1, 15):
        make_check(world.tank, user=technician, temp_c=22.0, dead_removed=1, observed_at=start + timedelta(days=day))
    remove(world.tank, technician, 14, start + timedelta(days=7, hours=4))
    check = make_check(world.tank, user=technician, temp_c=22.0, dead_removed=5, observed_at=start + timedelta(days=15))
    from colonies import check_frames, record_rules

    frame = next(check_frames.frames(start=check.observed_at, stop=check.observed_at, tank_ids={world.tank.pk},
                                     only={check.pk}))
    assert [f.evidence["ref"] for f in record_rules.mortality_rule(frame)] == []
    micros = [(t - check_frames.EPOCH) // check_frames.MICROSECOND for t in (start, start + timedelta(days=15))]
    assert frame.removed_between(world.tank.pk, *micros) == 14
    assert deviations.rescan().findings == 0  # the rescan judges the check the same way


def test_the_tank_history_lists_removals(client, world, manager, technician):
    remove(world.tank, technician, 3, timezone.now())
    client.force_login(manager)
    response = client.get(reverse("colonies:tank-history", args=[world.tank.code]))
    assert any(e["what"].startswith("Dead removed #") for e in response.context["entries"])
