"""Population on the tank page, stocking density, splits and lineage, mortality, the health plots
and the colony-health overview (colonies/health_views.py and the modules it uses)."""
import csv
import io
import math
import re
from datetime import timedelta
from types import SimpleNamespace

import pytest
from django.core.cache import cache
from django.db import connection
from django.test.utils import CaptureQueriesContext
from django.urls import reverse
from django.utils import timezone

from colonies import charts, deviations, growth, health_plots, health_views, services
from colonies.models import Census, Deviation, Feeding, Split, SplitPart, Tank
from tests.factories import make_check, make_room, make_species, make_tank, page_text

PNG_MAGIC = b"\x89PNG\r\n\x1a\n"


@pytest.fixture(autouse=True)
def _empty_cache():
    cache.clear()
    yield
    cache.clear()


def _body(response) -> str:
    """A streamed CSV's text."""
    return b"".join(response.streaming_content).decode()


def visible(response) -> str:
    """The page as a reader sees it: tags removed, whitespace collapsed."""
    return " ".join(re.sub(r"<[^>]+>", " ", page_text(response)).split())


def census(tank, user, count, days_ago, **fields):
    """A direct-count census saved the way the tank page saves one (estimate, history, density rule)."""
    c = Census(tank=tank, observed_at=timezone.now() - timedelta(days=days_ago), method=Census.Method.DIRECT,
               direct_count=count, **fields)
    return services.record_census(user=user, census=c)


@pytest.fixture
def world(db, technician):
    # Maximum 100 animals/L in a 2 L tank: the tank holds at most 200 animals.
    species = make_species(scientific_name="Testworm vulgaris", max_density_per_l=100, targets={"temp_c": (21, 25)})
    room = make_room(code="wet-1", name="Wet lab 1")
    tank = make_tank(code="A-01", room=room, species=species, volume_l=2.0,
                     started_on=timezone.localdate() - timedelta(days=200))
    return SimpleNamespace(species=species, room=room, tank=tank)


def _doubling_series(world, user):
    # Censuses 14 days apart, doubling every 28 days: 50, 71, 100, 141 (50 x 2 ** (t / 28) rounded),
    # the last one yesterday.
    for days_ago, n in ((43, 50), (29, 71), (15, 100), (1, 141)):
        census(world.tank, user, n, days_ago)


# ---------------------------------------------------------------------------------------------
# Census form: all three methods store the estimate and its interval
# ---------------------------------------------------------------------------------------------
@pytest.mark.parametrize("data,value,has_interval", [
    ({"census-method": "direct", "census-direct_count": "180"}, 180, False),
    # 5 aliquots of 20 mL from 1000 mL: 60 counted in 10 % of the volume -> 600 animals.
    ({"census-method": "aliquot", "census-aliquot_counts_text": "12, 11, 13, 12, 12", "census-aliquot_ml": "20",
      "census-total_ml": "1000"}, 600, True),
    # 40 animals in 0.5 g of 5 g -> 400 animals.
    ({"census-method": "mass", "census-total_mass_g": "5", "census-sample_mass_g": "0.5",
      "census-sample_count": "40"}, 400, True),
], ids=["direct", "aliquot", "mass"])
def test_census_form_stores_estimate_and_interval_for_each_method(client, world, technician, data, value,
                                                                  has_interval):
    client.force_login(technician)
    response = client.post(reverse("colonies:tank-add", args=[world.tank.code, "census"]), data)
    assert response.status_code == 302, page_text(response)[:3000]
    c = Census.objects.get(tank=world.tank)
    assert c.estimate == pytest.approx(value)
    assert (c.estimate_lower < c.estimate < c.estimate_upper) is has_interval
    assert c.estimate_method


def test_census_with_impossible_aliquots_is_rejected_and_nothing_saved(client, world, technician):
    client.force_login(technician)
    response = client.post(reverse("colonies:tank-add", args=[world.tank.code, "census"]), {
        "census-method": "aliquot", "census-aliquot_counts_text": "5, 6", "census-aliquot_ml": "600",
        "census-total_ml": "1000"})
    assert response.status_code == 400
    assert "more than total_ml = 1000.0 mL" in page_text(response)
    assert not Census.objects.exists()


