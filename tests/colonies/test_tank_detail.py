"""The tank page: recent checks with their flags, records, what is due."""
import re
from datetime import timedelta

import pytest
from django.urls import reverse
from django.utils import timezone

from colonies.models import Feeding
from tests.factories import make_check, make_species, make_tank, make_tank_target, page_text


@pytest.fixture
def tank(db):
    return make_tank(code="FW-01", species=make_species(targets={"ph": (6.0, 8.0), "temp_c": (21.0, 25.0)}))


def _cells(response, check):
    row = next(r for r in response.context["rows"] if r["check"].pk == check.pk)
    return {c["param"].key: c for c in row["cells"]}, row


def test_tank_page_shows_a_saved_flag_on_the_value_and_asks_for_action(client, technician, tank):
    check = make_check(tank, user=technician, ph=9.1, temp_c=23.0)
    client.force_login(technician)

    response = client.get(reverse("colonies:tank-detail", args=[tank.code]))

    assert response.status_code == 200
    cells, row = _cells(response, check)
    assert (cells["ph"]["value"], cells["ph"]["side"]) == ("9.10", "high")
    assert cells["temp_c"]["side"] is None
    assert row["flag_text"] == ["pH 9.10 is above the care target 6–8"]
    text = page_text(response)
    assert '<td class="num flag-cell" data-label="pH">9.10 <span class="flag-mark" title="above target">▲</span></td>' in text
    assert "corrective action missing" in text


def test_tank_page_flag_with_action_shows_the_action_instead_of_missing(client, technician, tank):
    make_check(tank, user=technician, ph=5.0, corrective_action="Buffered with bicarbonate")
    client.force_login(technician)

    text = page_text(client.get(reverse("colonies:tank-detail", args=[tank.code])))

    assert '<td class="num flag-cell" data-label="pH">5.00 <span class="flag-mark" title="below target">▼</span></td>' in text
    assert "Buffered with bicarbonate" in text
    assert "corrective action missing" not in text


def test_tank_page_keeps_the_flag_saved_under_the_target_of_the_time(client, technician, tank):
    """Flags are stored: a later override does not rewrite what the technician was shown."""
    check = make_check(tank, user=technician, temp_c=20.0)
    make_tank_target(tank, "temp_c", 18.0, 22.0)
    client.force_login(technician)

    cells, _ = _cells(client.get(reverse("colonies:tank-detail", args=[tank.code])), check)

    assert cells["temp_c"]["side"] == "low"


def test_tank_page_shows_the_override_as_this_tanks_target(client, technician, tank):
    make_tank_target(tank, "temp_c", 18.0, 22.0, reason="Cool-acclimated line")
    client.force_login(technician)

    response = client.get(reverse("colonies:tank-detail", args=[tank.code]))

    targets = {p.key: t for p, t in response.context["targets"]}
    assert (targets["temp_c"].low, targets["temp_c"].high, targets["temp_c"].source) == (18.0, 22.0, "tank")
    assert (targets["ph"].low, targets["ph"].high, targets["ph"].source) == (6.0, 8.0, "species")


def test_tank_page_lists_current_records_only(client, technician, tank):
    kept = make_check(tank, user=technician, ph=7.0, observed_at=timezone.now() - timedelta(hours=2))
    voided = make_check(tank, user=technician, ph=7.5)
    voided.void(user=technician, reason="Wrong tank")
    feeding = Feeding.objects.create(tank=tank, recorded_by=technician, food="pellets", amount=0.1)
    feeding.void(user=technician, reason="Entered twice")
    client.force_login(technician)

    response = client.get(reverse("colonies:tank-detail", args=[tank.code]))

    assert [r["check"].pk for r in response.context["rows"]] == [kept.pk]
    assert list(response.context["feedings"]) == []


def test_tank_page_for_unknown_code_is_404(client, technician):
    client.force_login(technician)
    assert client.get(reverse("colonies:tank-detail", args=["NOPE"])).status_code == 404


