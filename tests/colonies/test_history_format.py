"""colonies/history_format.py: how a history names every field and writes every kind of value.

Pure: reads the models' field definitions, never the database.
"""
from datetime import date, datetime, timezone as dt_timezone

import pytest
from django.apps import apps
from django.contrib.auth.models import User
from django.utils import timezone

from colonies import history_format as hf
from colonies.models import Census, Check, Deviation, Species, Tank
from experiments.models import Protocol, Study, Trial


def test_a_reading_is_named_by_the_registry_with_its_decimals_and_unit():
    # The example: "conductivity_us_cm: 464.0 → 446.0"; the registry gives 0 decimals and µS/cm.
    assert hf.change(Check, "conductivity_us_cm", 464.0, 446.0) == hf.Change(
        "Conductivity, uncompensated", "464 µS/cm", "446 µS/cm")
    assert hf.change(Check, "ph", 7.2, 7.35) == hf.Change("pH", "7.20", "7.35")  # 2 decimals, no unit
    assert hf.value_text(Check, "no2_mg_l", 0.05) == "0.050 mg/L NO2-N"  # 3 decimals


def test_a_field_with_bounds_is_named_by_its_validator_with_its_unit():
    # The other example: "census_interval_days"
    assert hf.change(Species, "census_interval_days", 14, 7) == hf.Change("Census interval", "14 days", "7 days")
    assert hf.field_label(Species, "check_interval_hours") == "Check interval (h)"
    assert hf.value_text(Tank, "volume_l", 20.0) == "20 L"


def test_a_field_with_a_verbose_name_keeps_it_and_its_unit():
    assert hf.change(Trial, "irradiance_mw_cm2", 2.0, 2.345) == hf.Change("Irradiance", "2 mW/cm²", "2.345 mW/cm²")
    assert hf.field_label(Trial, "kind") == "Stimulus type"
    assert hf.field_label(Study, "scorer_not_operator") == "Scorer must not be the operator"


def test_other_fields_are_read_from_their_name_with_the_unit_it_ends_in():
    assert hf.change(Protocol, "min_rest_hours", 4.0, 6.5) == hf.Change("Minimum rest", "4 h", "6.5 h")
    assert hf.field_label(Protocol, "max_cumulative_dose_mj_cm2") == "Maximum cumulative dose (mJ/cm²)"
    assert hf.field_label(Census, "aliquot_ml") == "Aliquot (mL)"
    assert hf.field_label(Check, "dead_removed") == "Dead removed"
    assert hf.field_label(Trial, "mortality_24h") == "Mortality 24 h"


def test_choices_show_their_display_label():
    assert hf.change(Tank, "status", Tank.Status.ACTIVE, Tank.Status.QUARANTINE) == hf.Change(
        "Status", Tank.Status.ACTIVE.label, Tank.Status.QUARANTINE.label)
    assert hf.value_text(Species, "habitat", "marine") == "Marine"
    # a care target's parameter: the registry's label, derived values marked
    from colonies.models import CareTarget
    assert hf.value_text(CareTarget, "parameter", "do_pct_sat") == "Oxygen saturation (% air sat.) (derived)"


def test_a_deviations_parameter_without_choices_is_named_by_the_registry():
    assert hf.value_text(Deviation, "parameter", "conductivity_us_cm") == "Conductivity, uncompensated (µS/cm)"


def test_booleans_are_yes_and_no_and_nothing_is_a_dash():
    assert hf.change(Check, "clumping", False, True) == hf.Change("Clumping", "no", "yes")
    assert hf.value_text(Check, "ph", None) == hf.EMPTY
    assert hf.value_text(Check, "note", "") == hf.EMPTY


def test_dates_and_moments_are_written_the_labs_way_in_its_zone():
    # vermilog/formats/en_GB/formats.py: DATE_FORMAT "d M Y", DATETIME_FORMAT "d M Y H:i".
    assert hf.value_text(Tank, "started_on", date(2026, 3, 9)) == "09 Mar 2026"
    moment = datetime(2026, 1, 5, 13, 30, tzinfo=dt_timezone.utc)
    with timezone.override("Europe/Berlin"):  # CET = UTC+1 in January (IANA tz database)
        assert hf.value_text(Check, "observed_at", moment) == "05 Jan 2026 14:30"
    with timezone.override("America/Chicago"):  # CST = UTC-6 in January
        assert hf.value_text(Check, "observed_at", moment) == "05 Jan 2026 07:30"


def test_a_related_row_is_named_by_its_str_from_the_lookup_or_the_object():
    user = User(pk=7, username="tamsin")
    assert hf.value_text(Check, "recorded_by", 7, {(User, 7): "tamsin"}) == "tamsin"
    assert hf.value_text(Check, "recorded_by", user) == "tamsin"  # the back office passes objects
    assert hf.value_text(Check, "recorded_by", 8, {}) == "#8"  # no longer there: its id, marked


def test_json_reads_as_labelled_pairs_and_lists():
    sources = {"census_interval_days": "lab setting", "temperature": "23 °C"}
    assert hf.value_text(Species, "sources", sources) == "Census interval (days): lab setting; Temperature: 23 °C"
    assert hf.value_text(Census, "aliquot_counts", [12, 15, 9]) == "12, 15, 9"
    evidence = [{"check": 4, "value_mg_l": 2.5, "ok": False}, {"check": 5, "value_mg_l": 3.0, "ok": True}]
    assert hf.value_text(Deviation, "evidence", evidence) == \
        "Check: 4, Value (mg/L): 2.5, Ok: no; Check: 5, Value (mg/L): 3, Ok: yes"
    assert hf.json_text('{"temp_c": 21.5}') == "Temperature (°C): 21.5"  # JSON kept as text, a registry key
    assert hf.value_text(Census, "aliquot_counts", []) == hf.EMPTY


def test_plain_numbers_are_written_in_the_shortest_exact_form():
    assert hf.number_text(0.1 + 0.2) == "0.3"
    assert hf.number_text(1234567.5) == "1234567.5"
    assert hf.number_text(15000.0) == "15000"
    assert hf.number_text(3) == "3"


def _tracked_models():
    return [m for m in apps.get_models() if m._meta.app_label in ("colonies", "experiments")
            and hasattr(m, "history") and not m.__name__.startswith("Historical")]


@pytest.mark.parametrize("model", _tracked_models(), ids=lambda m: m.__name__)
def test_no_field_of_any_model_is_labelled_by_its_raw_name(model):
    for field in model.history.model._meta.concrete_fields:
        name = field.name
        if name.startswith("history_"):
            continue
        info = hf.field_info(model, name)
        assert info.label and "_" not in info.label, (model.__name__, name, info)
        assert info.label != name and info.label[0].isupper() or info.label == "pH", (model.__name__, name, info)
