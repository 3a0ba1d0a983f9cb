"""The daily round in a real browser: live flags while typing, then what the server saved and shows."""
import re

import pytest

from colonies.models import Check

pytestmark = pytest.mark.browser


def _reading(page, tank: str, key: str):
    return page.locator(f'input[name="{tank}-{key}"]')


def _live(page, tank: str, key: str):
    return page.locator(f'.reading-cell:has(input[name="{tank}-{key}"]) .live')


def test_round_flags_out_of_range_value_while_typing_and_saves_it_flagged(page, live_server, bench, log_in):
    from playwright.sync_api import expect

    log_in("tess")
    page.goto(f"{live_server.url}/round/bench-1/")
    expect(page.get_by_role("heading", name="Daily round: Bench room")).to_be_visible()
    action = page.locator('input[name="BT-01-corrective_action"]')
    expect(action).to_be_hidden()

    temp = _reading(page, "BT-01", "temp_c")
    temp.press_sequentially("27.5")
    # Flagged before saving: amber input, words and arrow (not colour alone), action field shown.
    expect(temp).to_have_class(re.compile(r"\bis-out\b"))
    expect(_live(page, "BT-01", "temp_c")).to_have_text("▲ above 21–25 °C")
    expect(page.locator('fieldset[data-tank="BT-01"]')).to_have_class(re.compile(r"\bhas-flag\b"))
    expect(action).to_be_visible()

    _reading(page, "BT-02", "temp_c").press_sequentially("23.0")
    _reading(page, "BT-02", "ph").press_sequentially("7.4")
    for key in ("temp_c", "ph"):
        expect(_reading(page, "BT-02", key)).not_to_have_class(re.compile(r"\bis-out\b"))
        expect(_live(page, "BT-02", key)).to_have_text("")
    expect(page.locator('input[name="BT-02-corrective_action"]')).to_be_hidden()

    page.get_by_role("button", name="Save round").click()
    expect(page.locator(".msg-warning")).to_have_text(
        "Saved 2 checks; 1 with flagged values. 1 still need a corrective-action note.")

    saved = {c.tank.code: c for c in Check.objects.select_related("tank")}
    assert sorted(saved) == ["BT-01", "BT-02"]  # the empty BT-03 row is skipped
    assert saved["BT-01"].temp_c == 27.5
    assert saved["BT-01"].flags["temp_c"]["side"] == "high"
    assert saved["BT-01"].recorded_by == bench["technician"]
    assert saved["BT-02"].flags == {} and saved["BT-02"].ph == 7.4

    page.locator('fieldset[data-tank="BT-01"] a.code').click()
    expect(page.get_by_role("heading", name=re.compile(r"^Tank BT-01"))).to_be_visible()
    flag_cell = page.locator("td.flag-cell")
    expect(flag_cell).to_have_count(1)
    expect(flag_cell).to_contain_text("27.5")
    expect(flag_cell).to_contain_text("▲")
    expect(page.get_by_text("Temperature 27.5 °C is above the care target 21–25 °C")).to_be_visible()
    expect(page.get_by_text("corrective action missing")).to_be_visible()


def test_round_refuses_impossible_ph_names_it_and_saves_nothing(page, live_server, bench, log_in):
    from playwright.sync_api import expect

    log_in("tess")
    page.goto(f"{live_server.url}/round/bench-1/")
    _reading(page, "BT-01", "temp_c").press_sequentially("22.5")  # valid, but must not be saved either
    ph = _reading(page, "BT-02", "ph")
    ph.press_sequentially("15")
    expect(ph).to_have_class(re.compile(r"\bis-impossible\b"))
    expect(_live(page, "BT-02", "ph")).to_have_text("impossible (0–14)")

    page.get_by_role("button", name="Save round").click()
    expect(page.locator(".msg-error")).to_contain_text("Nothing was saved")
    error = page.locator('fieldset[data-tank="BT-02"] .errorbox')
    expect(error).to_have_text("Tank BT-02, pH: 15 is impossible; allowed range 0 to 14.")
    expect(page.locator('fieldset[data-tank="BT-02"]')).to_have_class(re.compile(r"\bhas-error\b"))
    # What was typed is still there to correct.
    expect(_reading(page, "BT-02", "ph")).to_have_value("15")
    expect(_reading(page, "BT-01", "temp_c")).to_have_value("22.5")

    assert Check.objects.count() == 0