# ---------------------------------------------------------------------------------------------
# Tank page: estimate, density, growth, forecast
# ---------------------------------------------------------------------------------------------
def test_tank_page_shows_estimate_interval_density_growth_and_forecast(client, world, technician, researcher):
    _doubling_series(world, technician)
    census_with_interval = Census(tank=world.tank, observed_at=timezone.now() - timedelta(hours=1),
                                  method=Census.Method.ALIQUOT, aliquot_counts=[15, 14], aliquot_ml=10,
                                  total_ml=100)
    services.record_census(user=technician, census=census_with_interval)  # 29 in 20 % -> 145
    client.force_login(researcher)
    response = client.get(reverse("colonies:tank-detail", args=[world.tank.code]))
    text = visible(response)
    s = response.context["summary"]
    assert s.latest.value == pytest.approx(145)
    assert f"(95 % interval {census_with_interval.estimate_lower:.0f}–{census_with_interval.estimate_upper:.0f})" in text
    assert "73 animals/L" in text and "73 % of the maximum 100/L" in text  # 145 / 2 L = 72.5 /L
    assert s.growth.fit.model == "exponential"
    # Doubling every 28 days: ln 2 / 28 = 0.0248 per day (the counts were made from it).
    assert s.growth.fit.rate_per_day == pytest.approx(math.log(2) / 28, rel=0.03)
    assert re.search(r"Doubling time 2[78]\.\d days", text)
    assert "Model: exponential (default)" in text
    # 145 -> 200 at 0.0248 per day takes ln(200/145) / 0.0248 = 13 days.
    assert s.forecast_date is not None
    days_to_max = (s.forecast_date - timezone.now()).total_seconds() / 86400
    assert 11 < days_to_max < 15
    assert f"about {timezone.localtime(s.forecast_date):%d %b %Y}" in text


def test_logistic_model_is_used_when_counts_level_off_and_there_are_six_points(client, world, technician):
    # K = 180, N0 = 20, r = 0.12 per day, sampled every 10 days: clearly levelling off.
    for days_ago in range(100, -1, -10):
        t = 100 - days_ago
        n = round(180 / (1 + (180 / 20 - 1) * math.exp(-0.12 * t)))
        census(world.tank, technician, n, days_ago)
    client.force_login(technician)
    response = client.get(reverse("colonies:tank-detail", args=[world.tank.code]))
    s = response.context["summary"]
    assert s.growth.fit.model == "logistic"
    assert s.growth.fit.carrying_capacity == pytest.approx(180, rel=0.03)
    # The curve levels off below the 200-animal maximum, so no date is forecast.
    assert s.forecast_date is None
    assert "not expected: the fitted curve levels off at about 18" in visible(response)
    assert "logistic: levels off, fits better than exponential (AICc)" in visible(response)


def test_tank_page_without_censuses_says_so(client, world, technician):
    client.force_login(technician)
    text = visible(client.get(reverse("colonies:tank-detail", args=[world.tank.code])))
    assert "no census yet" in text
    assert "needs at least 3 estimates" in text


# ---------------------------------------------------------------------------------------------
# Stocking density deviation
# ---------------------------------------------------------------------------------------------
def test_census_above_maximum_density_opens_a_stocking_density_deviation(world, technician):
    c = census(world.tank, technician, 250, 0)  # 125 animals/L against 100: 25 % over -> moderate
    dev = Deviation.objects.get(tank=world.tank, rule=Deviation.Rule.STOCKING_DENSITY)
    assert dev.status == Deviation.Status.OPEN
    assert dev.severity == Deviation.Severity.MODERATE
    assert "125 animals/L" in dev.summary and "maximum 100 animals/L" in dev.summary
    assert dev.evidence[0]["ref"] == f"census:{c.pk}"
    # The scan finds the same census: no second deviation and no duplicate evidence.
    deviations.scan()
    dev.refresh_from_db()
    assert Deviation.objects.filter(rule=Deviation.Rule.STOCKING_DENSITY).count() == 1
    assert dev.evidence_count == 1


