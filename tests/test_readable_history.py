"""Every history page writes fields by their labels and values the lab's way, never raw field names.

One world with a record of every model that keeps a history (husbandry and trials). Each record gets
a version in which every field changed (written to its history table as the library writes one), so
every history page has a change of every field it shows. Then the app's pages (tank history, check,
deviation, species, the trial records' history pages) and the back office's history page of every
record are read: no field name of any model appears in what a reader sees, the changes are
labelled as colonies/history_format.py labels them, and the query count of each page stays the same
when its records have ten times as many versions.
"""
import html
import re
from datetime import timedelta
from types import SimpleNamespace

import pytest
from django.apps import apps
from django.contrib import admin
from django.core.files.uploadedfile import SimpleUploadedFile
from django.db import connection, models
from django.test.utils import CaptureQueriesContext
from django.urls import reverse
from django.utils import timezone

from colonies import history_format
from colonies.history import FIELD_SKIP
from colonies.models import (CareTarget, Census, DeadRemoval, Deviation, Feeding, MeasurementPlan, Split, SplitPart,
                             TankMeasurementPlan, TankTarget, WaterChange)
from experiments import services
from experiments.models import Attachment, ImageMeasurement, Override, Study
from tests.experiments.builders import make_cohort, make_protocol, make_stocked_tank, make_study, record
from tests.factories import make_check, make_species, make_tank

PNG = b"\x89PNG\r\n\x1a\n" + b"\x00" * 16  # the PNG signature (ISO/IEC 15948 §5.2)


def tracked_models():
    return [m for m in apps.get_models() if m._meta.app_label in ("colonies", "experiments")
            and hasattr(m, "history") and not m.__name__.startswith("Historical")]


RAW_NAMES = {f.name for m in tracked_models() for f in m._meta.concrete_fields} | \
            {f.attname for m in tracked_models() for f in m._meta.concrete_fields}


# The links a page finds a record's versions by (a care target's species, a check's tank...): kept.
PARENTS = {"species", "tank", "trial", "cohort", "study", "protocol", "split", "source", "destination"}


def _other_value(model, field, current):
    """A different value of the field's kind (None: leave the field as it is)."""
    if isinstance(field, models.ForeignKey):
        other = field.related_model._default_manager.exclude(pk=current).order_by("pk").first()
        return None if other is None else other.pk
    if isinstance(field, models.BooleanField):
        return not current
    if field.choices:
        return next((k for k, _ in field.flatchoices if k != current and k != ""), None)
    if isinstance(field, models.JSONField):
        return {"edited_key_s": 2, "census_interval_days": "edited"}
    if isinstance(field, (models.IntegerField, models.FloatField)):
        return (current or 0) + 1
    if isinstance(field, models.DateTimeField):
        return (current or timezone.now()) + timedelta(days=1)
    if isinstance(field, models.DateField):
        return (current or timezone.localdate()) + timedelta(days=1)
    if isinstance(field, (models.CharField, models.TextField, models.FileField)):
        current = current or ""
        if field.max_length and len(current) >= field.max_length:  # full: change the last character instead
            return current[:-1] + ("y" if current.endswith("x") else "x")
        return f"{current}x"
    return None


def change_every_field(obj, stamp) -> set[str]:
    """Add a version of `obj` to its history in which every editable field has another value (written as
    the history library writes a version); returns the names of the fields changed."""
    model = type(obj)
    version = obj.history.order_by("-history_date", "-history_id").first()
    changed = set()
    tracked = {f.name for f in version._meta.concrete_fields}  # what the history table keeps
    for field in model._meta.concrete_fields:
        if field.primary_key or not field.editable or field.name not in tracked or field.name in PARENTS:
            continue
        new = _other_value(model, field, getattr(version, field.attname))
        if new is not None:
            setattr(version, field.attname, new)
            changed.add(field.name)
    version.history_id, version.history_type, version.history_date = None, "~", stamp
    version.history_change_reason = "Every field changed"
    version._state.adding = True
    version.save()
    return changed


