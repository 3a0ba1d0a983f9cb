"""Screenshots of the main pages at phone and desktop width, for looking at, not for testing.

Starts nothing itself: point it at a running Vermilog with the demo data loaded, e.g.

    DATABASE_URL=sqlite:////tmp/vermilog-demo.sqlite3 .venv/bin/python manage.py demo --addrport 127.0.0.1:8011 &
    .venv/bin/python scripts/screenshots.py http://127.0.0.1:8011

It signs in as the demo user of each role and writes PNGs of the pages that role uses to
./screenshots/ (gitignored). It also types one out-of-range temperature into the first row of the
round, so the live flag shows, and prints a warning for any page that scrolls sideways.
"""
import argparse
import itertools
import os
from pathlib import Path

from playwright.sync_api import expect, sync_playwright

CHROMIUM_ARGS = ["--headless", "--no-sandbox", "--disable-gpu", "--disable-background-networking",
                 "--disable-component-update", "--disable-sync", "--no-first-run", "--disable-quic"]
WIDTHS = {"phone": (390, 844), "desktop": (1280, 900)}
PAGES = {  # demo user: [(file stem, path)]
    "tamsin": [("today", "/"), ("round-fw-1", "/round/fw-1/"), ("round-all", "/round/"), ("tanks", "/tanks/"),
               ("tank-LV-03", "/tanks/LV-03/"), ("tank-LV-03-health", "/tanks/LV-03/health/"),
               ("feeding-fw-1", "/husbandry/feeding/?room=fw-1"), ("water-changes-due", "/husbandry/water-change/?due=1"),
               ("dead-removed-pl-1", "/husbandry/dead-removed/?room=pl-1"),
               ("colony-health", "/health/"), ("species", "/species/"), ("tank-LV-03-history", "/tanks/LV-03/history/")],
    "ravi": [("tank-LV-03-researcher", "/tanks/LV-03/"), ("trials", "/experiments/"),
             ("study", "/experiments/studies/uv-dispersal-01/"), ("calendar", "/experiments/bookings/calendar/")],
    "morwen": [("deviations", "/deviations/"), ("ledger", "/experiments/ledger/"), ("species-1", "/species/1/")],
}


def sign_in(page, base: str, username: str, password: str) -> None:
    page.goto(f"{base}/accounts/login/")
    page.get_by_label("Username").fill(username)
    page.get_by_label("Password").fill(password)
    page.get_by_role("button", name="Sign in").click()
    expect(page.get_by_role("button", name="Sign out")).to_be_visible()


def shoot(page, out: Path, stem: str) -> None:
    path = out / f"{stem}.png"
    page.screenshot(path=str(path), full_page=True)
    overflow = page.evaluate("document.documentElement.scrollWidth - document.documentElement.clientWidth")
    note = f"  WARNING: scrolls sideways by {overflow}px" if overflow > 0 else ""
    print(f"{path}{note}")


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("base_url", nargs="?", default="http://127.0.0.1:8000")
    parser.add_argument("--out", default="screenshots", type=Path)
    parser.add_argument("--password", default="worms-demo-2026")
    parser.add_argument("--chromium", default=os.environ.get("VERMILOG_CHROMIUM", "/usr/bin/chromium"))
    args = parser.parse_args()
    base = args.base_url.rstrip("/")
    args.out.mkdir(parents=True, exist_ok=True)

    with sync_playwright() as p:
        browser = p.chromium.launch(executable_path=args.chromium, headless=True, args=CHROMIUM_ARGS)
        for (label, (width, height)), (username, pages) in itertools.product(WIDTHS.items(), PAGES.items()):
            context = browser.new_context(viewport={"width": width, "height": height})
            page = context.new_page()
            sign_in(page, base, username, args.password)
            for stem, path in pages:
                page.goto(base + path)
                page.evaluate("document.querySelectorAll('img[loading=lazy]').forEach(i => i.loading = 'eager')")
                page.wait_for_load_state("networkidle")
                shoot(page, args.out, f"{stem}-{label}")
            if label == "phone" and username == "tamsin":
                page.goto(f"{base}/round/fw-1/")
                row = page.locator("fieldset.tankrow").first
                cell = row.locator(".reading-cell:has(input[data-param='temp_c'])")
                if not cell.is_visible():  # measured today already: it is under "Other readings"
                    row.locator("details.more summary").click()
                cell.locator("input").press_sequentially("27.5")
                expect(cell.locator(".live")).not_to_be_empty()
                shoot(page, args.out, "round-fw-1-phone-flagged")
                page.add_style_tag(content=".savebar { position: static; }")  # else it covers the row's foot
                row.screenshot(path=str(args.out / "round-fw-1-phone-flagged-row.png"))
                print(args.out / "round-fw-1-phone-flagged-row.png")
            context.close()
        browser.close()


if __name__ == "__main__":
    main()