def test_census_within_maximum_opens_nothing(world, technician):
    census(world.tank, technician, 200, 0)  # exactly 100 /L: at the maximum, not above it
    assert not Deviation.objects.filter(rule=Deviation.Rule.STOCKING_DENSITY).exists()


def test_scan_catches_a_tank_whose_latest_estimate_is_above_maximum(world, technician):
    # Saved without the census hook (e.g. imported): only the scan rule sees it.
    Census.objects.create(tank=world.tank, recorded_by=technician, method=Census.Method.DIRECT, direct_count=340,
                          estimate=340, estimate_lower=340, estimate_upper=340)
    findings, _ = deviations.scan()
    dev = Deviation.objects.get(tank=world.tank, rule=Deviation.Rule.STOCKING_DENSITY)
    assert dev.severity == Deviation.Severity.MAJOR  # 170 % of the maximum


def test_scan_uses_what_stayed_after_a_split_not_the_older_census(world, technician):
    Census.objects.create(tank=world.tank, recorded_by=technician, method=Census.Method.DIRECT, direct_count=340,
                          estimate=340, estimate_lower=340, estimate_upper=340,
                          observed_at=timezone.now() - timedelta(days=2))
    Split.objects.create(source=world.tank, recorded_by=technician, source_before=340, stayed=150)
    deviations.scan()
    assert not Deviation.objects.filter(rule=Deviation.Rule.STOCKING_DENSITY).exists()


# ---------------------------------------------------------------------------------------------
# Splits
# ---------------------------------------------------------------------------------------------
def _split_data(**overrides):
    data = {"split-source_before": "400", "split-stayed": "180", "split-note": "",
            "part-TOTAL_FORMS": "3", "part-INITIAL_FORMS": "0", "part-MIN_NUM_FORMS": "0", "part-MAX_NUM_FORMS": "6"}
    data.update(overrides)
    return data


def test_split_to_a_new_and_an_existing_tank_is_saved_with_lineage_and_balance(client, world, technician):
    other = make_tank(code="A-02", room=world.room, species=world.species, volume_l=2.0)
    client.force_login(technician)
    response = client.post(reverse("colonies:tank-split", args=[world.tank.code]), _split_data(**{
        "part-0-new_code": "a-03", "part-0-new_position": "rack 1, shelf C", "part-0-new_volume_l": "1.5",
        "part-0-animals": "120",
        "part-1-destination": "A-02", "part-1-animals": "110"}))
    assert response.status_code == 302, page_text(response)[:3000]
    split = Split.objects.get()
    assert (split.source, split.source_before, split.stayed, split.recorded_by) == (world.tank, 400, 180, technician)
    new = Tank.objects.get(code="A-03")
    assert (new.room, new.species, new.volume_l, new.position) == (world.room, world.species, 1.5, "rack 1, shelf C")
    assert {p.destination.code: (p.animals, p.created_tank) for p in split.parts.all()} == {
        "A-03": (120, True), "A-02": (110, False)}
    assert set(new.founded_from.all()) == {world.tank} and set(other.founded_from.all()) == {world.tank}
    assert split.history.count() == 1 and SplitPart.history.count() == 2
    # Books: 180 + 120 + 110 = 410 against 400 before: +10 animals, +2.5 %.
    text = visible(client.get(reverse("colonies:tank-detail", args=[world.tank.code])))
    assert "10 (2.5 %)" in text
    assert "A-03 (new) 120" in text


def test_split_with_an_impossible_number_saves_nothing_and_names_field_value_and_range(client, world, technician):
    client.force_login(technician)
    response = client.post(reverse("colonies:tank-split", args=[world.tank.code]), _split_data(**{
        "part-0-new_code": "A-09", "part-0-new_volume_l": "0", "part-0-animals": "-5"}))
    assert response.status_code == 400
    text = page_text(response)
    assert "Animals moved: -5 is impossible; allowed range 0 to 10,000,000 animals." in text
    assert "New tank volume (L): 0 is impossible; allowed range 0.01 to 10000 L." in text
    assert not Split.objects.exists() and not Tank.objects.filter(code="A-09").exists()


