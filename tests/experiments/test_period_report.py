"""The period report: each section against values computed by hand on a small facility
(tests/experiments/period_report_fixture.py, the week of 2-8 November 2026, UTC), reproducible CSVs,
the ZIP's manifest, the PDF, access, query counts and blinding."""
import hashlib
import io
import shutil
import subprocess
import zipfile

import pytest
from django.urls import reverse
from scipy import stats

from experiments.models import PeriodReport, Trial
from experiments.period_report import queries, render
from tests.experiments.period_report_fixture import FIRST, LAST, QUERY, SECRET_LABELS, build_facility, build_trials

URL = reverse("experiments:period-report")


@pytest.fixture
def facility(db, technician, manager, researcher):
    tank = build_facility(technician=technician, manager=manager, researcher=researcher)
    build_trials(tank=tank, researcher=researcher, manager=manager)
    return tank


def _report(user, kind="facility", key=""):
    return queries.build(kind, key, queries.Period(FIRST, LAST), user)


def _rows(report, number, **match):
    return [r for r in report.section(number).rows if all(r[k] == v for k, v in match.items())]


def test_care_target_compliance_by_hand(facility, manager):
    report = _report(manager)
    [ph] = _rows(report, "1a", parameter="ph")
    # pH 7.0 (Mon 09:00), 8.5 flagged (Wed 09:00), 7.5 (Thu 09:00): 2 of 3 within = 66.7 %. The 8.5 holds
    # until Thursday 09:00: 24 h outside. Observed from Monday 09:00 to the period's end (Mon 9 Nov 00:00):
    # 6 x 24 + 15 = 159 h.
    assert (ph["checks_measured"], ph["within_target"], ph["share_within_pct"]) == (3, 2, 66.7)
    assert (ph["hours_outside"], ph["hours_observed"]) == (24.0, 159.0)
    [temp] = _rows(report, "1a", parameter="temp_c")
    assert (temp["share_within_pct"], temp["hours_outside"]) == (100.0, 0.0)


def test_missed_days_follow_the_measurement_plans(facility, manager):
    report = _report(manager)
    [temp] = _rows(report, "1b", parameter="temp_c")
    # Daily: due every day of the 7; read on 2, 4 and 5 November, so 3, 6, 7 and 8 are missed.
    assert (temp["days_due"], temp["days_missed"], temp["missed_on"]) == (7, 4, "2026-11-03 2026-11-06 2026-11-07 2026-11-08")
    [ph] = _rows(report, "1b", parameter="ph")
    # Weekly on Monday: due Mon 2 (read). Deviation on pH open at the start of Thu 5 (opened Wed 10:00,
    # closed Thu 10:00): due, read. Water change Fri 6 12:00 after the last reading: due Sat 7 and Sun 8,
    # not read: 4 due, 2 missed.
    assert (ph["days_due"], ph["days_missed"], ph["missed_on"]) == (4, 2, "2026-11-07 2026-11-08")


def test_deviations_by_rule_and_severity(facility, manager):
    report = _report(manager)
    [target] = _rows(report, "2a", rule="Reading outside care target")
    # Opened in the period: 3 Nov 08:00 (closed 14:00, 6 h), 4 Nov 10:00 (closed 5 Nov 10:00, 24 h), 7 Nov
    # (still open). Median of 6 and 24 = 15 h, max 24 h.
    assert (target["opened"], target["closed"], target["median_hours_to_close"], target["max_hours_to_close"],
            target["open_at_period_end"]) == (3, 2, 15.0, 24.0, 1)
    [missed] = _rows(report, "2a", rule="Daily check missed")
    # Opened 30 Oct 00:00, closed 3 Nov 12:00: 4.5 days = 108 h; opened before the period.
    assert (missed["severity"], missed["opened"], missed["closed"], missed["max_hours_to_close"]) == ("Major", 0, 1, 108.0)
    listed = report.section("2b").rows
    assert len(listed) == 4  # the feeding deviation of 20-21 October touches nothing in the period
    assert [r["open_at_period_end"] for r in listed].count(True) == 1
    assert "Partial water change" in [r["corrective_action"] for r in listed]


