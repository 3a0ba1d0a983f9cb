"""Every CSV and XLSX export defuses free text that a spreadsheet would run as a formula.

Records carry text starting with =, +, -, @, tab and CR (OWASP, "CSV Injection"); each export URL is
fetched and no text cell may start with one of those characters unless it is a plain number.
A new export URL must be added to EXPORTS (test_every_export_url_is_listed checks the URL names).
"""
import csv
import io
from datetime import timedelta

import openpyxl
import pytest
from django.urls import get_resolver, reverse
from django.utils import timezone

from colonies import services as colony_services
from colonies.exports import FORMULA_START
from colonies.models import Deviation, Feeding
from experiments import services
from experiments.models import ImageMeasurement
from tests.experiments.builders import days_ago, make_cohort, make_protocol, make_study, record
from tests.factories import make_check, make_species, make_tank

MARK = "HARDEN"
PAYLOADS = [f"{c}{MARK} {i}" for i, c in enumerate(("=", "+", "-", "@", "\t", "\r"))]
CONDITIONS = ["=HARDEN sham", "+HARDEN low", "-HARDEN mid", "@HARDEN high"]


@pytest.fixture
def world(technician, researcher, manager):
    species = make_species(scientific_name="=HARDEN species", targets={"temp_c": (20.0, 24.0)})
    tank = make_tank(species=species, code="LV-X1")
    now = timezone.now()
    for i, text in enumerate(PAYLOADS):
        make_check(tank, user=technician, observed_at=now - timedelta(hours=i + 1), temp_c=26.0, note=text,
                   corrective_action=PAYLOADS[-1 - i])
        colony_services.record_feeding(user=technician, feeding=Feeding(
            tank=tank, food=text, amount=1.0, observed_at=now - timedelta(hours=i + 1), recorded_by=technician))
    deviation = Deviation.objects.filter(tank=tank).first()
    deviation.close(user=technician, corrective_action="+HARDEN replaced the heater", password="pw")

    protocol = make_protocol(max_exposures_per_group=3)
    study = make_study(user=researcher, protocol=protocol, conditions=CONDITIONS, replicates=2, code="safe-study")
    cohorts = [make_cohort(user=researcher, protocol=protocol, at=days_ago(12)) for _ in range(3)]
    irradiance = {c: x for c, x in zip(CONDITIONS, (0.5, 1.0, 2.0, 4.0))}
    for n, entry in enumerate(study.allocation):
        cohort = cohorts[n // 3]
        record(study, cohort, researcher, slot=entry["slot"], at=days_ago(10 - n % 3),
               irradiance=irradiance[entry["condition"]], disperse_s=60.0 + 30 * n, note=PAYLOADS[n % len(PAYLOADS)])
    first = study.trials.order_by("slot").first()
    services.exclude_trial(user=researcher, trial=first, reason="-HARDEN clump never formed")
    extra = make_study(user=researcher, protocol=protocol, code="override-study")
    record(extra, cohorts[0], manager, at=days_ago(6), override_reason="@HARDEN replacement dish")
    ImageMeasurement.objects.create(
        trial=first, source="photos", sha256="0" * 64, threshold=0.5, window_s=600, frames_total=1, frames_done=1,
        status="done", censored=True, requested_by=researcher, finished_at=timezone.now(),
        frames=[{"t_s": 0.0, "clusters": 1, "largest_fraction": 1.0, "worm_area_px": 400, "largest_area_px": 400,
                 "worm_area_mm2": None, "contrast_threshold": 0.3}])
    return tank, study


EXPORTS = {  # URL name -> (arguments, query, must the export carry user text?)
    "colonies:checks-csv": ((), "", True),
    "colonies:checks-xlsx": ((), "", True),
    "colonies:deviation-csv": ((), "", True),
    "colonies:tank-plot-csv": (("LV-X1",), "", True),
    "colonies:health-overview-csv": ((), "", True),
    "experiments:study-csv": (("safe-study",), "", True),
    "experiments:study-chart-csv": (("safe-study", "km"), "", True),
    "experiments:study-chart-csv#dose": (("safe-study", "dose"), "", False),  # numbers and the fit method only
    "experiments:ledger-csv": ((), "", True),
    # numbers only; the arguments are read once the world exists
    "experiments:measurement-csv": (lambda: (ImageMeasurement.objects.get().pk,), "", False),
}


def _cells(response) -> list[str]:
    body = b"".join(response.streaming_content) if response.streaming else response.content
    if response["Content-Type"].startswith("application/vnd.openxmlformats"):
        book = openpyxl.load_workbook(io.BytesIO(body))
        cells = [c for sheet in book for row in sheet.iter_rows() for c in row]
        assert not [c.coordinate for c in cells if c.data_type == "f"], "a cell was written as a formula"
        return [c.value for c in cells if isinstance(c.value, str)]
    return [cell for row in csv.reader(io.StringIO(body.decode("utf-8"))) for cell in row]


def _is_number(text: str) -> bool:
    try:
        float(text)
    except ValueError:
        return False
    return True


@pytest.mark.parametrize("key", EXPORTS)
def test_every_export_defuses_formula_text(client, manager, world, key):
    args, query, carries_text = EXPORTS[key]
    args = args() if callable(args) else args
    client.force_login(manager)
    response = client.get(reverse(key.split("#")[0], args=args) + query)
    assert response.status_code == 200, key
    cells = _cells(response)
    dangerous = [c for c in cells if c.startswith(FORMULA_START) and not _is_number(c)]
    assert dangerous == []
    if carries_text:
        marked = [c for c in cells if MARK in c]
        assert marked, f"{key}: the test text never reached the export"
        assert all(c.startswith("'") or c.index(MARK) > 0 and not c.startswith(FORMULA_START) for c in marked)


def test_every_export_url_is_listed():
    names = set()
    for app in ("colonies", "experiments"):
        resolver = get_resolver().namespace_dict[app][1]
        for name, patterns in resolver.reverse_dict.items():
            if isinstance(name, str) and any(str(p[0][0][0]).endswith((".csv", ".xlsx")) for p in [patterns]):
                names.add(f"{app}:{name}")
    assert names == {k.split("#")[0] for k in EXPORTS}
