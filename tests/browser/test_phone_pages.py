"""The main pages at phone width (390 px) and desktop width, as each role that uses them, on the demo data.

Two checks per page:
- nothing scrolls sideways at 390 px: not the page (document.scrollingElement.scrollWidth <= innerWidth)
  and not a table inside its scroll box (tables turn into stacked rows on a phone instead);
- inputs have 16 px text and checkboxes are 24 px at 390 px;
- the deviation register and the exposure ledger print every column on A4, without navigation;
- axe-core (read from node_modules/axe-core/axe.min.js, installed by `npm ci` from the project's
  package-lock.json, injected with Playwright's add_script_tag) finds no serious or critical violation,
  at both widths.

One test walks all the pages (the demo is loaded once; the machine is small); problems are collected
and reported together, so one run names every page that needs work.
"""
from datetime import date, timedelta
from pathlib import Path

import pytest

from tests.browser.conftest import _unavailable

pytestmark = pytest.mark.browser

AXE = Path(__file__).resolve().parents[2] / "node_modules" / "axe-core" / "axe.min.js"
PHONE = {"width": 390, "height": 844}
DESKTOP = {"width": 1280, "height": 900}
BLOCKING = ("serious", "critical")
DEMO_DAYS = 30  # enough for every kind of record the pages show; the full 120 days take longer to load


@pytest.fixture
def demo_lab(transactional_db, monkeypatch):
    """The invented demo facility (colonies.demo), shortened; returns the ids the pages need."""
    from django.core.management import call_command

    from colonies import demo
    from colonies.models import Check, Deviation, Species
    from experiments.models import Cohort, Protocol, Study

    monkeypatch.setattr(demo, "DAYS", DEMO_DAYS)
    call_command("load_demo", "--seed", "7", stdout=open("/dev/null", "w"))
    # A flagged check if the shortened demo has one (its readings follow the measurement plans), else the newest.
    flagged = (Check.objects.exclude(flags={}).order_by("-observed_at").first()
               or Check.objects.order_by("-observed_at").first())
    unblinded = Study.objects.filter(blinded=False).order_by("code").first() or Study.objects.order_by("code").first()
    # the unblinded UV study: its analysis (Kaplan-Meier, log-rank, dose-response with the links table)
    analysed = Study.objects.filter(unblinded_at__isnull=False).order_by("code").first() or unblinded
    blind = Study.objects.filter(blinded=True, unblinded_at__isnull=True).order_by("code").first() or analysed
    return {"check": flagged.pk, "study": unblinded.code, "analysed": analysed.code, "blind": blind.code, "deviation": Deviation.objects.order_by("pk").first().pk,
            "species": Species.objects.order_by("pk").first().pk,
            # a cohort still in use: its dishes table and the set-up and end forms
            "cohort": Cohort.objects.filter(end="", dishes__isnull=False).order_by("pk").first().pk,
            # a signed protocol: signature block, versions, the suspend form
            "protocol": Protocol.objects.filter(signatures__isnull=False).order_by("pk").first().pk,
            "closed_deviation": Deviation.objects.filter(status="closed").order_by("pk").first().pk}