def test_mortality_per_1000_animal_days_with_exact_interval(facility, manager):
    [row] = _report(manager).section("3").rows
    # 1,000 animals held from the census of 25 October for 7 days: 7,000 animal-days. Deaths: 3 at a check
    # (the 4 removed on 6 November were voided). Rate 3 / 7000 x 1000 = 0.4286.
    assert (row["deaths"], row["animal_days"], row["per_1000_animal_days"]) == (3, 7000.0, 0.4286)
    # Exact 95 % limits for a count of 3: 0.619 and 8.77 (Garwood 1936; the values tabled e.g. in Ulm 1990,
    # Am J Epidemiol 131:373, Table 1; from memory), checked with scipy's chi-square quantiles.
    low, high = stats.chi2.ppf(0.025, 6) / 2, stats.chi2.ppf(0.975, 8) / 2
    assert round(low, 3) == 0.619 and round(high, 2) == 8.77
    assert row["lower_95"] == pytest.approx(low / 7, rel=1e-3)
    assert row["upper_95"] == pytest.approx(high / 7, rel=1e-3)


def test_animals_per_protocol_against_the_approved_number(facility, manager):
    [row] = _report(manager).section("4").rows
    # Cohorts of 5 (20 October) and 10 (3 November); a dish of 8 set up 3 November and exposed twice.
    assert (row["drawn_in_period"], row["used_in_period"], row["drawn_to_period_end"]) == (10, 8, 15)
    assert (row["approved_animals"], row["remaining"], row["share_of_approved_pct"], row["status"]) == (100, 85, 15.0, "within")


def test_animals_not_set_is_said(db, technician, manager, researcher):
    tank = build_facility(technician=technician, manager=manager, researcher=researcher)
    build_trials(tank=tank, researcher=researcher, manager=manager, max_total=None)
    [row] = _report(manager).section("4").rows
    assert (row["approved_animals"], row["status"], row["remaining"]) == (None, "not set", None)


def test_exposures_carry_running_totals_per_dish(facility, manager):
    report = _report(manager)
    first, second = report.section("5b").rows
    # 2 mW/cm² x 10 s = 20 mJ/cm² per exposure; 26 h between them (4 Nov 10:00 to 5 Nov 12:00).
    assert (first["exposure_number"], second["exposure_number"]) == (1, 2)
    assert (second["cumulative_dose_mj_cm2"], second["rest_h"], second["over_limit"]) == (40.0, 26.0, "")
    assert report.section("5a").rows == [{"dish": first["dish"], "protocol": first["protocol"], "exposures": 2,
                                          "over_limit": 0, "with_override": 0}]


def test_corrections_and_voids_with_who_when_why(facility, manager):
    rows = _report(manager).section("6").rows
    condition = Trial.objects.get(slot=1).condition  # the study is not blind: its reasons are shown
    assert [(r["when"], r["who"], r["action"], r["reason"]) for r in rows] == [
        ("2026-11-05 10:00", "tess", "corrected", "Thermometer misread"),
        ("2026-11-06 09:00", "rhea", "corrected", f"Outcome corrected: re-timed the {condition} dish from the video"),
        ("2026-11-07 09:00", "mona", "voided", "Voided: Entered on the wrong tank")]


def test_a_blind_trials_correction_shows_its_kind_not_its_reason(db, technician, manager, researcher):
    tank = build_facility(technician=technician, manager=manager, researcher=researcher)
    build_trials(tank=tank, researcher=researcher, manager=manager, blind=True)
    [row] = [r for r in _report(manager).section("6").rows if r["record"].startswith("Trial")]
    assert row["reason"] == "Outcome corrected: (hidden while the study is blinded)"
    [own] = [r for r in _report(researcher).section("6").rows if r["record"].startswith("Trial")]
    assert own["reason"].startswith("Outcome corrected: re-timed the ")  # the operator ran it: they may read it