def test_split_is_all_or_nothing_when_a_later_destination_fails(client, world, technician):
    make_tank(code="B-01", room=world.room, species=make_species(), volume_l=2.0)  # another species
    client.force_login(technician)
    response = client.post(reverse("colonies:tank-split", args=[world.tank.code]), _split_data(**{
        "part-0-new_code": "A-05", "part-0-new_volume_l": "2", "part-0-animals": "100",
        "part-1-new_code": "A-05", "part-1-new_volume_l": "2", "part-1-animals": "100"}))
    assert response.status_code == 400
    assert "New tank code: A-05 is already in use" in page_text(response)
    assert not Split.objects.exists() and not SplitPart.objects.exists()
    assert not Tank.objects.filter(code="A-05").exists()


def test_split_needs_a_destination(client, world, technician):
    client.force_login(technician)
    response = client.post(reverse("colonies:tank-split", args=[world.tank.code]), _split_data())
    assert response.status_code == 400
    assert "enter at least one destination tank" in page_text(response)


def test_voiding_a_split_keeps_it_in_history_and_removes_the_lineage_it_added(client, world, technician):
    other = make_tank(code="A-02", room=world.room, species=world.species)
    split = services.record_split(user=technician, source=world.tank, source_before=300, stayed=200,
                                  parts=[(other, 100)])
    client.force_login(technician)
    response = client.post(reverse("colonies:split-void", args=[split.pk]), {"reason": "Entered on the wrong tank"})
    assert response.status_code == 302
    split.refresh_from_db()
    assert split.is_voided and split.void_reason == "Entered on the wrong tank"
    assert Split.objects.count() == 1 and split.history.count() == 2
    assert not other.founded_from.exists()


def test_split_after_census_restarts_the_growth_fit_and_shows_what_stayed(client, world, technician):
    _doubling_series(world, technician)
    services.record_split(user=technician, source=world.tank, source_before=141, stayed=60,
                          parts=[(services.NewTank(code="A-04", volume_l=2.0), 80)])
    client.force_login(technician)
    s = client.get(reverse("colonies:tank-detail", args=[world.tank.code])).context["summary"]
    assert s.latest.value == 60 and s.latest.kind == "split"
    assert s.growth.fit is None  # one estimate since the split
    new = client.get(reverse("colonies:tank-detail", args=["A-04"])).context["summary"]
    assert new.latest.value == 80


# ---------------------------------------------------------------------------------------------
# Lineage
# ---------------------------------------------------------------------------------------------
def _line(world, n_children):
    tanks = [world.tank]
    for i in range(n_children):
        child = make_tank(code=f"L-{i:02d}", room=world.room, species=world.species)
        child.founded_from.add(tanks[-1] if i % 2 == 0 else world.tank)
        tanks.append(child)
    return tanks


def test_lineage_page_shows_the_tree_of_the_culture_line(client, world, technician):
    parent = make_tank(code="R-00", room=world.room, species=world.species,
                       started_on=timezone.localdate() - timedelta(days=400))
    world.tank.founded_from.add(parent)
    b = make_tank(code="B-01", room=world.room, species=world.species)
    c = make_tank(code="C-01", room=world.room, species=world.species)
    services.record_split(user=technician, source=world.tank, source_before=300, stayed=100, parts=[(b, 200)])
    c.founded_from.add(b)
    make_tank(code="Z-99", room=world.room, species=world.species)  # another line: not shown
    client.force_login(technician)
    response = client.get(reverse("colonies:tank-lineage", args=["C-01"]))
    rows = [(r["tank"].code, r["depth"]) for r in response.context["rows"]]
    assert rows == [("R-00", 0), ("A-01", 1), ("B-01", 2), ("C-01", 3)]
    text = visible(response)
    assert "from A-01: split" in text and "200 animals" in text
    assert "Z-99" not in text


