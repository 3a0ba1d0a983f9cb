"""The all-rooms round in a real browser, filled beyond Django's plain-field limit, saves in one submit."""
import pytest
from django.conf import settings

from colonies.models import Check, Room, Tank

pytestmark = pytest.mark.browser

N_TANKS = 70  # 70 rows x 16 inputs = 1,120 plain fields, more than DATA_UPLOAD_MAX_NUMBER_FIELDS (1,000)


def test_all_rooms_round_of_70_filled_tanks_saves_every_check(page, live_server, bench, log_in):
    from playwright.sync_api import expect

    species = bench["tanks"]["BT-01"].species
    for r in range(2):
        room = Room.objects.create(code=f"big-{r}", name=f"Big room {r}")
        Tank.objects.bulk_create(Tank(code=f"BG-{r}{i:02d}", room=room, species=species, volume_l=2.0)
                                 for i in range((N_TANKS - 3) // 2 + r))
    assert Tank.objects.count() == N_TANKS
    log_in("tess")
    page.goto(f"{live_server.url}/round/")
    inputs = page.locator(".tankrow [name]")
    assert inputs.count() > settings.DATA_UPLOAD_MAX_NUMBER_FIELDS
    for name in page.locator('.tankrow input[name$="-temp_c"]').evaluate_all("els => els.map(e => e.name)"):
        page.locator(f'input[name="{name}"]').fill("22.5")
    page.get_by_role("button", name="Save round").click()

    expect(page.get_by_text(f"Saved {N_TANKS} checks")).to_be_visible()
    assert Check.objects.filter(temp_c=22.5).count() == N_TANKS
