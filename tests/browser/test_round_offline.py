"""The round at the bench in a real browser: Enter never submits, what is typed survives a reload, and a round
saved without network is kept on the device and sent exactly once when the network is back."""
import pytest

from colonies.models import Check

pytestmark = pytest.mark.browser


def _open_round(page, live_server):
    page.goto(f"{live_server.url}/round/bench-1/")
    # The service worker takes over on the next load; wait for it so a reload without network has the page.
    page.evaluate("navigator.serviceWorker.ready.then(() => true)")
    page.reload()
    assert page.evaluate("!!navigator.serviceWorker.controller")


def test_enter_moves_to_the_next_input_and_never_submits(page, live_server, bench, log_in):
    log_in("tess")
    page.goto(f"{live_server.url}/round/bench-1/")
    first = page.locator('input[name="BT-01-temp_c"]')
    first.fill("22.5")
    first.press("Enter")

    assert page.evaluate("document.activeElement.name") != "BT-01-temp_c"
    assert page.evaluate("document.activeElement.tagName") in ("INPUT", "SELECT")
    assert page.url.endswith("/round/bench-1/") and Check.objects.count() == 0


def test_what_is_typed_survives_a_reload(page, live_server, bench, log_in):
    log_in("tess")
    page.goto(f"{live_server.url}/round/bench-1/")
    page.locator('input[name="BT-02-temp_c"]').fill("23.4")
    page.reload()

    assert page.locator('input[name="BT-02-temp_c"]').input_value() == "23.4"
    assert "Restored what was typed on this device" in page.locator("#round-state").inner_text()


def test_a_round_saved_offline_is_kept_and_sent_once_when_the_network_is_back(page, live_server, bench, log_in):
    from playwright.sync_api import expect

    log_in("tess")
    _open_round(page, live_server)
    page.context.set_offline(True)
    page.locator('input[name="BT-01-temp_c"]').fill("22.5")
    page.locator('input[name="BT-02-temp_c"]').fill("27.0")  # above target: flagged when saved
    page.get_by_role("button", name="Save round").click()

    outbox = page.locator("#round-outbox")
    expect(outbox).to_contain_text("2 tanks")
    expect(outbox).to_contain_text("kept on this device, not sent yet")
    assert Check.objects.count() == 0

    page.reload()  # without network: the service worker's copy of the page, the outbox still there
    expect(outbox).to_contain_text("kept on this device, not sent yet")
    expect(page.locator('input[name="BT-01-temp_c"]')).to_have_value("")  # the values are in the outbox now

    page.context.set_offline(False)
    page.evaluate("window.dispatchEvent(new Event('online'))")
    expect(outbox).to_contain_text("sent at")
    expect(outbox).to_contain_text("Saved 2 checks; 1 with flagged values.")

    saved = {c.tank.code: c for c in Check.objects.select_related("tank")}
    assert sorted(saved) == ["BT-01", "BT-02"] and saved["BT-02"].flags["temp_c"]["side"] == "high"
    # Saved with the moment it was saved on the device, before the network came back.
    assert saved["BT-01"].observed_at <= saved["BT-01"].recorded_at

    page.reload()  # nothing is sent twice
    expect(outbox).to_contain_text("sent at")
    page.evaluate("window.dispatchEvent(new Event('online'))")
    page.wait_for_timeout(500)
    assert Check.objects.count() == 2