def test_lineage_query_count_does_not_grow_with_the_line(client, world, technician, django_assert_max_num_queries):
    client.force_login(technician)
    _line(world, 2)
    with CaptureQueriesContext(connection) as small:
        client.get(reverse("colonies:tank-lineage", args=[world.tank.code]))
    _line_more = [make_tank(code=f"M-{i:02d}", room=world.room, species=world.species) for i in range(8)]
    for i, t in enumerate(_line_more):
        t.founded_from.add(world.tank if i == 0 else _line_more[i - 1])
    with django_assert_max_num_queries(len(small)):
        response = client.get(reverse("colonies:tank-lineage", args=[world.tank.code]))
    assert len(response.context["rows"]) == 11


# ---------------------------------------------------------------------------------------------
# Mortality
# ---------------------------------------------------------------------------------------------
def test_mortality_rate_hand_worked_linear_population():
    # Population 1000 at day 0 rising linearly to 1200 at day 30: animal-days = (1000 + 1200) / 2 x 30
    # = 33,000; 66 deaths -> 66 / 33,000 x 1000 = 2.0 per 1000 animal-days. (hand-worked)
    start = timezone.now() - timedelta(days=30)
    end = start + timedelta(days=30)
    points = [growth.Point(start, 1000, None, None, "census"), growth.Point(end, 1200, None, None, "census")]
    m = growth.mortality(points, 66, start, end)
    assert m.animal_days == pytest.approx(33_000)
    assert m.rate == pytest.approx(2.0)


def test_tank_page_and_overview_show_mortality_per_tank_and_room(client, world, technician, researcher):
    # Tank A-01 holds 1000 animals throughout: 30 days x 1000 = 30,000 animal-days; 45 dead -> 1.50.
    # Tank A-02 holds 500: 15,000 animal-days, no deaths. Room: 45 / 45,000 x 1000 = 1.00. (hand-worked)
    other = make_tank(code="A-02", room=world.room, species=world.species, volume_l=20.0,
                      started_on=world.tank.started_on)
    for tank, n in ((world.tank, 1000), (other, 500)):
        for days_ago in (60, 1):
            Census.objects.create(tank=tank, recorded_by=technician, method=Census.Method.DIRECT, direct_count=n,
                                  estimate=n, estimate_lower=n, estimate_upper=n,
                                  observed_at=timezone.now() - timedelta(days=days_ago))
    now = timezone.now()
    make_check(world.tank, user=technician, dead_removed=30, observed_at=now - timedelta(days=20))
    make_check(world.tank, user=technician, dead_removed=15, observed_at=now - timedelta(days=5))
    make_check(world.tank, user=technician, dead_removed=99, observed_at=now - timedelta(days=45))  # before period
    client.force_login(researcher)
    tank_page = client.get(reverse("colonies:tank-detail", args=[world.tank.code]))
    m = tank_page.context["summary"].mortality
    assert (m.deaths, round(m.animal_days)) == (45, 30_000)
    assert "1.50 deaths per 1,000 animal-days" in visible(tank_page)
    overview = client.get(reverse("colonies:health-overview"))
    room = overview.context["rooms"][0]
    assert (room["deaths"], round(room["animal_days"]), round(room["rate"], 2)) == (45, 45_000, 1.0)
    by_code = {r["tank"].code: r for r in overview.context["rows"]}
    assert by_code["A-01"]["summary"].mortality.rate == pytest.approx(1.5, rel=1e-3)
    assert by_code["A-02"]["summary"].mortality.rate == 0
    # A-01 is above its maximum (1000 in 2 L = 500 /L against 100): listed first, needing attention.
    assert overview.context["rows"][0]["tank"].code == "A-01"
    assert overview.context["rows"][0]["status"] == "attention"


