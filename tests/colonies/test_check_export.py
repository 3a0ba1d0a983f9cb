"""The checks export (colonies/check_export.py): the chunked, column-at-a-time rows equal a plain recomputation
check by check, byte for byte, in the CSV and cell for cell in the XLSX."""
import csv
import io
from datetime import datetime, timedelta, timezone as dt_timezone

import pytest
from django.urls import reverse
from openpyxl import load_workbook
from openpyxl.utils.escape import unescape

from colonies import check_export, derived, parameters
from colonies.exports import spreadsheet_safe
from colonies.models import Check
from tests.factories import make_check, make_room, make_species, make_tank, make_user

T0 = datetime(2025, 3, 1, 9, 0, tzinfo=dt_timezone.utc)


@pytest.fixture
def facility(technician):
    """Fresh-water and marine tanks with the cases an export must get right."""
    odd = make_user("@odd-tech")
    fresh = make_tank(code="FW-01", room=make_room(code="=fw"),
                      species=make_species(targets={"temp_c": (20.0, 24.0), "do_pct_sat": (60.0, None)}))
    marine = make_tank(code="-MA-01", room=make_room(code="mar-1"), species=make_species(habitat=parameters.MARINE))
    rows = [
        (fresh, technician, dict(temp_c=21.5, ph=7.25, do_mg_l=7.9, tan_mg_l=0.4, no2_mg_l=0.012, no3_mg_l=4.5,
                                 conductivity_us_cm=420.0, hardness_mg_l=150.0, activity="normal", clarity="clear")),
        (fresh, technician, dict(temp_c=26.0, do_mg_l=3.1, note="+ heater stuck", corrective_action="=HYPERLINK(1)",
                                 dead_removed=4, clumping=True, surface_film=True, odour="slight")),  # flagged
        (fresh, odd, dict(ph=7.0, tan_mg_l=0.2)),  # no temperature: no derived value at all
        (fresh, technician, dict(temp_c=45.0, do_mg_l=5.0, ph=7.5, tan_mg_l=1.0, conductivity_us_cm=500.0)),  # past 40 °C
        (fresh, technician, dict(temp_c=-2.0, ph=7.5, tan_mg_l=1.0, do_mg_l=12.0, note='quote " and, comma\r\nnext')),
        (marine, technician, dict(temp_c=18.0, salinity=33.0, do_mg_l=6.5, conductivity_us_cm=45000.0, ph=8.1,
                                  tan_mg_l=0.05)),
        (marine, technician, dict(temp_c=18.0, do_mg_l=6.5, conductivity_us_cm=900.0)),  # no salinity; PSS-78 < 2
        (marine, odd, dict(temp_c=22.0, salinity=30.0, note="-3 dead", activity="reduced")),
    ]
    checks = []
    for i, (tank, user, values) in enumerate(rows):
        at = T0 + timedelta(hours=i, microseconds=123456 if i % 3 == 0 else 0)
        checks.append(make_check(tank, user=user, observed_at=at, **values))
    checks[0].void(user=technician, reason="@entered on the wrong tank")
    checks[4].void(user=technician, reason="meter not calibrated")
    return checks


def _reference_csv(queryset) -> str:
    """The export computed the plain way: one Check instance at a time, derived values from Check.derived()."""
    buffer = io.StringIO()
    writer = csv.writer(buffer)
    writer.writerow(check_export.header())
    for c in queryset.select_related("tank__room", "tank__species", "recorded_by").order_by("observed_at", "pk"):
        values = c.derived()
        writer.writerow(
            [c.pk, spreadsheet_safe(c.tank.code), spreadsheet_safe(c.tank.room.code), c.observed_at.isoformat(),
             c.recorded_at.isoformat(), spreadsheet_safe(c.recorded_by.username)]
            + ["" if getattr(c, p.key) is None else getattr(c, p.key) for p in parameters.PARAMETERS]
            + ["" if values.get(d.key) is None else round(values[d.key], d.decimals + 2) for d in derived.DERIVED]
            + [c.activity, int(c.clumping), c.dead_removed, int(c.surface_film), c.odour, c.clarity,
               " ".join(sorted(c.flags)), spreadsheet_safe(c.corrective_action), spreadsheet_safe(c.note),
               int(c.voided_at is not None), spreadsheet_safe(c.void_reason)])
    return buffer.getvalue()