def test_tank_page_offers_record_forms_to_technicians_only(client, technician, researcher, tank):
    url = reverse("colonies:tank-detail", args=[tank.code])
    add_check = reverse("colonies:tank-add", args=[tank.code, "check"])

    client.force_login(technician)
    assert add_check in page_text(client.get(url))
    client.force_login(researcher)
    assert add_check not in page_text(client.get(url))


def _section_order(html: str) -> list[str]:
    return re.findall(r'class="tank-section[^"]*" id="([a-z]+)"', html)


def test_tank_page_puts_the_forms_first_for_who_records_and_the_summary_first_for_who_reads(
        client, technician, researcher, tank):
    url = reverse("colonies:tank-detail", args=[tank.code])

    client.force_login(technician)
    technician_page = client.get(url)
    client.force_login(researcher)
    researcher_page = client.get(url)

    assert _section_order(technician_page.content.decode()) == [
        "record", "due", "checks", "population", "figure", "husbandry", "split", "about"]  # no deviation: no section
    assert _section_order(researcher_page.content.decode()) == [
        "population", "figure", "checks", "due", "husbandry", "about"]
    # the jump links lead to the sections, in the same order
    for response in (technician_page, researcher_page):
        jump = re.findall(r'<li><a href="#([a-z]+)">', response.content.decode())
        assert jump == _section_order(response.content.decode())


def test_tank_page_jump_link_to_deviations_counts_them(client, technician, tank):
    from colonies.models import Deviation
    Deviation.objects.create(tank=tank, rule=Deviation.Rule.OUT_OF_TARGET, parameter="ph", summary="pH high",
                             opened_at=timezone.now())
    client.force_login(technician)

    html = client.get(reverse("colonies:tank-detail", args=[tank.code])).content.decode()

    assert '<a href="#deviations">Deviations (1)</a>' in html
    assert _section_order(html)[:3] == ["record", "due", "deviations"]


def test_tank_page_shows_ten_checks_and_the_rest_one_tap_away(client, technician, tank):
    for days in range(12):
        make_check(tank, user=technician, temp_c=22.0, observed_at=timezone.now() - timedelta(days=days, hours=1))
    client.force_login(technician)

    response = client.get(reverse("colonies:tank-detail", args=[tank.code]))

    assert (len(response.context["recent_rows"]), len(response.context["earlier_rows"])) == (10, 2)
    assert "<summary>2 earlier checks</summary>" in response.content.decode()


def test_tank_page_picks_the_phone_figure_below_40rem(client, researcher, tank):
    client.force_login(researcher)

    html = client.get(reverse("colonies:tank-detail", args=[tank.code])).content.decode()

    plot = reverse("colonies:tank-plot", args=[tank.code])
    assert f'<source media="(max-width: 40rem)" srcset="{plot}?days=120&amp;layout=phone">' in html
    assert f'<img src="{plot}?days=120"' in html


def test_tank_page_figure_is_the_health_pages_default_period_so_both_share_one_cached_figure():
    from colonies import health_views, views
    assert views.TANK_FIGURE_DAYS == health_views.DEFAULT_PLOT_DAYS


def test_a_refused_split_comes_back_at_the_top_of_the_tank_page(client, technician, tank):
    client.force_login(technician)
    data = {"split-source_before": "100", "split-stayed": "500", "part-TOTAL_FORMS": "1", "part-INITIAL_FORMS": "0",
            "part-MIN_NUM_FORMS": "0", "part-MAX_NUM_FORMS": "6", "part-0-new_code": "LV-11", "part-0-animals": "50"}

    response = client.post(reverse("colonies:tank-split", args=[tank.code]), data)

    assert response.status_code == 400
    html = response.content.decode()
    assert _section_order(html)[:2] == ["split", "record"] and html.count('id="split"') == 1
    assert re.findall(r'<li><a href="#([a-z]+)">', html)[:2] == ["split", "record"]