def test_overview_period_changes_the_mortality_window(client, world, technician):
    for days_ago in (90, 1):
        Census.objects.create(tank=world.tank, recorded_by=technician, method=Census.Method.DIRECT, direct_count=100,
                              estimate=100, estimate_lower=100, estimate_upper=100,
                              observed_at=timezone.now() - timedelta(days=days_ago))
    make_check(world.tank, user=technician, dead_removed=12, observed_at=timezone.now() - timedelta(days=45))
    client.force_login(technician)
    assert client.get(reverse("colonies:health-overview")).context["rows"][0]["summary"].mortality.deaths == 0
    response = client.get(reverse("colonies:health-overview") + "?days=60")
    m = response.context["rows"][0]["summary"].mortality
    assert (m.deaths, round(m.animal_days)) == (12, 6000)  # 100 animals x 60 days
    assert client.get(reverse("colonies:health-overview") + "?days=7").status_code == 404


# ---------------------------------------------------------------------------------------------
# Plots, CSV and the cache
# ---------------------------------------------------------------------------------------------
def test_tank_plot_is_svg_by_default_and_png_on_request(client, world, technician):
    _doubling_series(world, technician)
    make_check(world.tank, user=technician, temp_c=26.0, dead_removed=2)
    client.force_login(technician)
    svg = client.get(reverse("colonies:tank-plot", args=[world.tank.code]))
    assert svg["Content-Type"] == "image/svg+xml" and b"<svg" in svg.content[:2000]
    png = client.get(reverse("colonies:tank-plot", args=[world.tank.code]) + "?format=png&days=30")
    assert png["Content-Type"] == "image/png" and png.content.startswith(PNG_MAGIC)
    assert client.get(reverse("colonies:tank-plot", args=[world.tank.code]) + "?format=gif").status_code == 404


def test_tank_plot_phone_layout_is_its_own_cached_figure_and_unknown_layouts_are_not_found(client, world, technician):
    _doubling_series(world, technician)
    client.force_login(technician)
    url = reverse("colonies:tank-plot", args=[world.tank.code])

    phone = client.get(url + "?layout=phone")
    wide = client.get(url)

    assert phone.status_code == 200 and phone["Content-Type"] == "image/svg+xml"
    assert phone.content != wide.content
    assert 'filename="vermilog-' + world.tank.code + '-120d-phone.svg"' in phone["Content-Disposition"]
    tank = health_views._tank_for_plot(world.tank.code)
    assert health_plots.render_tank_plot(tank, 120, "svg", "phone")[1]  # cached under its own key
    assert health_plots.render_tank_plot(tank, 120, "svg")[0] == wide.content
    missing = client.get(url + "?layout=tablet")
    assert missing.status_code == 404


def test_tank_plot_csv_has_the_chart_columns_and_rows(client, world, technician):
    _doubling_series(world, technician)
    make_check(world.tank, user=technician, temp_c=26.0, dead_removed=2)
    client.force_login(technician)
    response = client.get(reverse("colonies:tank-plot-csv", args=[world.tank.code]))
    rows = list(csv.DictReader(io.StringIO(_body(response))))
    assert response["Content-Type"].startswith("text/csv")
    assert list(rows[0]) == charts.TANK_COLUMNS
    series = {r["series"] for r in rows}
    assert {"population", "fit", "capacity", "reading", "deaths"} <= series
    reading = next(r for r in rows if r["series"] == "reading")
    assert (reading["parameter"], float(reading["value"]), reading["flagged"]) == ("temp_c", 26.0, "high")
    assert (float(reading["target_low"]), float(reading["target_high"])) == (21, 25)


def test_overview_plot_and_csv(client, world, technician):
    _doubling_series(world, technician)
    client.force_login(technician)
    png = client.get(reverse("colonies:health-overview-plot") + "?format=png")
    assert png.content.startswith(PNG_MAGIC)
    response = client.get(reverse("colonies:health-overview-csv"))
    rows = list(csv.DictReader(io.StringIO(_body(response))))
    assert list(rows[0]) == charts.OVERVIEW_COLUMNS
    assert {r["series"] for r in rows} >= {"population", "status", "mortality_per_1000_animal_days"}


