"""colonies/health_series.py: the points the overview reads (a window) against the whole history, and
the growth fits shared between processes."""
from datetime import timedelta

import pytest
from django.core.cache import cache
from django.utils import timezone

from colonies import growth, health_series, services
from colonies.models import Census, Tank
from tests.factories import make_room, make_species, make_tank


@pytest.fixture(autouse=True)
def _empty_cache():
    cache.clear()
    yield
    cache.clear()


def census(tank, user, count, at):
    c = Census(tank=tank, observed_at=at, method=Census.Method.DIRECT, direct_count=count)
    return services.record_census(user=user, census=c)


@pytest.fixture
def lines(db, technician):
    """Tanks with long histories: censuses every 20 days for 300 days, splits out of and into them
    (to an existing tank, to a new one), two censuses at the same moment, one at the very moment of
    a split into it, and a tank whose only census is older than any window."""
    now = timezone.now().replace(microsecond=0)
    species = make_species(scientific_name="Windowworm", max_density_per_l=500)
    room = make_room(code="W")
    started = timezone.localdate() - timedelta(days=400)
    a, b, c, old = (make_tank(code=code, room=room, species=species, volume_l=2.0, started_on=started)
                    for code in ("W-A", "W-B", "W-C", "W-OLD"))
    for tank, base in ((a, 100), (b, 300), (c, 50)):
        for i in range(16):
            census(tank, technician, base + 7 * i + (i % 3) * 11, now - timedelta(days=300 - 20 * i, hours=2))
    census(old, technician, 80, now - timedelta(days=380))
    census(c, technician, 61, now - timedelta(days=140, hours=2))  # the same moment as another of c's
    tie = now - timedelta(days=120, hours=1)  # b's last census before a 120-day window
    census(b, technician, 333, tie)
    services.record_split(user=technician, source=a, source_before=260, stayed=130, parts=[(b, 120)], split_at=tie)
    services.record_split(user=technician, source=b, source_before=400, stayed=250,
                          parts=[(c, 100), (services.NewTank(code="W-NEW", volume_l=1.0), 50)],
                          split_at=now - timedelta(days=40))
    services.record_split(user=technician, source=a, source_before=240, stayed=200, parts=[(c, 40)],
                          split_at=now - timedelta(days=10))
    return now


@pytest.mark.parametrize("days", [30, 120, 365])
def test_the_overview_window_gives_what_the_whole_history_gives(lines, days):
    # Every number the overview shows per tank (latest estimate, growth fit, animal-days, the trend
    # points) must be the same from the window as from every point. # common practice (exactness)
    now = lines
    ids = list(Tank.objects.values_list("pk", flat=True))
    since = now - timedelta(days=max(days, growth.FIT_WINDOW_DAYS))
    full, window = health_series.load_points(ids), health_series.load_points(ids, since=since)
    for pk in ids:
        kept = [p for p in full[pk] if p.at >= since]
        before = [p for p in full[pk] if p.at < since]
        assert [p for p in window[pk] if p.at >= since] == kept
        if before:  # the estimate before the window is there, and the same
            assert [p for p in window[pk] if p.at < since][-1] == before[-1]
        tank = Tank.objects.select_related("species").get(pk=pk)
        one, other = (growth.summarize(tank, pts, 3, now, None, days) for pts in (full[pk], window[pk]))
        assert one.latest == other.latest
        assert one.growth == other.growth
        assert (one.mortality.animal_days, one.mortality.rate) == (other.mortality.animal_days, other.mortality.rate)


def test_the_window_costs_one_query_more_and_reads_only_its_censuses(lines, django_assert_num_queries):
    ids = list(Tank.objects.values_list("pk", flat=True))
    with django_assert_num_queries(3):
        health_series.load_points(ids)
    with django_assert_num_queries(4):
        window = health_series.load_points(ids, since=lines - timedelta(days=200))
    a = Tank.objects.get(code="W-A")
    assert len([p for p in window[a.pk] if p.kind == "census"]) == 11  # 10 in the window, 1 before it
    # A split into b at the moment of b's last census before the window: b's whole history is read.
    with django_assert_num_queries(4 + 3):
        health_series.load_points(ids, since=lines - timedelta(days=120))


def test_fits_are_shared_through_one_cache_entry_and_never_stale(lines):
    ids = list(Tank.objects.values_list("pk", flat=True))
    points = health_series.load_points(ids)
    usables = {pk: growth.usable_points(points[pk], lines) for pk in ids}
    growth.forget()  # as in a new worker process
    first = health_series.fits(usables)
    stored = cache.get(health_series.FITS_KEY)
    assert len(stored) == len({u for u in usables.values()})
    # Another process (empty memory) takes them from the entry: equal fits, no fitting.
    growth.forget()
    assert health_series.fits(usables) == first
    # A corrected estimate is another input: its fit is made, the old one is not used.
    pk = next(pk for pk in ids if first[pk].fit is not None)
    changed = usables[pk][:-1] + (growth.Point(usables[pk][-1].at, 999.0, None, None, "census"),)
    assert health_series.fits({pk: changed})[pk].fit.rate_per_day != first[pk].fit.rate_per_day
    assert len(cache.get(health_series.FITS_KEY)) == len(stored) + 1


@pytest.mark.django_db
def test_every_history_table_the_version_key_reads_has_its_newest_per_tank_index():
    # The figure's version query (records_versions) orders each tank's history rows by history_id; without
    # (tank column, history_id) PostgreSQL walked the whole primary key (migration 0018's docstring).
    from importlib import import_module

    from django.db import connection

    indexes = import_module("colonies.migrations.0018_history_newest_per_tank").INDEXES
    with connection.cursor() as cursor:
        for name, table, column in indexes:
            found = connection.introspection.get_constraints(cursor, table)
            assert found[name]["columns"] == [column, "history_id"] and found[name]["index"], name
