"""A researcher uploads a dish photo series on the trial page, watches the progress bar, and accepts the
proposed outcome on the scoring form (headless Chromium, background measurement on the live server)."""
from datetime import timedelta

import pytest

from tests.browser.conftest import PASSWORD
from tests.browser.test_phone_pages import AXE, _axe, _overflow
from tests.experiments.dish_pictures import png, ring

pytestmark = pytest.mark.browser

SPREADS = [1, 1, 1, 2.2, 2.6, 3]  # apart from the 4th photo: at 60 s intervals, dispersed at 180 s


@pytest.fixture
def trial(transactional_db, settings, tmp_path):
    from django.contrib.auth.models import Group, User
    from django.utils import timezone

    from colonies.models import Census, Room, Species, Tank
    from colonies.roles import RESEARCHER
    from experiments import services
    from experiments.models import Allowance, Protocol, Stimulus

    settings.MEDIA_ROOT = tmp_path
    settings.IMAGING_SYNC_MAX_PIXELS = 0  # measured in the background, with the progress bar
    researcher = User.objects.create_user("rhea", password=PASSWORD)
    researcher.groups.add(Group.objects.get_or_create(name=RESEARCHER)[0])
    species = Species.objects.create(scientific_name="Testus imaginis", common_name="Camera worm",
                                     habitat="freshwater", reserve_min_animals=0)
    tank = Tank.objects.create(code="CW-01", room=Room.objects.create(code="cam", name="Camera room"),
                               species=species, volume_l=2.0)
    Census.objects.create(tank=tank, recorded_by=researcher, method=Census.Method.DIRECT, direct_count=300,
                          estimate=300.0, observed_at=timezone.now() - timedelta(days=9))
    today = timezone.localdate()
    protocol = Protocol.objects.create(
        title="Camera protocol", reference="CAM-001", approver="Test welfare body", starts_on=today - timedelta(days=20),
        expires_on=today + timedelta(days=100), status=Protocol.Status.APPROVED, max_animals_per_trial=12,
        max_exposures_per_group=3, min_rest_hours=20)
    Allowance.objects.create(protocol=protocol, kind=Stimulus.UV, wavelength_min_nm=350, wavelength_max_nm=400,
                             max_irradiance_mw_cm2=5, max_duration_s=60, max_dose_mj_cm2=100)
    booking = services.book(user=researcher, protocol=protocol, tank=tank, animals=10,
                            needed_on=today - timedelta(days=8), today=today - timedelta(days=9))
    cohort = services.draw(user=researcher, booking=booking, at=timezone.now() - timedelta(days=8))
    study = services.create_study(user=researcher, code="camera", title="Camera study", protocol=protocol,
                                  conditions=["sham", "UV"], reference_condition="sham", replicates=2, method="block",
                                  seed=5, blinded=True)
    values = {"vessel": "dish", "animals": 10, "kind": Stimulus.UV, "wavelength_nm": 365, "irradiance_mw_cm2": 2,
              "duration_s": 10, "run_at": timezone.now() - timedelta(days=7)}
    services.claim_slot(user=researcher, study=study, slot=1)  # only the claimant records a slot
    return services.record_trial(user=researcher, study=study, slot=1, cohort=cohort, values=values).trial


def test_upload_shows_progress_then_the_proposal_is_accepted(page, live_server, trial, log_in):
    from playwright.sync_api import expect

    from experiments.models import ImageMeasurement

    log_in("rhea")
    page.goto(f"{live_server.url}{trial.get_absolute_url()}")
    page.get_by_label("Photos or video").set_input_files(
        [{"name": f"dish-{i}.png", "mimeType": "image/png", "buffer": png(ring(s))} for i, s in enumerate(SPREADS)])
    page.get_by_label("Seconds between frames").fill("60")
    page.get_by_role("button", name="Upload and measure").click()
    expect(page.locator(".msg-info")).to_contain_text("Measuring 6 frames in the background")
    # The page follows the worker and reloads with the result (a progress bar first, unless already done).
    expect(page.locator("figure.chart figcaption")).to_contain_text("dispersed at 180 s", timeout=60_000)
    assert ImageMeasurement.objects.get().status == ImageMeasurement.Status.DONE

    problems = _axe(page) + _overflow(page) if AXE.exists() else []  # the measurement section on a phone
    page.get_by_role("link", name="Score").click()
    expect(page.locator("#proposal")).to_contain_text("dispersed at 180 s")
    problems += _axe(page) + _overflow(page) if AXE.exists() else []
    assert not problems, "\n".join(problems)
    expect(page.get_by_label("Time to disperse", exact=False)).to_have_value("180.0")
    page.get_by_role("button", name="Save score").click()
    expect(page.locator(".msg-success")).to_contain_text(f"Score for {trial.code} saved")
    trial.refresh_from_db()
    assert trial.disperse_s == 180
    assert ImageMeasurement.objects.get().decision == ImageMeasurement.Decision.ACCEPTED