@pytest.mark.parametrize("add", ["check", "feeding", "census", "void"])
def test_cached_plot_is_reused_until_a_record_of_the_tank_changes(world, technician, add):
    _doubling_series(world, technician)
    tank = health_views._tank_for_plot(world.tank.code)
    first, hit = health_plots.render_tank_plot(tank, 120, "svg")
    assert not hit
    again, hit = health_plots.render_tank_plot(tank, 120, "svg")
    assert hit and again == first
    other = make_tank(code="Z-01", room=world.room, species=world.species)
    make_check(other, user=technician, ph=7.0)  # another tank's record: still cached
    assert health_plots.render_tank_plot(tank, 120, "svg")[1]
    if add == "check":
        make_check(world.tank, user=technician, ph=7.0)
    elif add == "feeding":
        services.record_feeding(user=technician, feeding=Feeding(tank=world.tank, food="pellets", amount=0.1))
    elif add == "census":
        census(world.tank, technician, 150, 0)
    else:
        Census.objects.filter(tank=world.tank).latest().void(user=technician, reason="Miscounted")
    changed, hit = health_plots.render_tank_plot(tank, 120, "svg")
    assert not hit


def test_overview_cache_is_invalidated_by_a_new_record(world, technician):
    _doubling_series(world, technician)
    assert not health_plots.render_overview_plot(30, "png")[1]
    assert health_plots.render_overview_plot(30, "png")[1]
    make_check(world.tank, user=technician, dead_removed=3)
    assert not health_plots.render_overview_plot(30, "png")[1]


# ---------------------------------------------------------------------------------------------
# Query counts at two data sizes
# ---------------------------------------------------------------------------------------------
def _grow(world, user, n_tanks, n_records, prefix="Q"):
    tanks = [world.tank] + [make_tank(code=f"{prefix}-{i:02d}", room=world.room, species=world.species)
                            for i in range(n_tanks)]
    for tank in tanks:
        for d in range(n_records):
            census(tank, user, 40 + 5 * d, 14 * d + 1)
            make_check(tank, user=user, temp_c=22.0, dead_removed=1, observed_at=timezone.now() - timedelta(days=d))
        destination = make_tank(code=f"S-{tank.pk:03d}", room=world.room, species=world.species)
        services.record_split(user=user, source=tank, source_before=100, stayed=50, parts=[(destination, 50)])
    return tanks


def test_tank_page_query_count_does_not_grow_with_records(client, world, technician,
                                                           django_assert_max_num_queries):
    _grow(world, technician, 0, 2)
    client.force_login(technician)
    url = reverse("colonies:tank-detail", args=[world.tank.code])
    with CaptureQueriesContext(connection) as small:
        client.get(url)
    _grow_more = [census(world.tank, technician, 60 + d, 30 + d) for d in range(8)]
    for d in range(12):
        make_check(world.tank, user=technician, ph=7.0, dead_removed=d % 3,
                   observed_at=timezone.now() - timedelta(days=d, hours=3))
    services.record_split(user=technician, source=world.tank, source_before=90, stayed=40,
                          parts=[(services.NewTank(code="S-NEW", volume_l=1.0), 50)])
    with django_assert_max_num_queries(len(small)):
        response = client.get(url)
    assert response.status_code == 200
    assert len(response.context["summary"].splits) == 2


def test_overview_query_count_does_not_grow_with_tanks(client, world, technician, django_assert_max_num_queries):
    _grow(world, technician, 1, 2)
    client.force_login(technician)
    url = reverse("colonies:health-overview")
    with CaptureQueriesContext(connection) as small:
        client.get(url)
    _grow(SimpleNamespace(tank=make_tank(code="BIG-0", room=make_room(), species=world.species), room=world.room,
                          species=world.species), technician, 5, 4, prefix="BIG")
    with django_assert_max_num_queries(len(small)):
        response = client.get(url)
    assert len(response.context["rows"]) > 10


# ---------------------------------------------------------------------------------------------
# Access: anonymous, roles, wrong method
# ---------------------------------------------------------------------------------------------
READ = {"technician", "researcher", "manager"}
RECORD = {"technician", "manager"}
PAGES = [
    ("colonies:tank-lineage", True),
    ("colonies:tank-health", True),
    ("colonies:tank-plot", True),
    ("colonies:tank-plot-csv", True),
    ("colonies:health-overview", False),
    ("colonies:health-overview-plot", False),
    ("colonies:health-overview-csv", False),
]


