"""Signing an issued period report (issue 12: "signing a period report"): the password re-entered, the
signature kept with the report, shown on its page and printed in its PDF, and refused once the records
no longer give the files that were issued (the signer would vouch for files they did not read)."""
import pytest
from django.urls import reverse

from colonies.models import Check, Signature
from colonies.signatures import digest
from experiments.models import PeriodReport
from tests.experiments.period_report_fixture import QUERY, at, build_facility, build_trials


@pytest.fixture
def issued(db, client, technician, manager, researcher):
    tank = build_facility(technician=technician, manager=manager, researcher=researcher)
    build_trials(tank=tank, researcher=researcher, manager=manager)
    client.force_login(manager)
    assert client.post(reverse("experiments:period-report-issue"), QUERY).status_code == 302
    return PeriodReport.objects.get()


def _sign(client, report, password):
    return client.post(reverse("experiments:period-report-sign", args=[report.pk]), {"password": password})


def test_a_wrong_password_signs_nothing(client, issued):
    response = _sign(client, issued, "not-my-password")
    assert response.status_code == 400
    assert "this is not the password of" in response.content.decode()
    assert not Signature.objects.exists()


def test_signing_keeps_name_time_meaning_and_the_manifest_and_shows_them(client, issued, manager):
    response = _sign(client, issued, "pw")  # tests/factories.make_user's password
    assert response.status_code == 302 and response.url == issued.get_absolute_url()
    [signature] = Signature.objects.all()
    assert (signature.signer, signature.meaning) == (manager, Signature.Meaning.REVIEWED)
    assert issued.manifest_sha256 in signature.content  # the signed text fixes every CSV's sum
    assert signature.content_sha256 == digest(issued.signed_content())
    page = client.get(issued.get_absolute_url()).content.decode()
    assert f"Signed by {signature.signer_name}" in page and "meaning: reviewed" in page
    assert "Sign as reviewed" not in page  # signed by this manager already; another manager may add theirs


def test_the_issued_pdf_prints_the_signature_and_the_issued_sum(client, issued, monkeypatch):
    _sign(client, issued, "pw")
    printed = {}
    import experiments.period_report_views as views
    original = views.render_to_string
    monkeypatch.setattr(views, "render_to_string", lambda *a, **k: printed.setdefault("html", original(*a, **k)))
    response = client.get(reverse("experiments:period-report-issued-pdf", args=[issued.pk]))
    assert response.status_code == 200 and response.content.startswith(b"%PDF")
    assert "meaning: reviewed" in printed["html"] and issued.manifest_sha256 in printed["html"]
    # The footer is a running element in HTML: a scope label's hyphens print as hyphens, not as escapejs's \u002D.
    assert '<div class="page-footer">Vermilog period report 2026-11-02 to 2026-11-08 · Whole facility</div>' \
        in printed["html"] and "u002D" not in printed["html"] and "can no longer be signed" not in printed["html"]


def test_after_a_late_entry_the_report_can_no_longer_be_signed_or_printed_as_issued(client, issued, technician):
    # A check of 7 November entered late: section 1a counts four pH readings now, so the manifest differs.
    first = Check.objects.get(observed_at=at(2, 9))
    Check.objects.create(tank=first.tank, recorded_by=technician, observed_at=at(7, 9), ph=7.2, temp_c=20.0)
    page = client.get(issued.get_absolute_url()).content.decode()
    assert "records have changed since this report was issued" in page and "Sign as reviewed" not in page
    assert _sign(client, issued, "pw").status_code == 409 and not Signature.objects.exists()
    assert client.get(reverse("experiments:period-report-issued-pdf", args=[issued.pk])).status_code == 409
