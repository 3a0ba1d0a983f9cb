"""A researcher books animals, draws them, records a trial and finds it on the study page (headless Chromium)."""
import re

import pytest

from tests.browser.conftest import PASSWORD

pytestmark = pytest.mark.browser


@pytest.fixture
def lab(transactional_db):
    from datetime import timedelta

    from django.contrib.auth.models import Group, User
    from django.utils import timezone

    from colonies.models import Census, Room, Species, Tank
    from colonies.roles import RESEARCHER
    from experiments import services
    from experiments.models import Allowance, Protocol, Stimulus

    researcher = User.objects.create_user("rhea", password=PASSWORD, first_name="Rhea", last_name="Tester")
    researcher.groups.add(Group.objects.get_or_create(name=RESEARCHER)[0])
    species = Species.objects.create(scientific_name="Testus dispersus", common_name="Browser worm",
                                     habitat="freshwater", reserve_min_animals=50)
    room = Room.objects.create(code="trial-room", name="Trial room")
    tank = Tank.objects.create(code="BW-01", room=room, species=species, volume_l=2.0)
    Census.objects.create(tank=tank, recorded_by=researcher, method=Census.Method.DIRECT, direct_count=400,
                          estimate=400.0, observed_at=timezone.now() - timedelta(days=1))
    today = timezone.localdate()
    protocol = Protocol.objects.create(
        title="Browser protocol", reference="BRW-001", approver="Test welfare body", starts_on=today - timedelta(days=5),
        expires_on=today + timedelta(days=100), status=Protocol.Status.APPROVED, max_animals_per_trial=12,
        max_exposures_per_group=3, min_rest_hours=20, max_cumulative_dose_mj_cm2=150)
    Allowance.objects.create(protocol=protocol, kind=Stimulus.UV, wavelength_min_nm=350, wavelength_max_nm=400,
                             max_irradiance_mw_cm2=5, max_duration_s=60, max_dose_mj_cm2=100)
    study = services.create_study(user=researcher, code="browser-uv", title="Browser UV study", protocol=protocol,
                                  conditions=["sham", "UV 20 mJ/cm²"], reference_condition="sham", replicates=2,
                                  method="block", seed=11, blinded=False)
    return {"tank": tank, "study": study, "researcher": researcher}


def test_researcher_books_draws_records_a_trial_and_sees_it_on_the_study_page(page, live_server, lab, log_in):
    from playwright.sync_api import expect

    from experiments.models import Booking, Cohort, Trial

    log_in("rhea")
    page.goto(f"{live_server.url}/experiments/")
    page.get_by_role("link", name="Book animals").click()
    page.get_by_label("Protocol").select_option(label="BRW-001 · Browser protocol")
    page.get_by_label("Species").select_option(label="Testus dispersus (Browser worm)")
    page.get_by_label("Animals", exact=False).first.fill("10")
    page.get_by_role("button", name="Suggest tanks").click()
    # 400 counted − 50 reserve = 350 available
    expect(page.locator("table.data")).to_contain_text("350")
    page.get_by_role("button", name="Book from BW-01").click()
    expect(page.locator(".msg-success")).to_contain_text("Booked 10 animals from BW-01")
    booking = Booking.objects.get()
    assert (booking.tank.code, booking.animals, booking.status) == ("BW-01", 10, Booking.Status.ACTIVE)

    page.get_by_role("button", name="Draw animals").click()
    expect(page.get_by_role("heading", name=re.compile(r"^Cohort C-\d{4}"))).to_be_visible()
    cohort = Cohort.objects.get()
    assert cohort.size == 10 and cohort.origin_tank.code == "BW-01"

    page.goto(f"{live_server.url}/experiments/studies/browser-uv/")
    page.get_by_role("link", name="Record the next trial").click()
    uv_slot = next(s for s in lab["study"].allocation if s["condition"].startswith("UV"))
    page.get_by_role("button", name=f"I will run slot {uv_slot['slot']}", exact=True).click()
    expect(page.locator(".msg-success")).to_contain_text(f"You claimed slot {uv_slot['slot']}")
    page.get_by_label("Slot").select_option(str(uv_slot["slot"]))
    page.get_by_label("Cohort").select_option(label=cohort.label)
    page.get_by_label("Animals *").fill("10")
    uv_caution = page.locator('.stim-group[data-kinds="light uv"] .caution')
    expect(uv_caution).to_be_hidden()
    page.get_by_label("Stimulus type").select_option("uv")
    expect(uv_caution).to_be_visible()
    expect(uv_caution).to_contain_text("eye and skin protection")
    page.get_by_label("Wavelength (nm)").fill("365")
    page.get_by_label("Irradiance (mW/cm²)").fill("2")
    page.get_by_label("Duration (s)").fill("10")
    expect(page.locator('[data-derived="dose"]')).to_have_text("Dose = 2 mW/cm² × 10 s = 20 mJ/cm²")
    page.get_by_label("Time to disperse (s)").fill("140")
    page.get_by_role("button", name="Save trial").click()
    expect(page.locator(".msg-success")).to_contain_text("saved")

    trial = Trial.objects.get()
    assert (trial.cohort, trial.dose_mj_cm2, trial.disperse_s, trial.censored) == (cohort, 20.0, 140.0, False)
    page.get_by_role("link", name="browser-uv").first.click()
    assert (trial.slot, trial.condition) == (uv_slot["slot"], "UV 20 mJ/cm²")
    row = page.locator("#trial-table tr", has=page.locator(f"code:text-is('{trial.code}')"))
    expect(row).to_contain_text("UV 20 mJ/cm²")
    expect(row).to_contain_text("365 nm 2 mW/cm² × 10 s = 20 mJ/cm²")
    expect(row).to_contain_text("140")
    expect(row).to_contain_text("scored")
    expect(page.get_by_role("heading", name="Dispersal by condition")).to_be_visible()
