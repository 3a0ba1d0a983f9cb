"""Browser: a flagged reading opens a deviation; a manager closes it with a corrective action."""
import pytest

pytestmark = pytest.mark.browser


def test_manager_closes_deviation_with_corrective_action(page, live_server, bench, log_in):
    from django.contrib.auth.models import Group, User
    from playwright.sync_api import expect

    from colonies import services
    from colonies.models import Deviation
    from colonies.roles import MANAGER
    from tests.browser.conftest import PASSWORD

    tank = bench["tanks"]["BT-01"]
    tank.species.targets.get(parameter="temp_c")  # 21-25 °C
    services.record_check(user=bench["technician"], tank=tank, row={"temp_c": 27.5})
    deviation = Deviation.objects.get()
    manager = User.objects.create_user("mona", password=PASSWORD)
    manager.groups.add(Group.objects.get_or_create(name=MANAGER)[0])

    log_in("mona")
    page.goto(f"{live_server.url}/deviations/")
    row = page.locator("tr", has_text="BT-01")
    expect(row).to_contain_text("Temperature 27.5")
    row.get_by_role("link", name="Temperature 27.5", exact=False).click()

    # Closing without an action is refused and the deviation stays open.
    page.get_by_role("button", name="Sign and close deviation").click()
    expect(page.locator(".errorbox").first).to_contain_text("Corrective action")
    page.get_by_label("Corrective action").fill("Heater thermostat replaced; 22.4 °C at the next check")
    # A wrong password signs nothing and closes nothing.
    page.get_by_label("Your password").fill("not-my-password")
    page.get_by_role("button", name="Sign and close deviation").click()
    expect(page.locator(".errorbox")).to_contain_text("Password")
    page.get_by_label("Your password").fill(PASSWORD)
    page.get_by_role("button", name="Sign and close deviation").click()
    expect(page.locator(".messages")).to_contain_text("Closed")
    expect(page.locator(".signatures")).to_contain_text("meaning: closed with corrective action")
    expect(page.locator(".status-closed")).to_be_visible()
    # The action on the record (its history below shows the change too)
    expect(page.locator("dd", has_text="Heater thermostat replaced").first).to_be_visible()
    expect(page.locator("table.history")).to_contain_text("Heater thermostat replaced")

    deviation.refresh_from_db()
    assert deviation.status == Deviation.Status.CLOSED
    assert deviation.closed_by == manager
    assert deviation.corrective_action.startswith("Heater thermostat replaced")