def _pages(ids: dict) -> dict[str, list[tuple[str, str, bool]]]:
    """Per demo user: (name, path, checked for overflow at 390 px). `None` path = booking suggestions."""
    return {
        None: [("login", "/accounts/login/", True)],
        "tamsin": [  # technician
            ("Today", "/", True), ("tank list", "/tanks/", True), ("tank page", "/tanks/LV-03/", True),
            ("check detail", f"/checks/{ids['check']}/", True), ("species list", "/species/", True),
            ("species page", f"/species/{ids['species']}/", True), ("deviation", f"/deviations/{ids['deviation']}/", True),
            ("colony health", "/health/", True), ("tank health", "/tanks/LV-03/health/", True),
            ("tank history", "/tanks/LV-03/history/", True),
        ],
        "ravi": [  # researcher
            ("tank page (researcher)", "/tanks/LV-03/", True), ("trials list", "/experiments/", True),
            ("study page", f"/experiments/studies/{ids['study']}/", True),
            ("study page (analysis)", f"/experiments/studies/{ids['analysed']}/", True),
            ("study page (blind, validity form)", f"/experiments/studies/{ids['blind']}/", True),
            ("methods draft (blind)", f"/experiments/studies/{ids['blind']}/methods/", True),
            ("methods draft", f"/experiments/studies/{ids['analysed']}/methods/", True),
            ("cohort page", f"/experiments/cohorts/{ids['cohort']}/", True),
            ("cohort history", f"/experiments/cohorts/{ids['cohort']}/history/", True),
            ("booking suggestions", None, True), ("booking calendar", "/experiments/bookings/calendar/", True),
            ("protocol list", "/experiments/protocols/", True),
        ],
        "morwen": [  # manager
            ("deviation register", "/deviations/", True), ("exposure ledger", "/experiments/ledger/", True),
            ("period report", f"/experiments/reports/period/?period_from={date.today() - timedelta(days=29)}"
                              f"&period_to={date.today()}&scope=facility", True),
            ("care profile form", f"/species/{ids['species']}/edit/", True),
            ("protocol page", f"/experiments/protocols/{ids['protocol']}/", True),
            ("protocol amend", f"/experiments/protocols/{ids['protocol']}/amend/", True),
            ("signed deviation", f"/deviations/{ids['closed_deviation']}/", True),
        ],
    }


def _sign_in(page, base: str, username: str) -> None:
    from playwright.sync_api import expect

    from colonies.demo import DEMO_PASSWORD

    page.goto(f"{base}/accounts/login/")
    page.get_by_label("Username").fill(username)
    page.get_by_label("Password").fill(DEMO_PASSWORD)
    page.get_by_role("button", name="Sign in").click()
    expect(page.get_by_role("button", name="Sign out")).to_be_visible()


def _open(page, base: str, path: str | None) -> None:
    if path is not None:
        response = page.goto(base + path)
        assert response.status == 200, f"{path}: HTTP {response.status}"
        return
    # Booking suggestions are the answer to a POST: fill the form as a researcher would.
    page.goto(f"{base}/experiments/bookings/new/")
    page.get_by_label("Protocol").select_option(index=1)
    page.get_by_label("Species").select_option(label="Lumbriculus variegatus (California blackworm)")
    page.get_by_label("Animals", exact=False).first.fill("10")
    page.get_by_role("button", name="Suggest tanks").click()
    page.get_by_role("button", name="Book from LV-01").wait_for()
    page.wait_for_load_state("load")  # the stylesheet too, before anything is measured


def _overflow(page) -> list[str]:
    """What scrolls sideways: the page itself, or any table in its scroll box."""
    return page.evaluate("""() => {
        const out = [];
        const doc = document.scrollingElement;
        if (doc.scrollWidth > innerWidth) out.push(`page is ${doc.scrollWidth}px wide for ${innerWidth}px`);
        for (const box of document.querySelectorAll('.table-scroll')) {
            if (box.scrollWidth > box.clientWidth + 1) {
                const head = box.querySelector('th, td');
                out.push(`table scrolls (${box.scrollWidth}px in ${box.clientWidth}px), first cell "${head ? head.textContent.trim().slice(0, 30) : ''}"`);
            }
        }
        return out;
    }""")


def _small_controls(page) -> list[str]:
    """Inputs under 16 px text (a phone zooms into them on focus) and boxes under 24 px (WCAG 2.5.8)."""
    return page.evaluate("""() => {
        const out = [];
        for (const el of document.querySelectorAll('input, select, textarea')) {
            const box = el.getBoundingClientRect();
            if (el.type === 'hidden' || box.width === 0) continue;
            const name = `${el.tagName.toLowerCase()} ${el.name || el.id}`;
            if (el.type === 'checkbox' || el.type === 'radio') {
                if (box.width < 24 || box.height < 24) out.push(`${name} is ${box.width}x${box.height} px`);
            } else if (parseFloat(getComputedStyle(el).fontSize) < 16) {
                out.push(`${name} has ${getComputedStyle(el).fontSize} text`);
            }
        }
        return out;
    }""")


