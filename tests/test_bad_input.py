"""Bad input, everywhere: generated values posted to every writing form, as the role allowed to use it.

For every form the properties are the same:
- the server never answers 500 (the test client re-raises any exception a view lets through);
- an error answer (4xx, or the back office showing its form again) writes nothing: the row count
  of every table, history tables included, is unchanged;
- after any accepted post, every stored row is within its declared bounds: its model validation
  and check constraints pass, plus the bounds that need another row (litres within the tank's
  volume, an observed time after the tank was started, a feeding's amount for its unit).

Values are numbers of every magnitude and sign (as typed: "nan", "inf", "1e308", twenty-digit
integers), odd dates (year 1, 9999, 30 February) and long, empty or unicode text. Each form runs a
modest, derandomized number of examples so CI is deterministic.
"""
import itertools
from dataclasses import dataclass
from datetime import timedelta
from typing import Callable

import pytest
from django.apps import apps
from django.core.files.uploadedfile import SimpleUploadedFile
from django.urls import reverse
from django.utils import timezone
from hypothesis import HealthCheck, given, settings as hypothesis_settings, strategies as st

from colonies import validators
from colonies.models import (Census, CareTarget, Check, DeadRemoval, Feeding, Room, Species, Split, SplitPart, Tank,
                             TankTarget, WaterChange)
from colonies.services import SPLIT_BOOKS_TOLERANCE
from experiments.models import Allowance, Booking, Cohort, Protocol, Study, Trial
from experiments import services as trial_services
from tests.experiments import protocol_posts
from tests.experiments.builders import make_cohort, make_protocol, make_stocked_tank, make_study, record, uv_values
from tests.factories import make_check, make_room, make_species, make_tank, species_edit_data

_unique = itertools.count(1)

NUMBERS = st.one_of(
    st.sampled_from(["nan", "NaN", "inf", "-inf", "Infinity", "1e308", "-1e308", "1e309", "1e19", "-1e19",
                     "10000000000000000000", "-10000000000000000000", "9" * 40, "1e-320", "-0", "0", "-1", "0.0001",
                     "", " ", "1,5", "１２", "٣", "0x10", "1_000", "½", "12abc", "2147483648", "9223372036854775808"]),
    st.integers(min_value=-(10 ** 20), max_value=10 ** 20).map(str),
    st.floats(allow_nan=True, allow_infinity=True).map(repr),
)


def _day(d) -> str:
    return f"{d.year:04d}-{d.month:02d}-{d.day:02d}"


DATES = st.one_of(
    st.sampled_from(["0001-01-01", "1900-01-01", "1949-12-31", "9999-12-31", "2026-02-30", "10000-01-01", "",
                     "today", "-1", "2026-13-01"]),
    st.dates().map(_day),
)
MOMENTS = st.one_of(
    st.sampled_from(["0001-01-01T00:00", "1900-01-01T08:00", "9999-12-31T23:59", "2026-02-30T10:00", "",
                     "2026-01-01T25:00", "now"]),
    st.datetimes().map(lambda d: f"{_day(d)}T{d.hour:02d}:{d.minute:02d}"),
)
TEXT = st.one_of(
    st.text(max_size=40),
    st.sampled_from(["", " ", "x" * 5000, "🪱" * 3000, "\u202e\u0000", "<script>alert(1)</script>", "=1+1", "\n" * 50]),
)
KINDS = {"number": NUMBERS, "date": DATES, "moment": MOMENTS, "text": TEXT}

WATCHED = [m for label in ("colonies", "experiments") for m in apps.get_app_config(label).get_models()]


def row_counts() -> dict[str, int]:
    return {m._meta.label: m._default_manager.count() for m in WATCHED}


def _minute_floor(dt):
    return dt.replace(second=0, microsecond=0)


