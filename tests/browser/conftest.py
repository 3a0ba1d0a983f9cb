"""Browser tests: Playwright's sync API driving Debian's Chromium against pytest-django's live_server.

Self-contained on purpose: the fixtures here make their own users, room, species and tanks, so they
do not depend on the persona fixtures of tests/conftest.py. live_server runs on a transactional
database that is flushed after each test, which also removes rows made by data migrations (the role
groups, the default species); hence get_or_create for the groups and a species of our own.

Playwright's own browser download cannot run here, so we launch the system Chromium
(VERMILOG_CHROMIUM, default /usr/bin/chromium). When it is missing the tests skip, or fail when
VERMILOG_REQUIRE_BROWSER=1 (CI sets it, so a broken install cannot pass as "skipped").
"""
import os
import re
from pathlib import Path

import pytest

CHROMIUM = os.environ.get("VERMILOG_CHROMIUM", "/usr/bin/chromium")
CHROMIUM_ARGS = ["--headless", "--no-sandbox", "--disable-gpu", "--disable-background-networking",
                 "--disable-component-update", "--disable-sync", "--no-first-run", "--disable-quic"]
ARTIFACTS = Path(__file__).resolve().parents[2] / "test-artifacts"
PASSWORD = "browser-test-pass-1"


def _unavailable(reason: str):
    if os.environ.get("VERMILOG_REQUIRE_BROWSER") == "1":
        pytest.fail(f"{reason} (VERMILOG_REQUIRE_BROWSER=1, so this is a failure, not a skip)", pytrace=False)
    pytest.skip(reason)


@pytest.hookimpl(wrapper=True)
def pytest_runtest_makereport(item, call):
    # Keep each phase's report on the test item, so the page fixture knows whether to save a screenshot.
    report = yield
    setattr(item, f"rep_{report.when}", report)
    return report


@pytest.fixture
def browser(transactional_db):
    """Chromium for one test. Started after and stopped before the database fixture, see below."""
    if not os.access(CHROMIUM, os.X_OK):
        _unavailable(f"Chromium not found at {CHROMIUM}; install Debian's 'chromium' package")
    try:
        from playwright.sync_api import sync_playwright
    except ImportError:
        _unavailable("the playwright package is not installed (pip install -r requirements-dev.txt)")
    # Playwright's sync API keeps an asyncio loop running in this thread, which makes Django's ORM
    # refuse to run here ("SynchronousOnlyOperation"). So: allow it only while the browser runs (the
    # ORM calls stay synchronous, one thread), and run the browser per test, inside transactional_db,
    # so that neither the loop nor the variable outlive the test (later tests, and Django's deploy
    # check, must not see them).
    previous = os.environ.get("DJANGO_ALLOW_ASYNC_UNSAFE")
    os.environ["DJANGO_ALLOW_ASYNC_UNSAFE"] = "true"
    playwright = sync_playwright().start()
    try:
        try:
            chromium = playwright.chromium.launch(executable_path=CHROMIUM, headless=True, args=CHROMIUM_ARGS)
        except Exception as error:  # a broken or incompatible Chromium: say so plainly
            _unavailable(f"Chromium at {CHROMIUM} did not start: {error}")
        yield chromium
        chromium.close()
    finally:
        playwright.stop()
        if previous is None:
            os.environ.pop("DJANGO_ALLOW_ASYNC_UNSAFE", None)
        else:
            os.environ["DJANGO_ALLOW_ASYNC_UNSAFE"] = previous


@pytest.fixture
def page(browser, request):
    """A fresh browser context (no cookies) at phone width; JavaScript errors fail the test."""
    context = browser.new_context(viewport={"width": 390, "height": 844})
    context.set_default_timeout(10_000)
    page = context.new_page()
    js_errors = []
    page.on("pageerror", lambda error: js_errors.append(str(error)))
    yield page
    failed = getattr(request.node, "rep_call", None) is not None and request.node.rep_call.failed
    if failed:
        ARTIFACTS.mkdir(exist_ok=True)
        name = re.sub(r"[^\w.-]+", "_", request.node.nodeid)
        page.screenshot(path=str(ARTIFACTS / f"{name}.png"), full_page=True)
    context.close()
    assert not js_errors, f"JavaScript errors on the page: {js_errors}"


@pytest.fixture
def bench(transactional_db):
    """One room ('bench-1') with three tanks of a species whose temperature target is 21-25 °C."""
    from django.contrib.auth.models import Group, User

    from colonies.models import CareTarget, Room, Species, Tank
    from colonies.roles import TECHNICIAN

    species = Species.objects.create(scientific_name="Testus vermiculus", common_name="Bench worm",
                                     habitat="freshwater")
    CareTarget.objects.create(species=species, parameter="temp_c", low=21.0, high=25.0, source="test")
    CareTarget.objects.create(species=species, parameter="ph", low=6.0, high=9.0, source="test")
    room = Room.objects.create(code="bench-1", name="Bench room")
    tanks = [Tank.objects.create(code=f"BT-0{i}", room=room, species=species, volume_l=2.0, position=f"shelf {i}")
             for i in (1, 2, 3)]
    tech = User.objects.create_user("tess", password=PASSWORD)
    tech.groups.add(Group.objects.get_or_create(name=TECHNICIAN)[0])
    return {"room": room, "tanks": {t.code: t for t in tanks}, "technician": tech}


@pytest.fixture
def log_in(page, live_server):
    """Sign in through the real login page, as a person would: log_in(username)."""
    from playwright.sync_api import expect

    def sign_in(username: str, password: str = PASSWORD) -> None:
        page.goto(f"{live_server.url}/accounts/login/")
        page.get_by_label("Username").fill(username)
        page.get_by_label("Password").fill(password)
        page.get_by_role("button", name="Sign in").click()
        expect(page.get_by_role("button", name="Sign out")).to_be_visible()

    return sign_in