def _url(name, tank_arg, world):
    return reverse(name, args=[world.tank.code]) if tank_arg else reverse(name)


@pytest.mark.parametrize("name,tank_arg", PAGES + [("colonies:tank-split", True)])
def test_anonymous_is_redirected_to_login(client, world, name, tank_arg):
    url = _url(name, tank_arg, world)
    response = client.post(url, _split_data()) if name.endswith("split") else client.get(url)
    assert response.status_code == 302 and response["Location"] == f"{reverse('login')}?next={url}"
    assert not Split.objects.exists()


@pytest.mark.parametrize("persona", ["technician", "researcher", "manager", "outsider"])
@pytest.mark.parametrize("name,tank_arg", PAGES)
def test_read_pages_by_role(client, request, world, persona, name, tank_arg):
    client.force_login(request.getfixturevalue(persona))
    assert client.get(_url(name, tank_arg, world)).status_code == (200 if persona in READ else 403)


@pytest.mark.parametrize("name,tank_arg", PAGES)
def test_read_pages_refuse_post_with_405(client, world, manager, name, tank_arg):
    client.force_login(manager)
    assert client.post(_url(name, tank_arg, world)).status_code == 405


@pytest.mark.parametrize("persona", ["technician", "researcher", "manager", "outsider"])
def test_split_by_role(client, request, world, persona):
    client.force_login(request.getfixturevalue(persona))
    response = client.post(reverse("colonies:tank-split", args=[world.tank.code]), _split_data(**{
        "part-0-new_code": "N-01", "part-0-new_volume_l": "1", "part-0-animals": "200"}))
    if persona in RECORD:
        assert response.status_code == 302
        assert Split.objects.count() == 1
    else:
        assert response.status_code == 403
        assert not Split.objects.exists() and not Tank.objects.filter(code="N-01").exists()


def test_split_refuses_get_with_405(client, world, manager):
    client.force_login(manager)
    assert client.get(reverse("colonies:tank-split", args=[world.tank.code])).status_code == 405


@pytest.mark.parametrize("persona,status", [("technician", 200), ("researcher", 403), ("outsider", 403)])
def test_split_void_page_by_role(client, request, world, technician, persona, status):
    split = services.record_split(user=technician, source=world.tank, source_before=100, stayed=50,
                                  parts=[(services.NewTank(code="V-01", volume_l=1.0), 50)])
    client.force_login(request.getfixturevalue(persona))
    assert client.get(reverse("colonies:split-void", args=[split.pk])).status_code == status
    response = client.post(reverse("colonies:split-void", args=[split.pk]), {"reason": "typo"})
    split.refresh_from_db()
    assert split.is_voided is (status == 200)


def test_researcher_sees_the_population_but_not_the_split_form(client, world, researcher, technician):
    _doubling_series(world, technician)
    client.force_login(researcher)
    text = page_text(client.get(reverse("colonies:tank-detail", args=[world.tank.code])))
    assert "Population" in text and "Split this culture" not in text
    client.force_login(technician)
    assert "Split this culture" in page_text(client.get(reverse("colonies:tank-detail", args=[world.tank.code])))


# ---------------------------------------------------------------------------------------------
# benchmark_plots command
# ---------------------------------------------------------------------------------------------
def test_benchmark_plots_reports_first_and_cached_render_times(world, technician):
    from django.core.management import call_command

    _doubling_series(world, technician)
    out = io.StringIO()
    call_command("benchmark_plots", "--tank", world.tank.code, "--repeat", "2", "--format", "svg", stdout=out)
    lines = out.getvalue().splitlines()
    assert lines[0].startswith("Tank A-01, 120 days, svg: first render ") and "cached" in lines[0]
    assert lines[1].startswith("Overview, 1 tanks, 30 days, svg: first render ")


def test_benchmark_plots_refuses_an_unknown_tank(db):
    from django.core.management import CommandError, call_command

    with pytest.raises(CommandError, match="Tank 'NOPE' does not exist."):
        call_command("benchmark_plots", "--tank", "NOPE")
