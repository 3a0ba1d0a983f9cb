"""The colony-health overview a room at a time and a page of tanks at a time (colonies/health_overview.py)."""
import pytest
from django.core.cache import cache
from django.urls import reverse

from colonies.health_overview import PAGE_TANKS
from tests.factories import make_room, make_species, make_tank

PNG_MAGIC = b"\x89PNG\r\n\x1a\n"


@pytest.fixture
def facility(db):
    cache.clear()
    species = make_species()
    big, small = make_room(code="BIG"), make_room(code="SMALL")
    for i in range(PAGE_TANKS + 6):
        make_tank(code=f"B-{i:02d}", room=big, species=species)
    for i in range(3):
        make_tank(code=f"S-{i:02d}", room=small, species=species)
    yield
    cache.clear()


def test_pages_of_tanks_worst_first_and_one_room(client, facility, technician):
    client.force_login(technician)
    url = reverse("colonies:health-overview")
    first = client.get(url).context["shown"]
    assert (len(first["rows"]), first["pages"], first["total"]) == (PAGE_TANKS, 2, PAGE_TANKS + 9)
    second = client.get(url + "?page=2").context["shown"]
    assert len(second["rows"]) == 9 and second["rows"][0]["rank"] == PAGE_TANKS + 1
    room = client.get(url + "?room=SMALL").context["shown"]
    assert [r["tank"].room.code for r in room["rows"]] == ["SMALL"] * 3 and room["pages"] == 1


@pytest.mark.parametrize("query", ["?page=3", "?page=x", "?page=0", "?room=NOPE"])
def test_a_page_or_room_that_does_not_exist_is_not_found(client, facility, technician, query):
    client.force_login(technician)
    for name in ("colonies:health-overview", "colonies:health-overview-plot"):
        response = client.get(reverse(name) + query)
        assert response.status_code == 404


def test_select_names_the_field_and_the_allowed_values(client, facility, technician):
    from colonies import health_overview
    data = health_overview.overview(30)
    with pytest.raises(ValueError, match=r"Page: 3 is not between 1 and 2\."):
        health_overview.select(data, "", 3)
    with pytest.raises(ValueError, match=r"Room: 'NOPE' is not a room with tanks in use; choose one of BIG, SMALL\."):
        health_overview.select(data, "NOPE", 1)


def test_the_figure_shows_the_page_chosen_and_is_cached_per_page(client, facility, technician):
    from colonies import health_plots
    client.force_login(technician)
    png = client.get(reverse("colonies:health-overview-plot") + "?format=png&page=2")
    assert png.content.startswith(PNG_MAGIC)
    assert health_plots.render_overview_plot(30, "png", "", 2)[1]  # cached
    assert not health_plots.render_overview_plot(30, "png", "", 1)[1]  # another page: its own figure


def test_needs_attention_has_its_own_mark_and_words_not_the_above_target_triangle(client, facility, technician):
    from django.utils import timezone

    from colonies.models import Deviation, Tank
    tank = Tank.objects.get(code="S-01")
    now = timezone.now()
    Deviation.objects.create(tank=tank, rule=Deviation.Rule.OUT_OF_TARGET, parameter="ph", summary="pH high",
                             severity=Deviation.Severity.MAJOR, opened_at=now, last_seen_at=now)
    client.force_login(technician)

    html = client.get(reverse("colonies:health-overview") + "?room=SMALL").content.decode()

    row = html[html.index('<tr class="status-row-attention">'):]
    row = row[:row.index("</tr>")]
    assert '<svg class="mark"' in row and 'aria-hidden="true"' in row and "needs attention" in row
    assert "▲" not in row  # ▲ means above a target or limit only
    assert "major deviation open" in row
