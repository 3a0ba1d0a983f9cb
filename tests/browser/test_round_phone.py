"""The round on a phone (390 x 844 CSS px): a room of 41 tanks with only temperature due fits in at most a third of
the 30 screens the round took when it showed every input of every tank (issue 10), and every input has a name."""
import pytest

from colonies import parameters, schedules
from colonies.models import MeasurementPlan, Room, Tank

pytestmark = pytest.mark.browser

SCREEN_PX = 844
BEFORE_SCREENS = 30  # measured on the earlier round: 41 tanks, 16 inputs each (issue 10)


def test_a_room_of_41_tanks_with_only_temperature_due_fits_a_third_of_the_old_height(page, live_server, bench, log_in):
    species = bench["tanks"]["BT-01"].species
    for key in parameters.KEYS:
        if key != "temp_c":
            MeasurementPlan.objects.create(species=species, parameter=key, cadence=schedules.ON_REQUEST)
    room = Room.objects.create(code="big", name="Big room")
    Tank.objects.bulk_create(Tank(code=f"BR-{i:02d}", room=room, species=species, volume_l=2.0,
                                  position=f"rack {1 + i // 8}, shelf {'ABCDEFGH'[i % 8]}") for i in range(41))
    log_in("tess")
    page.goto(f"{live_server.url}/round/big/")

    visible = page.locator(".tankrow input.reading:visible")
    assert visible.count() == 41  # one due input per tank: temperature
    assert set(visible.evaluate_all("els => els.map(e => e.dataset.param)")) == {"temp_c"}
    height = page.evaluate("document.documentElement.scrollHeight")
    assert height <= BEFORE_SCREENS / 3 * SCREEN_PX, f"{height / SCREEN_PX:.1f} screens"
    # Phone-sized inputs (no zoom on focus) and no sideways scrolling.
    sizes = page.locator("#round-form input:visible, #round-form select:visible").evaluate_all(
        "els => els.map(e => parseFloat(getComputedStyle(e).fontSize))")
    assert min(sizes) >= 16
    assert page.evaluate("document.documentElement.scrollWidth <= window.innerWidth")
    # Every visible input and select has an accessible name that says which tank it belongs to or what it is.
    unnamed = page.locator("#round-form input:visible, #round-form select:visible").evaluate_all(
        "els => els.filter(e => !(e.labels && e.labels.length) && !e.getAttribute('aria-label')).map(e => e.name)")
    assert unnamed == []