@pytest.fixture
def world(db, technician, researcher, manager, superuser, settings, tmp_path):
    settings.MEDIA_ROOT = tmp_path
    species = make_species(targets={"ph": (6.0, 8.0), "do_pct_sat": (30.0, None)},
                           sources={"feeding_interval_days": "x"})
    MeasurementPlan.objects.create(species=species, parameter="ph", cadence="daily")
    tank = make_tank(species=species, code="RH-01")
    TankTarget.objects.create(tank=tank, parameter="temp_c", low=18, high=22, reason="warm room")
    TankMeasurementPlan.objects.create(tank=tank, parameter="ph", cadence="daily", reason="new culture")
    check = make_check(tank, user=technician, ph=7.0, temp_c=20.0, conductivity_us_cm=464.0)
    feeding = Feeding.objects.create(tank=tank, recorded_by=technician, food="liver paste", amount=1.0, unit="g")
    WaterChange.objects.create(tank=tank, recorded_by=technician, percent=50, source_water="tap, aged")
    Census.objects.create(tank=tank, recorded_by=technician, method=Census.Method.DIRECT, direct_count=100,
                          estimate=100, estimate_lower=100, estimate_upper=100)
    DeadRemoval.objects.create(tank=tank, recorded_by=technician, count=2)
    other = make_tank(species=species, code="RH-02")
    split = Split.objects.create(source=tank, recorded_by=technician, source_before=100, stayed=60)
    SplitPart.objects.create(split=split, destination=other, animals=40)
    deviation = Deviation.objects.create(tank=tank, rule=Deviation.Rule.choices[0][0], parameter="ph",
                                         summary="pH above target", evidence=[{"check": check.pk, "ph": 9.1}])

    protocol = make_protocol()
    cohort = make_cohort(user=researcher, protocol=protocol, tank=make_stocked_tank(user=technician, code="RH-03"))
    study = make_study(user=researcher, protocol=protocol, code="readable")
    trial = record(study, cohort, researcher).trial
    Override.objects.create(trial=trial, cohort=cohort, protocol=protocol, recorded_by=manager, reason="agreed",
                            breaches=["rest: 2 h < 20 h"])
    services.add_attachment(user=researcher, trial=trial, kind="photo", upload=SimpleUploadedFile("d.png", PNG))
    ImageMeasurement.objects.create(trial=trial, source="photos", sha256="0" * 64, threshold=0.5, window_s=600,
                                    frames_total=1, frames_done=1, status="done", censored=True,
                                    requested_by=researcher, frames=[{"t_s": 0.0, "clusters": 1}])
    booking = services.book(user=researcher, protocol=protocol, tank=cohort.origin_tank, animals=5,
                            needed_on=timezone.localdate())
    return SimpleNamespace(species=species, tank=tank, check=check, feeding=feeding, deviation=deviation,
                           protocol=protocol, cohort=cohort, study=study, trial=trial, booking=booking, technician=technician,
                           researcher=researcher, manager=manager, superuser=superuser)


def _change_everything(times: int = 1) -> dict[type, set[str]]:
    changed: dict[type, set[str]] = {}
    start = timezone.now() + timedelta(minutes=1)
    for i in range(times):
        for model in tracked_models():
            for obj in model._default_manager.all():
                changed.setdefault(model, set()).update(change_every_field(obj, start + timedelta(seconds=i)))
    return changed


def app_pages(w) -> dict[str, tuple[list[type], frozenset]]:
    """URL -> (the models whose changes it shows, fields it leaves out)."""
    return {
        reverse("colonies:tank-history", args=[w.tank.code]): (
            [TankTarget, TankMeasurementPlan, Feeding, WaterChange, Census, DeadRemoval, Split, SplitPart,
             type(w.tank), type(w.check)], frozenset()),
        reverse("colonies:check-detail", args=[w.check.pk]): ([type(w.check)], frozenset()),
        reverse("colonies:check-edit", args=[w.check.pk]): ([type(w.check)], frozenset()),
        reverse("colonies:void", args=["feeding", w.feeding.pk]): ([Feeding], frozenset()),
        reverse("colonies:deviation-detail", args=[w.deviation.pk]): ([Deviation], frozenset({"evidence"})),
        reverse("colonies:species-detail", args=[w.species.pk]): ([type(w.species), CareTarget, MeasurementPlan],
                                                                  frozenset()),
        reverse("experiments:protocol-history", args=[w.protocol.pk]): ([type(w.protocol)], frozenset()),
        reverse("experiments:booking-history", args=[w.booking.pk]): ([type(w.booking)], frozenset()),
        reverse("experiments:cohort-history", args=[w.cohort.pk]): ([type(w.cohort)], frozenset()),
        reverse("experiments:study-history", args=[w.study.code]): ([Study], frozenset()),
        reverse("experiments:trial-history", args=[w.trial.pk]): (
            [type(w.trial), Override, Attachment, ImageMeasurement], frozenset({"frames"})),
    }


def admin_history_pages() -> list[str]:
    urls = []
    for model in tracked_models():
        if model not in admin.site._registry:
            continue
        for obj in model._default_manager.all():
            urls.append(reverse(f"admin:{model._meta.app_label}_{model._meta.model_name}_history", args=[obj.pk]))
    return urls


def visible_text(response) -> str:
    text = response.content.decode()
    text = re.sub(r"<(script|style)\b.*?</\1>", " ", text, flags=re.S)
    return " ".join(html.unescape(re.sub(r"<[^>]+>", " ", text)).split())