def assert_everything_stored_is_within_bounds() -> None:
    now = timezone.now()
    latest = now + validators.FUTURE_LEEWAY
    for model in (Species, CareTarget, Room, Tank, TankTarget, Check, Feeding, WaterChange, Census, DeadRemoval,
                  Split, SplitPart,
                  Protocol, Allowance, Booking, Cohort, Study, Trial):
        for obj in model._default_manager.all():
            obj.full_clean(validate_unique=False)  # field validators and check constraints of the model
    for model in (Check, Feeding, WaterChange, Census, DeadRemoval):
        for record_ in model._default_manager.select_related("tank"):
            assert validators.start_of(record_.tank.started_on) <= record_.observed_at <= latest, record_
    for change in WaterChange.objects.select_related("tank").filter(litres__isnull=False):
        assert change.litres <= change.tank.volume_l, change
    for feeding in Feeding.objects.all():
        assert feeding.amount <= validators.FEEDING_MAX[feeding.unit], feeding
    for split in Split.objects.select_related("source").prefetch_related("parts"):
        assert validators.start_of(split.source.started_on) <= split.split_at <= latest
        assert split.stayed + sum(p.animals for p in split.parts.all()) <= split.source_before * (1 + SPLIT_BOOKS_TOLERANCE)
    for booking in Booking.objects.all():
        assert booking.needed_on <= timezone.localdate() + timedelta(days=366)
    for trial in Trial.objects.select_related("cohort"):
        assert _minute_floor(trial.cohort.drawn_at) <= trial.run_at <= latest


@dataclass
class Case:
    url: str
    user: object
    baseline: Callable[[], dict]  # a valid post, built afresh for each example
    fields: dict[str, str]  # field name -> kind of generated value
    files: Callable[[], dict] | None = None
    success: tuple[int, ...] = (302,)

    def strategy(self):
        """One field of the valid post replaced by a generated value (more would nearly always be refused
        for an obvious reason, and the bounds of the others would go untested)."""
        names = sorted(self.fields)
        return st.lists(st.sampled_from(names), min_size=1, max_size=1).flatmap(
            lambda chosen: st.fixed_dictionaries({name: KINDS[self.fields[name]] for name in chosen}))


# ---------------------------------------------------------------------------------------------
# One builder per writing form: where it posts, as whom, a valid post and the fields to vary
# ---------------------------------------------------------------------------------------------
READINGS = {"temp_c": "22", "ph": "7.2", "do_mg_l": "8", "tan_mg_l": "0.1", "no2_mg_l": "0.01", "no3_mg_l": "5",
            "conductivity_us_cm": "400", "hardness_mg_l": "150"}
OBSERVATIONS = {"dead_removed": "0", "note": "", "corrective_action": ""}


def long_ago():
    return timezone.localdate() - timedelta(days=60)


def _old_tank(**overrides):
    tank = make_tank(started_on=timezone.localdate() - timedelta(days=60), volume_l=2.0, **overrides)
    return tank


def case_round(users):
    tank = _old_tank(code="BI-R1", room=make_room(code="bi-round"))

    def baseline():
        data = {"tanks": tank.code, "round-observed_at": ""}
        data.update({f"{tank.code}-{k}": v for k, v in {**READINGS, **OBSERVATIONS}.items()})
        return data
    fields = {f"{tank.code}-{k}": "number" for k in READINGS} | {f"{tank.code}-dead_removed": "number",
                                                                 f"{tank.code}-note": "text",
                                                                 f"{tank.code}-corrective_action": "text",
                                                                 "round-observed_at": "moment"}
    return Case(reverse("colonies:round-room", args=["bi-round"]), users["technician"], baseline, fields)


def _tank_add(kind, prefix, valid: dict, kinds: dict):
    def build(users):
        tank = _old_tank(code=f"BI-{prefix[:3].upper()}")
        return Case(reverse("colonies:tank-add", args=[tank.code, kind]), users["technician"],
                    lambda: {f"{prefix}-{k}": v for k, v in valid.items()},
                    {f"{prefix}-{k}": v for k, v in kinds.items()})
    return build


case_check = _tank_add("check", "check", {**READINGS, **OBSERVATIONS},
                       {**{k: "number" for k in READINGS}, "dead_removed": "number", "note": "text",
                        "corrective_action": "text"})
case_feeding = _tank_add("feeding", "feeding", {"food": "pellets", "amount": "0.5", "unit": "g", "note": "",
                                                "observed_at": ""},
                         {"food": "text", "amount": "number", "note": "text", "observed_at": "moment"})
case_feeding_mg = _tank_add("feeding", "feeding", {"food": "spirulina", "amount": "20", "unit": "mg", "note": ""},
                            {"amount": "number", "unit": "text"})