# Printable pages: the width of an A4 page's printed area at 96 px to the inch (vermilog.css @page margins).
PRINTED = {"deviation register": {"width": 718, "height": 1000},  # portrait: 210 - 2 x 10 mm
           "exposure ledger": {"width": 1047, "height": 700}}  # landscape: 297 - 2 x 10 mm


def _printed(page, size: dict) -> list[str]:
    """As printed on A4: no navigation or filter form, every column of every table on the page."""
    page.set_viewport_size(size)
    page.emulate_media(media="print")
    try:
        return page.evaluate("""() => {
            const out = [];
            for (const sel of ['.topbar', 'form.toolbar', '.foot']) {
                const el = document.querySelector(sel);
                if (el && el.getClientRects().length) out.push(`${sel} is printed`);
            }
            for (const th of document.querySelectorAll('table.data th')) {
                if (!th.getClientRects().length) out.push(`column "${th.textContent.trim()}" is not printed`);
                else if (th.getBoundingClientRect().right > innerWidth + 1) out.push(`column "${th.textContent.trim()}" is off the page`);
            }
            return out;
        }""")
    finally:
        page.emulate_media(media="screen")


def _axe(page) -> list[str]:
    page.add_script_tag(path=str(AXE))
    violations = page.evaluate("async () => (await axe.run(document, {resultTypes: ['violations']})).violations")
    return [f"{v['impact']} {v['id']}: {v['help']} -> " + "; ".join(" ".join(n["target"]) for n in v["nodes"][:4])
            for v in violations if v["impact"] in BLOCKING]


def _walk(browser, base: str, pages: dict, errors: list) -> list[str]:
    problems = []
    for user, entries in pages.items():
        context = browser.new_context(viewport=PHONE)
        context.set_default_timeout(15_000)
        page = context.new_page()
        page.on("pageerror", lambda error: errors.append(str(error)))
        if user:
            _sign_in(page, base, user)
        for name, path, check_overflow in entries:
            for size in (PHONE, DESKTOP):
                page.set_viewport_size(size)
                _open(page, base, path)
                where = f"{name} as {user or 'anonymous'} at {size['width']} px"
                if size is PHONE and check_overflow:
                    problems += [f"{where}: {p}" for p in _overflow(page)]
                if size is PHONE:
                    problems += [f"{where}: {p}" for p in _small_controls(page)]
                problems += [f"{where}: {p}" for p in _axe(page)]
                if size is DESKTOP and name in PRINTED:
                    problems += [f"{name} printed: {p}" for p in _printed(page, PRINTED[name])]
        context.close()
    return problems


def test_main_pages_fit_a_phone_and_pass_axe_for_each_role(browser, live_server, demo_lab):
    if not AXE.exists():
        _unavailable(f"axe-core not found at {AXE}: run `npm ci` in the project folder")
    errors = []
    problems = _walk(browser, live_server.url, _pages(demo_lab), errors)
    assert not errors, f"JavaScript errors: {errors}"
    assert not problems, "\n".join(problems)


def test_round_fits_a_phone_and_passes_axe(browser, live_server, demo_lab):
    if not AXE.exists():
        _unavailable(f"axe-core not found at {AXE}: run `npm ci` in the project folder")
    errors = []
    problems = _walk(browser, live_server.url, {"tamsin": [("round", "/round/fw-1/", True)]}, errors)
    assert not errors, f"JavaScript errors: {errors}"
    assert not problems, "\n".join(problems)


def test_a_time_input_says_what_was_picked_the_labs_way_and_in_which_zone(page, live_server, bench, log_in):
    from django.conf import settings
    from playwright.sync_api import expect

    log_in("tess")
    page.goto(f"{live_server.url}/tanks/BT-01/")
    split_at = page.get_by_label("Split at")
    hint = page.locator(".split-form .lab-date")
    expect(hint).to_have_text(f"Lab time: {settings.TIME_ZONE}")  # before anything is picked

    split_at.fill("2026-03-05T14:30")  # the browser shows it in its own locale (03/05/2026, 02:30 PM here)

    expect(hint).to_have_text(f"= 05 Mar 2026 14:30 ({settings.TIME_ZONE})")
    expect(split_at).to_have_accessible_description(f"Leave empty for now. = 05 Mar 2026 14:30 ({settings.TIME_ZONE})")