def test_csvs_are_byte_identical_on_rerun_and_the_manifest_verifies(facility, manager, client):
    client.force_login(manager)
    first = client.get(reverse("experiments:period-report-zip"), QUERY)
    second = client.get(reverse("experiments:period-report-zip"), QUERY)
    assert first.status_code == 200 and first["Content-Type"] == "application/zip"
    assert first.content == second.content
    archive = zipfile.ZipFile(io.BytesIO(first.content))
    lines = archive.read("MANIFEST").decode().splitlines()
    assert len(lines) == 9
    for line in lines:
        digest, name = line.split("  ")
        assert hashlib.sha256(archive.read(name)).hexdigest() == digest  # hashlib: the reference SHA-256
    assert archive.read("3-mortality.csv").decode().splitlines()[1] == "LV-R1,3,7000,0.4286,0.08838,1.252"


def test_issuing_stores_the_manifest_sum_and_the_page_compares_it(facility, manager, client):
    client.force_login(manager)
    response = client.post(reverse("experiments:period-report-issue"), QUERY)
    issued = PeriodReport.objects.get()
    assert response.status_code == 302 and response.url == issued.get_absolute_url()
    _, text = render.zip_bytes(_report(manager).sections)
    assert issued.manifest == text and issued.manifest_sha256 == hashlib.sha256(text.encode()).hexdigest()
    page = client.get(issued.get_absolute_url())
    assert b"byte-identical to those issued" in page.content and b'id="signature"' in page.content


def test_pdf_starts_with_pdf_and_its_first_page_renders(facility, manager, client, tmp_path):
    client.force_login(manager)
    response = client.get(reverse("experiments:period-report-pdf"), QUERY)
    assert response.status_code == 200 and response.content.startswith(b"%PDF")
    if shutil.which("pdftoppm") is None:
        pytest.skip("pdftoppm (poppler-utils) is not installed: the PDF's first page cannot be rendered here")
    (tmp_path / "r.pdf").write_bytes(response.content)
    subprocess.run(["pdftoppm", "-png", "-r", "30", "-f", "1", "-l", "1", str(tmp_path / "r.pdf"), str(tmp_path / "p")],
                   check=True, timeout=60)
    [png] = list(tmp_path.glob("p*.png"))
    assert png.read_bytes().startswith(b"\x89PNG")


@pytest.mark.parametrize("name", ["experiments:period-report", "experiments:period-report-zip"])
def test_roles(db, client, technician, researcher, manager, name):
    url = reverse(name)
    assert client.get(url, QUERY).status_code == 302  # anonymous: to the login page
    for user in (technician, researcher):
        client.force_login(user)
        assert client.get(url, QUERY).status_code == 403
    client.force_login(manager)
    assert client.get(url, QUERY).status_code == 200


def test_issue_roles_and_methods(db, client, technician, researcher, manager):
    issue = reverse("experiments:period-report-issue")
    assert client.post(issue, QUERY).status_code == 302 and not PeriodReport.objects.exists()
    client.force_login(researcher)
    assert client.post(issue, QUERY).status_code == 403
    client.force_login(manager)
    assert client.get(issue).status_code == 405
    assert client.post(URL, QUERY).status_code == 405
    assert client.post(reverse("experiments:period-report-pdf"), QUERY).status_code == 405


def test_bad_period_names_the_field_and_saves_nothing(db, client, manager):
    client.force_login(manager)
    response = client.get(URL, {**QUERY, "period_to": "2026-10-01"})
    assert response.status_code == 400 and b"To: 2026-10-01 is outside the allowed range" in response.content
    response = client.post(reverse("experiments:period-report-issue"), {**QUERY, "scope": "study"})
    assert response.status_code == 400 and b"Study: choose one" in response.content
    assert not PeriodReport.objects.exists()


def test_scopes_room_protocol_study(facility, manager):
    protocol_ref = _report(manager).section("4").rows[0]["protocol"]
    by_protocol = _report(manager, "protocol", protocol_ref)
    assert len(by_protocol.section("5b").rows) == 2 and _rows(by_protocol, "1a", parameter="ph")
    study = by_protocol.section("5b").rows[0]["study"]
    assert len(_report(manager, "study", study).section("5b").rows) == 2
    room = str(facility.room_id)
    assert len(_report(manager, "room", room).section("3").rows) == 1
    with pytest.raises(LookupError, match="Study: 'nope'"):
        _report(manager, "study", "nope")