case_water = _tank_add("water-change", "water", {"percent": "30", "litres": "", "source_water": "aged", "note": "",
                                                  "observed_at": ""},
                       {"percent": "number", "litres": "number", "source_water": "text", "note": "text",
                        "observed_at": "moment"})
case_census_direct = _tank_add("census", "census", {"method": "direct", "direct_count": "120", "note": "",
                                                    "observed_at": ""},
                               {"direct_count": "number", "note": "text", "observed_at": "moment"})
case_census_aliquot = _tank_add(
    "census", "census", {"method": "aliquot", "aliquot_counts_text": "31, 27, 35", "aliquot_ml": "1",
                         "total_ml": "500"},
    {"aliquot_counts_text": "text", "aliquot_ml": "number", "total_ml": "number"})
case_census_mass = _tank_add(
    "census", "census", {"method": "mass", "total_mass_g": "5", "sample_mass_g": "0.5", "sample_count": "40"},
    {"total_mass_g": "number", "sample_mass_g": "number", "sample_count": "number"})


def _batch(kind, valid: dict, kinds: dict):
    """The many-tanks screen: two tanks of one room, the second row carrying the generated value."""
    def build(users):
        room = make_room(code=f"bi-batch-{next(_unique)}")
        codes = [_old_tank(code=f"BI-{kind[:2].upper()}{i}", room=room).code for i in (1, 2)]

        def baseline():
            data = {"tanks": ",".join(codes), "batch-observed_at": ""}
            for code in codes:
                data.update({f"{code}-{k}": v for k, v in valid.items()})
            return data
        fields = {f"{codes[1]}-{k}": v for k, v in kinds.items()} | {"batch-observed_at": "moment"}
        return Case(reverse("colonies:batch", args=[kind]) + f"?room={room.code}", users["technician"], baseline,
                    fields)
    return build


case_batch_feeding = _batch("feeding", {"record": "on", "food": "pellets", "amount": "0.5", "unit": "g", "note": ""},
                            {"food": "text", "amount": "number", "unit": "text", "note": "text"})
case_batch_water = _batch("water-change", {"record": "on", "percent": "30", "litres": "", "source_water": "aged"},
                          {"percent": "number", "litres": "number", "source_water": "text"})
case_batch_dead = _batch("dead-removed", {"count": "3", "note": ""}, {"count": "number", "note": "text"})


def case_split(users):
    tank = _old_tank(code="BI-S1")
    make_tank(code="BI-S2", room=tank.room, species=tank.species, started_on=tank.started_on)

    def baseline():
        return {"split-split_at": "", "split-source_before": "400", "split-stayed": "200", "split-note": "",
                "part-TOTAL_FORMS": "2", "part-INITIAL_FORMS": "0", "part-MIN_NUM_FORMS": "0",
                "part-MAX_NUM_FORMS": "6", "part-0-destination": "BI-S2", "part-0-animals": "100",
                "part-1-new_code": f"BI-N{next(_unique)}", "part-1-new_volume_l": "1.5", "part-1-animals": "100",
                "part-1-new_position": ""}
    fields = {"split-split_at": "moment", "split-source_before": "number", "split-stayed": "number",
              "split-note": "text", "part-0-animals": "number", "part-1-animals": "number",
              "part-1-new_volume_l": "number", "part-1-new_position": "text", "part-1-new_code": "text"}
    return Case(reverse("colonies:tank-split", args=[tank.code]), users["technician"], baseline, fields)


def case_check_edit(users):
    tank = _old_tank(code="BI-E1")
    check = make_check(tank, user=users["technician"], ph=7.0, temp_c=20.0)

    def baseline():
        data = {f"check-{k}": v for k, v in {**READINGS, **OBSERVATIONS}.items()}
        data["reason"] = "Meter re-read"
        return data
    fields = {f"check-{k}": "number" for k in READINGS} | {"check-dead_removed": "number", "check-note": "text",
                                                           "reason": "text"}
    return Case(reverse("colonies:check-edit", args=[check.pk]), users["technician"], baseline, fields)