def _is_number(text: str) -> bool:
    try:
        float(text)
    except ValueError:
        return False
    return True


def _body(response) -> str:
    return b"".join(response.streaming_content).decode("utf-8")


@pytest.mark.parametrize("chunk", [3, check_export.CHUNK])
def test_csv_equals_a_check_by_check_recomputation_byte_for_byte(client, manager, facility, monkeypatch, chunk):
    # common practice: the fast path is judged against the plain one on the cases that differ
    monkeypatch.setattr(check_export, "CHUNK", chunk)  # 3: rows of one response cross chunk boundaries
    client.force_login(manager)

    body = _body(client.get(reverse("colonies:checks-csv"), {"include_voided": "on"}))

    assert body == _reference_csv(Check.objects.all())
    rows = list(csv.reader(io.StringIO(body)))
    header = rows[0]
    assert len(rows) == 1 + len(facility)
    derived_columns = [header.index(f"{d.key} [{d.unit}] (derived)") for d in derived.DERIVED]
    assert all(any(row[i] for row in rows[1:]) for i in derived_columns)  # every derived value appears somewhere
    assert sum(row[header.index("voided")] == "1" for row in rows[1:]) == 2
    assert any(row[header.index("flags")] for row in rows[1:])
    assert any(".123456+00:00" in row[header.index("observed_at_utc")] for row in rows[1:])


def test_csv_of_current_checks_only_equals_the_recomputation(client, manager, facility):
    client.force_login(manager)

    body = _body(client.get(reverse("colonies:checks-csv"), {"tank": "-ma-01"}))

    assert body == _reference_csv(Check.objects.current().filter(tank__code="-MA-01"))
    assert body.count("\r\n") == 1 + 3


def test_csv_of_no_checks_is_the_header_alone(client, manager, db):
    client.force_login(manager)

    body = _body(client.get(reverse("colonies:checks-csv")))

    assert body == ",".join(check_export.header()) + "\r\n"


def test_xlsx_cells_equal_the_csv_rows(client, manager, facility):
    client.force_login(manager)
    reference = list(csv.reader(io.StringIO(_reference_csv(Check.objects.all()))))

    response = client.get(reverse("colonies:checks-xlsx"), {"include_voided": "on"})

    book = load_workbook(io.BytesIO(b"".join(response.streaming_content)))
    sheet = book["checks"]
    assert sheet.freeze_panes == "C2" and sheet["A1"].font.b
    cells = list(sheet.iter_rows())
    assert not [c.coordinate for row in cells for c in row if c.data_type == "f"]  # defused text stays text
    values = [[c.value for c in row] for row in cells]
    assert values[0] == reference[0]
    for got, expected in zip(values[1:], reference[1:], strict=True):
        # A number is a number cell of the same value, text a text cell, "" an empty cell. A control character
        # in text is stored as Excel escapes it (ECMA-376 ST_Xstring, CR as _x000D_), which openpyxl leaves be.
        assert [v if v is None else unescape(v) if isinstance(v, str) else float(v) for v in got] == \
            [None if e == "" else (float(e) if _is_number(e) and not e.startswith("'") else e) for e in expected]


def test_export_query_count_does_not_grow_with_rows(client, manager, technician, django_assert_max_num_queries,
                                                     monkeypatch):
    monkeypatch.setattr(check_export, "CHUNK", 2)
    tank = make_tank(code="QC-01")
    client.force_login(manager)
    counts = []
    for n in (3, 12):
        while Check.objects.count() < n:
            make_check(tank, user=technician, temp_c=21.0, ph=7.0)
        with django_assert_max_num_queries(10) as captured:
            _body(client.get(reverse("colonies:checks-csv")))
        counts.append(len(captured))
    assert counts[0] == counts[1]
