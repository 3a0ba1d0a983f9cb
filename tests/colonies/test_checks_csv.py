"""The checks CSV export: columns from the parameter registry, filters by tank and room."""
import pytest
from django.urls import reverse

from colonies import parameters
from tests.factories import csv_rows, make_check, make_room, make_tank


@pytest.fixture
def tanks(db):
    return make_tank(code="FW-01", room=make_room(code="fw-1")), make_tank(code="MA-01", room=make_room(code="mar-1"))


def test_csv_header_has_a_column_for_every_registered_parameter(client, researcher, db):
    client.force_login(researcher)

    response = client.get(reverse("colonies:checks-csv"))

    assert response.status_code == 200
    assert response["Content-Type"] == "text/csv; charset=utf-8"
    assert response["Content-Disposition"] == 'attachment; filename="vermilog-checks.csv"'
    header = csv_rows(response)[0]
    # A column is the key, with the unit in brackets when there is one: "temp_c [°C]", "ph".
    keys = [column.split(" [")[0] for column in header]
    for p in parameters.PARAMETERS:
        expected = f"{p.key} [{p.unit}]" if p.unit else p.key
        assert expected in header
    assert len(keys) == len(set(keys))


def test_csv_row_holds_the_values_under_their_parameter_columns(client, technician, tanks):
    check = make_check(tanks[0], user=technician, ph=7.25, temp_c=22.5, dead_removed=3)
    client.force_login(technician)

    header, row = csv_rows(client.get(reverse("colonies:checks-csv")))

    record = dict(zip(header, row))
    assert (record["check_id"], record["tank"], record["room"], record["recorded_by"]) == (
        str(check.pk), "FW-01", "fw-1", technician.username)
    assert (record["ph"], record["temp_c [°C]"], record["dead_removed"], record["do_mg_l [mg/L]"]) == (
        "7.25", "22.5", "3", "")


@pytest.mark.parametrize("query,expected", [({"tank": "fw-01"}, ["FW-01"]), ({}, ["FW-01", "MA-01"])])
def test_csv_filters_by_tank(client, technician, tanks, query, expected):
    for tank in tanks:
        make_check(tank, user=technician, ph=7.0)
    client.force_login(technician)

    rows = csv_rows(client.get(reverse("colonies:checks-csv"), query))

    assert sorted(row[1] for row in rows[1:]) == expected


def test_csv_filters_by_room(client, technician, tanks):
    for tank in tanks:
        make_check(tank, user=technician, ph=7.0)
    client.force_login(technician)

    rows = csv_rows(client.get(reverse("colonies:checks-csv"), {"room": tanks[1].room.pk}))

    assert [row[1] for row in rows[1:]] == ["MA-01"]


def test_spreadsheet_export_has_the_same_columns_and_rows_as_the_csv(client, researcher):
    import io

    from openpyxl import load_workbook

    from colonies import parameters
    from tests.factories import make_check, make_tank, make_user

    tech = make_user("xlsx-tech")
    tank = make_tank(code="XL-01")
    make_check(tank, user=tech, temp_c=21.5, ph=7.25)
    make_check(tank, user=tech, temp_c=22.0)
    client.force_login(researcher)
    response = client.get(reverse("colonies:checks-xlsx"), {"tank": "XL-01"})
    assert response.status_code == 200
    assert response["Content-Type"].startswith("application/vnd.openxmlformats")
    sheet = load_workbook(io.BytesIO(b"".join(response.streaming_content)))["checks"]  # a FileResponse streams
    rows = list(sheet.iter_rows(values_only=True))
    header = rows[0]
    assert header[:3] == ("check_id", "tank", "room")
    assert all(any(h.startswith(p.key) for h in header) for p in parameters.PARAMETERS)
    assert len(rows) == 3
    temps = [r[header.index("temp_c [°C]")] for r in rows[1:]]
    assert temps == [21.5, 22.0]
    assert rows[2][header.index("ph")] is None  # an empty reading is an empty cell, not ""


def test_free_text_that_looks_like_a_formula_is_defused(client, researcher):
    from tests.factories import make_check, make_tank, make_user

    tank = make_tank(code="FX-01")
    make_check(tank, user=make_user("fx-tech"), temp_c=21.0, note="=HYPERLINK(\"http://x.invalid\")")
    client.force_login(researcher)
    rows = csv_rows(client.get(reverse("colonies:checks-csv"), {"tank": "FX-01"}))
    note = rows[1][rows[0].index("note")]
    assert note == "'=HYPERLINK(\"http://x.invalid\")"


def test_csv_rows_equal_a_recomputation_from_the_stored_checks(client, researcher, technician):
    """The streamed rows (values_list, memoised derived values) hold what each Check instance computes."""
    from colonies import derived
    from colonies.models import Check
    from tests.factories import make_species

    fresh = make_tank(code="RC-01")
    marine = make_tank(code="RC-02", species=make_species(habitat=parameters.MARINE))
    readings = [dict(temp_c=21.5, ph=7.25, tan_mg_l=0.4, do_mg_l=7.9, conductivity_us_cm=420.0),
                dict(temp_c=21.5, ph=7.25, tan_mg_l=0.4, do_mg_l=7.9, conductivity_us_cm=420.0),  # same inputs
                dict(temp_c=18.0, ph=8.1, do_mg_l=6.5),
                dict(temp_c=24.0, salinity=33.0, do_mg_l=6.1, conductivity_us_cm=50000.0, tan_mg_l=0.05, ph=8.2)]
    for tank, values in zip([fresh, fresh, fresh, marine], readings):
        make_check(tank, user=technician, note="+ see log", **values)
    client.force_login(researcher)

    header, *rows = csv_rows(client.get(reverse("colonies:checks-csv")))

    assert len(rows) == 4
    for row in rows:
        record = dict(zip(header, row))
        check = Check.objects.select_related("tank__species").get(pk=int(record["check_id"]))
        computed = check.derived()  # the per-check path (colonies/derived.py), # common practice: compare to it
        for d in derived.DERIVED:
            value = computed.get(d.key)
            assert record[f"{d.key} [{d.unit}] (derived)"] == ("" if value is None else str(round(value, d.decimals + 2)))
        for p in parameters.PARAMETERS:
            stored = getattr(check, p.key)
            assert record[f"{p.key} [{p.unit}]" if p.unit else p.key] == ("" if stored is None else str(stored))
        assert (record["tank"], record["note"], record["voided"]) == (check.tank.code, "'+ see log", "0")
        assert record["observed_at_utc"] == check.observed_at.isoformat()