def test_query_count_does_not_grow_with_the_data(db, client, technician, manager, researcher,
                                                 django_assert_max_num_queries):
    client.force_login(manager)
    small = build_facility(technician=technician, manager=manager, researcher=researcher, code="LV-S1")
    build_trials(tank=small, researcher=researcher, manager=manager)
    with django_assert_max_num_queries(40) as small_run:
        assert client.get(URL, QUERY).status_code == 200
    big = build_facility(technician=technician, manager=manager, researcher=researcher, code="LV-B1", extra_tanks=6)
    build_trials(tank=big, researcher=researcher, manager=manager)
    with django_assert_max_num_queries(len(small_run.captured_queries)):
        assert client.get(URL, QUERY).status_code == 200


def test_a_blind_studys_conditions_appear_nowhere_for_a_manager(db, client, technician, manager, researcher):
    tank = build_facility(technician=technician, manager=manager, researcher=researcher)
    build_trials(tank=tank, researcher=researcher, manager=manager, blind=True)
    client.force_login(manager)
    page = client.get(URL, QUERY).content.decode()
    archive = zipfile.ZipFile(io.BytesIO(client.get(reverse("experiments:period-report-zip"), QUERY).content))
    csvs = "".join(archive.read(n).decode() for n in archive.namelist())
    pdf_html = _print_html(client)
    assert "blinded: code" in page and "blinded: code" in csvs
    for text in (page, csvs, pdf_html):
        for label in SECRET_LABELS:
            assert label not in text
        assert "365 nm" not in text and "Ultraviolet" not in text  # the stimulus and its settings


def _print_html(client):
    """The HTML the PDF is made from (the PDF compresses its text, so the search reads its source)."""
    from django.template import loader

    captured = {}
    original = loader.render_to_string

    def spy(*args, **kwargs):
        captured["html"] = original(*args, **kwargs)
        return captured["html"]

    import experiments.period_report_views as views
    views.render_to_string, saved = spy, views.render_to_string
    try:
        assert client.get(reverse("experiments:period-report-pdf"), QUERY).status_code == 200
    finally:
        views.render_to_string = saved
    return captured["html"]


def test_the_protocol_page_refuses_an_impossible_approved_number_of_animals(client, manager):
    from django.db import IntegrityError, transaction

    from experiments.models import Protocol
    from tests.experiments import protocol_posts
    from tests.experiments.builders import make_protocol

    client.force_login(manager)
    data = protocol_posts.new_protocol(reference="AWB-N", max_animals_total=0)
    response = client.post(reverse("experiments:protocol-new"), data)
    assert response.status_code == 400 and "allowed range 1–100000" in response.content.decode()
    assert not Protocol.objects.filter(reference="AWB-N").exists()
    with pytest.raises(IntegrityError), transaction.atomic():  # the database refuses it too
        make_protocol(max_animals_total=200000)


def test_the_pdf_names_the_manifest_sum_of_the_zip(facility, manager, client):
    client.force_login(manager)
    archive = zipfile.ZipFile(io.BytesIO(client.get(reverse("experiments:period-report-zip"), QUERY).content))
    assert hashlib.sha256(archive.read("MANIFEST")).hexdigest() in _print_html(client)


def test_a_study_report_adds_its_validity_checks_as_the_study_page_judges_them(facility, manager):
    from experiments.methods_records import validity_for
    from experiments.models import Study

    protocol_ref = _report(manager).section("4").rows[0]["protocol"]
    code = _report(manager, "protocol", protocol_ref).section("5b").rows[0]["study"]
    study = Study.objects.get(code=code)
    study.validity_criteria = [{"kind": "ph_band", "low": 6.0, "high": 8.0}]
    study.save()
    [row] = _report(manager, "study", code).section("7").rows
    [expected] = validity_for(study, list(study.trials.select_related("cohort__origin_tank")))
    assert row == {"criterion": expected.label, "requirement": expected.requirement, "result": expected.status,
                   "evidence": expected.evidence, "modelled_on": expected.guideline}
    assert row["result"] in ("met", "not met", "cannot tell")
    # Other scopes have no section 7 (validity is a study's own).
    assert [s.number for s in _report(manager).sections][-1] == "6"
