"""Browser: a manager produces a period report from Today, issues it, signs it with their password (a wrong
one first) and downloads the signed PDF and the ZIP; the PDF's first page renders with pdftoppm and the
ZIP's manifest sums hold."""
import hashlib
import io
import shutil
import subprocess
import zipfile

import pytest

pytestmark = pytest.mark.browser


def test_manager_issues_a_period_report_and_downloads_pdf_and_zip(page, live_server, bench, log_in, tmp_path):
    from django.contrib.auth.models import Group, User
    from playwright.sync_api import expect

    from colonies.roles import MANAGER
    from experiments.models import PeriodReport
    from tests.browser.conftest import PASSWORD
    from tests.experiments.period_report_fixture import build_facility, build_trials

    manager = User.objects.create_user("mona", password=PASSWORD)
    manager.groups.add(Group.objects.get_or_create(name=MANAGER)[0])
    tank = build_facility(technician=bench["technician"], manager=manager, researcher=manager, code="LV-R1")
    build_trials(tank=tank, researcher=manager, manager=manager)

    log_in("mona")
    page.goto(f"{live_server.url}/")
    page.get_by_role("link", name="period report").click()
    page.get_by_label("From").fill("2026-11-02")
    page.get_by_label("To (included)").fill("2026-11-08")
    page.get_by_role("button", name="Show").click()
    expect(page.locator("#section-3")).to_contain_text("0.4286")  # 3 deaths in 7,000 animal-days
    page.get_by_role("button", name="Issue this report").click()
    expect(page.locator("#signature")).to_be_visible()
    expect(page.get_by_text("byte-identical to those issued")).to_be_visible()
    issued = PeriodReport.objects.get()

    page.get_by_label("Your password").fill("wrong-password")
    page.get_by_role("button", name="Sign as reviewed").click()
    expect(page.locator("#signature")).to_contain_text("this is not the password of mona")
    page.get_by_label("Your password").fill(PASSWORD)
    page.get_by_role("button", name="Sign as reviewed").click()
    expect(page.locator("#signature")).to_contain_text("meaning: reviewed")

    with page.expect_download() as pdf_download:
        page.get_by_role("link", name="PDF with signatures").click()
    pdf = tmp_path / "report.pdf"
    pdf_download.value.save_as(pdf)
    assert pdf.read_bytes().startswith(b"%PDF")
    with page.expect_download() as zip_download:
        page.get_by_role("link", name="ZIP of CSVs").click()
    archive = zipfile.ZipFile(io.BytesIO(open(zip_download.value.path(), "rb").read()))
    manifest = archive.read("MANIFEST")
    assert hashlib.sha256(manifest).hexdigest() == issued.manifest_sha256
    for line in manifest.decode().splitlines():
        digest, name = line.split("  ")
        assert hashlib.sha256(archive.read(name)).hexdigest() == digest

    if shutil.which("pdftoppm") is None:
        pytest.skip("pdftoppm (poppler-utils) is not installed: the PDF's first page cannot be rendered here")
    subprocess.run(["pdftoppm", "-png", "-r", "30", "-f", "1", "-l", "1", str(pdf), str(tmp_path / "page")],
                   check=True, timeout=60)
    assert next(tmp_path.glob("page*.png")).read_bytes().startswith(b"\x89PNG")