def case_species_edit(users):
    species = make_species(targets={"ph": (6.5, 8.5)})

    def baseline():
        species.refresh_from_db()
        extra = [] if species.targets.filter(parameter="do_pct_sat").exists() else [("do_pct_sat", 30, 120, "lab")]
        return {k: "" if v is None else v for k, v in species_edit_data(species, new_targets=extra).items()}
    fields = {"check_interval_hours": "number", "feeding_interval_days": "number",
              "water_change_interval_days": "number", "water_change_fraction": "number",
              "census_interval_days": "number", "max_density_per_l": "number", "reserve_min_animals": "number",
              "default_feeding_amount": "number", "default_feeding_unit": "text", "default_food": "text",
              "default_source_water": "text",
              "common_name": "text", "notes": "text", "targets-0-low": "number", "targets-0-high": "number",
              "targets-1-low": "number", "targets-1-high": "number", "targets-0-source": "text"}
    return Case(reverse("colonies:species-edit", args=[species.pk]), users["manager"], baseline, fields)


# The back office: the add pages of the reference data, inline rows included
def _inline(prefix: str, rows: list[dict]) -> dict:
    data = {f"{prefix}-TOTAL_FORMS": str(len(rows)), f"{prefix}-INITIAL_FORMS": "0", f"{prefix}-MIN_NUM_FORMS": "0",
            f"{prefix}-MAX_NUM_FORMS": "1000"}
    for i, row in enumerate(rows):
        data.update({f"{prefix}-{i}-{k}": v for k, v in row.items()})
    return data


def case_admin_room(users):
    return Case(reverse("admin:colonies_room_add"), users["superuser"],
                lambda: {"code": f"bi-room-{next(_unique)}", "name": "Wet lab", "notes": "", "change_reason": "new"},
                {"name": "text", "notes": "text", "code": "text"}, success=(302,))


def case_admin_species(users):
    def baseline():
        return {"scientific_name": f"Badinput worm {next(_unique)}", "common_name": "", "habitat": "freshwater",
                "check_interval_hours": "24", "feeding_interval_days": "3", "water_change_interval_days": "7",
                "water_change_fraction": "0.5", "census_interval_days": "14", "max_density_per_l": "",
                "reserve_min_animals": "0", "notes": "", "sources": "{}", "change_reason": "new profile",
                "default_food": "pellets", "default_feeding_amount": "0.5", "default_feeding_unit": "g",
                "default_source_water": "",
                **_inline("targets", [{"parameter": "ph", "low": "6", "high": "8", "source": "lab"},
                                      {"parameter": "do_pct_sat", "low": "30", "high": "", "source": "lab"}])}
    fields = {"check_interval_hours": "number", "feeding_interval_days": "number", "water_change_fraction": "number",
              "census_interval_days": "number", "max_density_per_l": "number", "reserve_min_animals": "number",
              "default_feeding_amount": "number", "default_feeding_unit": "text",
              "targets-0-low": "number", "targets-0-high": "number", "targets-1-low": "number",
              "targets-1-high": "number", "scientific_name": "text"}
    return Case(reverse("admin:colonies_species_add"), users["superuser"], baseline, fields)


def case_admin_tank(users):
    room, species = make_room(), make_species()

    def baseline():
        return {"code": f"BI-A{next(_unique)}", "room": room.pk, "position": "", "species": species.pk,
                "volume_l": "2", "system": "static", "substrate": "", "status": "active",
                "started_on": _day(timezone.localdate()), "notes": "", "change_reason": "new tank",
                **_inline("target_overrides", [{"parameter": "temp_c", "low": "18", "high": "24", "reason": "cold"}])}
    fields = {"volume_l": "number", "started_on": "date", "position": "text", "substrate": "text",
              "target_overrides-0-low": "number", "target_overrides-0-high": "number", "code": "text"}
    return Case(reverse("admin:colonies_tank_add"), users["superuser"], baseline, fields)


PROTOCOL_UV = {"kind": "uv", "wavelength_min_nm": "340", "wavelength_max_nm": "400", "max_irradiance_mw_cm2": "5",
               "max_duration_s": "60", "max_dose_mj_cm2": "100"}
PROTOCOL_FIELDS = {"starts_on": "date", "expires_on": "date", "max_animals_per_trial": "number", "max_animals_total": "number",
                   "max_exposures_per_group": "number", "min_rest_hours": "number",
                   "max_cumulative_dose_mj_cm2": "number", "allowance-0-wavelength_min_nm": "number",
                   "allowance-0-max_irradiance_mw_cm2": "number", "allowance-0-max_pulse_count": "number",
                   "allowance-0-max_temp_step_c": "number", "title": "text", "approver": "text"}


