"""The many-tanks screen in a real browser: rows beyond Django's plain-field limit save in one submit, typing
in a row ticks it, and the census form shows only the chosen method's fields."""
import pytest
from django.conf import settings

from colonies.models import Feeding, Room, Tank

pytestmark = pytest.mark.browser

N_TANKS = 210  # 210 rows x 5 inputs = 1,050 plain fields, more than DATA_UPLOAD_MAX_NUMBER_FIELDS (1,000)


def test_feeding_for_210_tanks_is_saved_in_one_submit_and_an_edited_row_is_ticked(page, live_server, bench, log_in):
    from playwright.sync_api import expect

    species = bench["tanks"]["BT-01"].species
    room = Room.objects.create(code="big-0", name="Big room")
    Tank.objects.bulk_create(Tank(code=f"BG-{i:03d}", room=room, species=species, volume_l=2.0, position="rack 1")
                             for i in range(N_TANKS))
    log_in("tess")
    page.goto(f"{live_server.url}/husbandry/feeding/?room=big-0")
    assert page.locator(".batchrow [name]").count() > settings.DATA_UPLOAD_MAX_NUMBER_FIELDS
    # Never fed: every row is due and starts ticked; fill food and amount, untick the last row.
    page.get_by_role("button", name="Untick all").click()
    page.get_by_role("button", name="Tick all", exact=True).click()
    for name in page.locator('.batchrow input[name$="-food"]').evaluate_all("els => els.map(e => e.name)"):
        page.locator(f'input[name="{name}"]').fill("pellets")
        page.locator(f'input[name="{name[:-len("food")]}amount"]').fill("0.1")
    last = f"BG-{N_TANKS - 1:03d}"
    page.locator(f'input[name="{last}-record"]').uncheck()
    page.get_by_role("button", name="Save feedings").click()

    expect(page.get_by_text(f"Saved {N_TANKS - 1} feedings")).to_be_visible()
    assert Feeding.objects.filter(tank__room=room, food="pellets", amount=0.1).count() == N_TANKS - 1
    assert not Feeding.objects.filter(tank__code=last).exists()

    # The tank just left out (still due): typing in its row ticks it again.
    page.goto(f"{live_server.url}/husbandry/feeding/?room=big-0&due=1")
    assert page.locator(".batchrow").count() == 1
    page.locator(f'input[name="{last}-food"]').fill("pellets")
    expect(page.locator(f'input[name="{last}-record"]')).to_be_checked()


def test_census_form_shows_only_the_chosen_methods_fieldset(page, live_server, bench, log_in):
    from playwright.sync_api import expect

    log_in("tess")
    page.goto(f"{live_server.url}/tanks/BT-01/")
    sets = {m: page.locator(f'fieldset.census-method[data-method="{m}"]') for m in ("direct", "aliquot", "mass")}
    expect(sets["direct"]).to_be_visible()
    expect(sets["aliquot"]).to_be_hidden()
    expect(sets["mass"]).to_be_hidden()
    page.locator('select[name="census-method"]').select_option("mass")
    expect(sets["mass"]).to_be_visible()
    expect(sets["direct"]).to_be_hidden()
    page.get_by_label("Total wet mass (g)").fill("5")
    page.get_by_label("Subsample mass (g)").fill("0.5")
    page.get_by_label("Animals in subsample").fill("40")
    page.get_by_role("button", name="Save census").click()
    expect(page.get_by_text("Census of BT-01 saved: about 400 animals")).to_be_visible()