def labels_shown(response) -> set[str]:
    body = response.content.decode()
    return {html.unescape(m) for m in re.findall(r'<strong class="field">(.*?)</strong>', body)} | \
           {html.unescape(m) for m in re.findall(r"<li><strong>(.*?):</strong>", body)}  # the back office's list


def _raw_names_in(text: str) -> set[str]:
    return {name for name in RAW_NAMES if "_" in name and re.search(rf"\b{re.escape(name)}\b", text)}


def test_no_history_page_shows_a_raw_field_name_and_every_change_is_labelled(client, world):
    changed = _change_everything()
    client.force_login(world.superuser)
    problems = {}
    for url, (page_models, left_out) in app_pages(world).items():
        response = client.get(url)
        assert response.status_code == 200, url
        shown = labels_shown(response)
        expected = {history_format.field_info(m, name).label for m in page_models for name in changed[m]
                    if name not in FIELD_SKIP and name not in left_out}
        found = {"raw names": _raw_names_in(visible_text(response)), "raw labels": shown & RAW_NAMES,
                 "missing labels": expected - shown}
        if any(found.values()):
            problems[url] = found
    for url in admin_history_pages():
        response = client.get(url)
        assert response.status_code == 200, url
        found = {"raw names": _raw_names_in(visible_text(response)), "raw labels": labels_shown(response) & RAW_NAMES}
        if not labels_shown(response):
            found["no changes"] = {url}
        if any(found.values()):
            problems[url] = found
    assert problems == {}


def test_the_tank_history_shows_a_corrected_reading_with_its_label_decimals_and_unit(client, world):
    from colonies import services as colony_services
    colony_services.update_check(user=world.technician, check=world.check,
                                 row={"ph": 7.0, "temp_c": 20.0, "conductivity_us_cm": 446.0}, reason="Misread")
    client.force_login(world.technician)
    text = visible_text(client.get(reverse("colonies:tank-history", args=[world.tank.code])))
    # The example, "conductivity_us_cm: 464.0 → 446.0", as the registry writes it (0 decimals, µS/cm)
    assert "Conductivity, uncompensated : 464 µS/cm → 446 µS/cm" in text


@pytest.mark.parametrize("page", ["tank-history", "check-detail", "deviation-detail", "species-detail",
                                  "protocol-history", "booking-history", "cohort-history", "study-history",
                                  "trial-history"])
def test_history_pages_keep_their_query_count_with_ten_times_the_versions(client, world, page,
                                                                          django_assert_max_num_queries):
    url = _url(page, world)
    client.force_login(world.superuser)
    _change_everything(1)
    with CaptureQueriesContext(connection) as small:
        assert client.get(url).status_code == 200
    _change_everything(10)
    with django_assert_max_num_queries(len(small)):
        assert client.get(url).status_code == 200


def _url(page, w) -> str:
    return {"tank-history": reverse("colonies:tank-history", args=[w.tank.code]),
            "check-detail": reverse("colonies:check-detail", args=[w.check.pk]),
            "deviation-detail": reverse("colonies:deviation-detail", args=[w.deviation.pk]),
            "species-detail": reverse("colonies:species-detail", args=[w.species.pk])}.get(page) or \
        reverse(f"experiments:{page}", args=[w.study.code if page == "study-history" else
                                             {"protocol-history": w.protocol.pk, "booking-history": w.booking.pk,
                                              "cohort-history": w.cohort.pk, "trial-history": w.trial.pk}[page]])


def test_a_lineage_change_shows_the_founding_tanks_by_code(client, world):
    from colonies import services as colony_services
    target = make_tank(species=world.species, code="RH-09")
    colony_services.record_split(user=world.technician, source=world.tank, source_before=100, stayed=60,
                                 parts=[(target, 40)])
    client.force_login(world.technician)
    text = visible_text(client.get(reverse("colonies:tank-history", args=[target.code])))
    assert f"Founded from : {history_format.EMPTY} → RH-01" in text


def test_a_deviation_page_shows_its_newest_versions_each_against_the_one_before(client, world, monkeypatch):
    from colonies import deviation_views
    monkeypatch.setattr(deviation_views, "HISTORY_SHOWN", 3)
    start = timezone.now() + timedelta(minutes=1)
    for i in range(5):
        change_every_field(world.deviation, start + timedelta(seconds=i))
    client.force_login(world.technician)
    entries = client.get(reverse("colonies:deviation-detail", args=[world.deviation.pk])).context["entries"]
    assert len(entries) == 3 and all(e["action"] == "changed" and e["changes"] for e in entries)
    assert [e["when"] for e in entries] == sorted((e["when"] for e in entries), reverse=True)
    assert entries[-1]["when"] == start + timedelta(seconds=2)  # the oldest shown still has its changes