def case_protocol_new(users):
    """Protocols are entered in the app (the back office only reads them): the new-protocol page."""
    return Case(reverse("experiments:protocol-new"), users["manager"],
                lambda: protocol_posts.new_protocol(reference=f"BI-{next(_unique)}", allowances=[PROTOCOL_UV]),
                PROTOCOL_FIELDS)


def case_protocol_amend(users):
    protocol = make_protocol()
    return Case(reverse("experiments:protocol-amend", args=[protocol.pk]), users["manager"],
                lambda: protocol_posts.amend_protocol(protocol), {**PROTOCOL_FIELDS, "reason": "text"})


# Trials
def case_booking(users):
    protocol = make_protocol()
    tank = make_stocked_tank(estimate=100000, reserve=0, user=users["technician"], started_on=long_ago(), code="BI-B1")

    def baseline():
        return {"protocol": protocol.pk, "species": tank.species_id, "animals": "5",
                "needed_on": _day(timezone.localdate() + timedelta(days=1)), "tank": tank.pk, "purpose": "pilot"}
    return Case(reverse("experiments:booking-new"), users["researcher"], baseline,
                {"animals": "number", "needed_on": "date", "purpose": "text"})


def case_draw(users):
    protocol = make_protocol()
    tank = make_stocked_tank(estimate=100000, reserve=0, user=users["technician"], started_on=long_ago(), code="BI-D1")
    researcher = users["researcher"]

    def baseline():
        booking = trial_services.book(user=researcher, protocol=protocol, tank=tank, animals=20,
                                      needed_on=timezone.localdate())
        baseline.url = reverse("experiments:booking-draw", args=[booking.pk])
        return {"count": "10", "drawn_at": ""}
    case = Case("", researcher, baseline, {"count": "number", "drawn_at": "moment"})
    return case


def case_cohort_end(users):
    researcher = users["researcher"]
    tank = make_stocked_tank(estimate=100000, reserve=0, user=users["technician"], started_on=long_ago(), code="BI-C1")
    protocol = make_protocol()

    def baseline():
        cohort = make_cohort(user=researcher, protocol=protocol, tank=tank, animals=10)
        baseline.url = reverse("experiments:cohort-end", args=[cohort.pk])
        return {"end": "returned", "returned_to": tank.pk, "returned_count": "8", "method": "", "note": ""}
    return Case("", researcher, baseline, {"returned_count": "number", "method": "text", "note": "text",
                                           "end": "text"})


def case_study(users):
    protocol = make_protocol()

    def baseline():
        return {"code": f"bi-study-{next(_unique)}", "title": "Dispersal", "protocol": protocol.pk, "question": "",
                "conditions": "sham\nUV", "replicates": "2", "method": "block", "seed": "7",
                "observation_window_s": "600", "exclusion_criteria": "", "blinded": "on"}
    return Case(reverse("experiments:study-new"), users["researcher"], baseline,
                {"replicates": "number", "seed": "number", "observation_window_s": "number", "conditions": "text",
                 "title": "text", "question": "text"})


def _trial_setup(users, code):
    researcher = users["researcher"]
    protocol = make_protocol(max_exposures_per_group=1000, min_rest_hours=0, max_cumulative_dose_mj_cm2=1e7)
    tank = make_stocked_tank(estimate=100000, reserve=0, user=users["technician"], started_on=long_ago(), code=code)
    cohort = make_cohort(user=researcher, protocol=protocol, tank=tank, animals=50,
                         at=timezone.now() - timedelta(days=10))
    study = make_study(user=researcher, protocol=protocol, replicates=200)
    return researcher, cohort, study


TRIAL_NUMBERS = ["arena_diameter_mm", "water_volume_ml", "water_temp_c", "light_lux", "acclimation_min", "animals",
                 "wavelength_nm", "irradiance_mw_cm2", "duration_s", "aggregate_s", "disperse_s", "mortality_24h"]


def case_trial(users):
    researcher, cohort, study = _trial_setup(users, "BI-T1")

    def baseline():
        taken = set(study.trials.counting().values_list("slot", flat=True))
        slot = next(s["slot"] for s in study.allocation if s["slot"] not in taken)
        values = uv_values(irradiance=1.0, duration=10.0, at=timezone.now() - timedelta(days=2))
        data = {k: ("" if v is None else v) for k, v in values.items() if k not in ("run_at", "censored")}
        data.update({"slot": slot, "cohort": cohort.pk, "run_at": timezone.localtime(values["run_at"])
                     .strftime("%Y-%m-%dT%H:%M"), "clusters_text": "60 3 0.5", "note": "", "mortality_24h": "0"})
        return data
    fields = {name: "number" for name in TRIAL_NUMBERS} | {"run_at": "moment", "clusters_text": "text",
                                                          "vessel": "text", "note": "text"}
    return Case(reverse("experiments:trial-new", args=[study.code]), researcher, baseline, fields)


def case_trial_electrical(users):
    researcher, cohort, study = _trial_setup(users, "BI-T2")

    def baseline():
        taken = set(study.trials.counting().values_list("slot", flat=True))
        slot = next(s["slot"] for s in study.allocation if s["slot"] not in taken)
        return {"slot": slot, "cohort": cohort.pk, "run_at": (timezone.localtime() - timedelta(days=1))
                .strftime("%Y-%m-%dT%H:%M"), "vessel": "dish", "animals": "10", "kind": "electrical",
                "voltage_v": "5", "electrode_gap_cm": "2", "pulse_width_ms": "10", "pulse_count": "5",
                "pulse_frequency_hz": "1", "aggregate_s": "300", "disperse_s": "100", "note": ""}
    fields = {name: "number" for name in ("voltage_v", "electrode_gap_cm", "pulse_width_ms", "pulse_count",
                                          "pulse_frequency_hz", "animals", "disperse_s")}
    return Case(reverse("experiments:trial-new", args=[study.code]), researcher, baseline, fields)


def case_score(users):
    researcher, cohort, study = _trial_setup(users, "BI-T3")
    trial = record(study, cohort, researcher, at=timezone.now() - timedelta(days=3)).trial

    def baseline():
        trial.refresh_from_db()
        data = {"aggregate_s": "250", "disperse_s": "90", "mortality_24h": "1", "clusters_text": "30 2 0.6"}
        if trial.is_scored:
            data["reason"] = "Video re-scored"
        return data
    return Case(reverse("experiments:trial-score", args=[trial.pk]), researcher, baseline,
                {"aggregate_s": "number", "disperse_s": "number", "mortality_24h": "number", "clusters_text": "text",
                 "reason": "text"})


def case_attachment(users):
    researcher, cohort, study = _trial_setup(users, "BI-T4")
    trial = record(study, cohort, researcher, at=timezone.now() - timedelta(days=3)).trial
    return Case(reverse("experiments:attachment-add", args=[trial.pk]), researcher,
                lambda: {"kind": "photo", "caption": "dish 7"}, {"kind": "text", "caption": "text"},
                files=lambda: {"file": SimpleUploadedFile("dish.png", b"\x89PNG bytes", content_type="image/png")})


CASES = {name[len("case_"):]: builder for name, builder in dict(globals()).items() if name.startswith("case_")}


@pytest.fixture
def users(technician, researcher, manager, superuser):
    return {"technician": technician, "researcher": researcher, "manager": manager, "superuser": superuser}


@pytest.mark.parametrize("name", sorted(CASES))
def test_generated_values_never_crash_half_save_or_store_the_impossible(name, client, users, settings, tmp_path):
    settings.MEDIA_ROOT = tmp_path
    case = CASES[name](users)
    client.force_login(case.user)

    @settings_for_forms
    @given(values=case.strategy())
    def post_generated(values):
        data = case.baseline()
        url = case.url or case.baseline.url
        data.update(values)
        if case.files:
            data.update(case.files())
        before = row_counts()

        response = client.post(url, data)

        assert response.status_code != 500
        if response.status_code not in case.success:
            assert row_counts() == before, f"{name}: refused with {response.status_code} but rows changed"
        else:
            assert_everything_stored_is_within_bounds()

    post_generated()


settings_for_forms = hypothesis_settings(
    max_examples=30, deadline=None, derandomize=True, database=None,
    suppress_health_check=[HealthCheck.function_scoped_fixture, HealthCheck.too_slow, HealthCheck.data_too_large],
)
