"""Every route to a blinded study's trials, for every role: nothing gives a condition or stimulus away.

A blinded study with three conditions; operator A ran one trial (ultraviolet, with a later correction
of its irradiance made outside the app, so the history shows the value), operator B ran another
(electrical, with a manager's override that opened a deviation) and claimed an open slot. For each
person (the owner, another researcher, a manager, a technician, a superuser, operator A and
operator B) every page of experiments/urls.py, taken from the URL resolver so that a new page is
covered without editing this test, the back office (list, change and history pages of every
experiments model, the revert form) and the colonies pages the records lead to (deviation, tank)
are fetched, and the body and headers are searched for the condition labels and distinctive
stimulus values (chosen to appear nowhere else). Each person may see only the trials they ran and
the slots they claimed (experiments/blinding.py). After unblinding everyone sees.
"""
import re
from datetime import timedelta
from types import SimpleNamespace

import pytest
from django.contrib import admin
from django.contrib.auth.models import User
from django.core.files.uploadedfile import SimpleUploadedFile
from django.urls import get_resolver, reverse

from colonies.models import Deviation
from colonies.roles import MANAGER, RESEARCHER, TECHNICIAN
from experiments import services
from experiments.models import CAUTION_ELECTRICAL, CAUTION_UV, ImageMeasurement, PeriodReport, Stimulus
from tests.experiments.builders import (ELECTRICAL, UV, days_ago, make_cohort, make_protocol, make_study, today,
                                        uv_values)
from tests.factories import make_user

GLOW, PULSE, SHAM = "Obsidian-glow", "Veridian-pulse", "Sable-sham"
# Values shown wherever the trial's stimulus is: settings, derived dose (39.865 mJ/cm², shown as 39.86 or 39.87),
# and the override's reason.
UV_SECRETS = ("2.345", "371.5", "39.86", "39.87")
ELECTRICAL_SECRETS = ("7.77", "Nebula-override")
PNG = b"\x89PNG\r\n\x1a\n" + b"\x00" * 16  # the PNG signature (ISO/IEC 15948 §5.2)
PERSONAS = ("owner", "other_researcher", "manager", "technician", "superuser", "operator_a", "operator_b")


@pytest.fixture
def world(db, settings, tmp_path):
    settings.MEDIA_ROOT = tmp_path
    people = SimpleNamespace(
        owner=make_user("rhea", role=RESEARCHER), other_researcher=make_user("olaf", role=RESEARCHER),
        manager=make_user("mona", role=MANAGER, is_staff=True), technician=make_user("tess", role=TECHNICIAN),
        superuser=User.objects.create_superuser("root", "root@example.invalid", "pw"),
        operator_a=make_user("opal", role=MANAGER, is_staff=True),
        operator_b=make_user("bryn", role=MANAGER, is_staff=True))
    protocol = make_protocol(allowances=(UV, ELECTRICAL), max_exposures_per_group=5)
    cohort = make_cohort(user=people.owner, protocol=protocol, at=days_ago(10))
    study = make_study(user=people.owner, protocol=protocol, conditions=(SHAM, GLOW, PULSE), replicates=2,
                       blinded=True, code="blind-routes", title="Dispersal under two stimuli",
                       question="Do the two stimuli disperse clumps faster than handling alone?")
    slot_of = {c: next(a["slot"] for a in study.allocation if a["condition"] == c) for c in (GLOW, PULSE, SHAM)}

    services.claim_slot(user=people.operator_a, study=study, slot=slot_of[GLOW])
    glow = services.record_trial(user=people.operator_a, study=study, slot=slot_of[GLOW], cohort=cohort,
                                 values=uv_values(irradiance=2.0, duration=17, wavelength=371.5, at=days_ago(9))).trial
    # A settings correction made outside the app (the shell): the history's list of changes shows 2.0 -> 2.345.
    glow.irradiance_mw_cm2, glow.dose_mj_cm2, glow._change_reason = 2.345, 2.345 * 17, "Meter recalibrated"
    glow.save()
    attachment = services.add_attachment(user=people.operator_a, trial=glow, kind="photo", caption=f"{GLOW} at 60 s",
                                         upload=SimpleUploadedFile(f"{GLOW}-dish.png", PNG))

    # An image measurement of A's trial, its file named by the condition (as an operator might name it).
    frames = [{"t_s": 0.0, "clusters": 1, "largest_fraction": 1.0, "worm_area_px": 900, "largest_area_px": 900}]
    measurement = ImageMeasurement.objects.create(
        trial=glow, source="photos", sha256="0" * 64, threshold=0.5, window_s=600, frames_total=1, frames_done=1,
        frames=frames, status="done", censored=True, finished_at=days_ago(9), requested_by=people.operator_a,
        files=[{"attachment": attachment.pk, "name": attachment.name, "sha256": "0" * 64, "size_bytes": len(PNG)}])

    services.claim_slot(user=people.operator_b, study=study, slot=slot_of[PULSE])
    electrical = {"kind": Stimulus.ELECTRICAL, "wavelength_nm": None, "irradiance_mw_cm2": None, "duration_s": None,
                  "voltage_v": 7.77, "electrode_gap_cm": 2.5, "pulse_width_ms": 10.0, "pulse_count": 20}
    pulse = services.record_trial(  # an hour after A's trial on the same cohort: the rest limit needs an override
        user=people.operator_b, study=study, slot=slot_of[PULSE], dish=glow.dish,  # the same animals
        values=uv_values(at=days_ago(8.95), **electrical),
        override_reason="Nebula-override: second dish of the morning, agreed with the welfare officer").trial
    services.claim_slot(user=people.operator_b, study=study, slot=slot_of[SHAM])  # claimed, not yet run
    booking = services.book(user=people.owner, protocol=protocol, tank=cohort.origin_tank, animals=5,
                            needed_on=today())
    period_report = PeriodReport.objects.create(  # an issued period report over the trials' days
        period_from=today() - timedelta(days=12), period_to=today(), scope=PeriodReport.Scope.STUDY,
        scope_key=study.code, scope_label=f"Study {study.code}", issued_by=people.manager, manifest="",
        manifest_sha256="0" * 64)
    return SimpleNamespace(people=people, protocol=protocol, cohort=cohort, study=study, glow=glow, pulse=pulse,
                           period_report=period_report,
                           attachment=attachment, measurement=measurement, booking=booking, trials=[glow, pulse], slot_of=slot_of,
                           deviation=Deviation.objects.get())


# What each person may see while the study is blind: the trials they ran, the slots they claimed.
VISIBLE = {
    "operator_a": ({GLOW}, UV_SECRETS),
    "operator_b": ({PULSE, SHAM}, ELECTRICAL_SECRETS),
}


def _forbidden(persona: str) -> list[str]:
    labels, values = VISIBLE.get(persona, (set(), ()))
    return [c for c in (GLOW, PULSE, SHAM) if c not in labels] + \
        [v for v in UV_SECRETS + ELECTRICAL_SECRETS if v not in values]


# --- the URLs: from the resolver, so that a new page is covered automatically --------------------------------
def _values(name: str, param: str, w) -> list:
    if param == "code":
        return [w.study.code]
    if param == "kind":
        return ["km", "dose"]
    if param == "fmt":
        return ["svg", "png"]
    if param == "slot":
        return sorted(w.slot_of.values())
    if param == "action":
        return ["exclude", "void"]
    if param == "pk":
        by_name = {"attachment-add": w.trials, "attachment": [w.attachment], "measurement-new": w.trials,
                   "dish-new": [w.cohort], "dish-end": [w.cohort]}
        by_prefix = {"protocol": [w.protocol], "booking": [w.booking], "cohort": [w.cohort], "trial": w.trials,
                     "measurement": [w.measurement], "dish": [w.glow.dish], "period": [w.period_report]}
        objects = by_name.get(name) or by_prefix.get(name.split("-")[0])
        if objects:
            return [o.pk for o in objects]
    raise AssertionError(f"Give this test values for <{param}> of experiments:{name}.")


def experiments_urls(w) -> list[str]:
    urls = []
    for pattern in get_resolver("experiments.urls").url_patterns:
        combos = [{}]
        for param in pattern.pattern.converters:
            combos = [{**c, param: v} for c in combos for v in _values(pattern.name, param, w)]
        urls += [reverse(f"experiments:{pattern.name}", kwargs=c) for c in combos]
    study = w.study.code
    return urls + [  # the query strings that change what a page shows
        reverse("experiments:study-chart", args=[study, "km", "svg"]) + "?download=1",
        reverse("experiments:ledger") + "?kind=uv", reverse("experiments:ledger") + "?kind=electrical",
        reverse("experiments:ledger-csv") + "?kind=uv", reverse("experiments:ledger") + "?overridden=on",
        reverse("experiments:trial-new", args=[study]) + f"?slot={w.slot_of[SHAM]}",
        *(reverse("experiments:period-report") + f"?period_from={today() - timedelta(days=12)}&period_to={today()}"
          + scope for scope in ("&scope=facility", f"&scope=study&study={study}",
                                f"&scope=protocol&protocol={w.protocol.reference}")),
    ]


def admin_urls(w) -> list[str]:
    urls = [reverse("admin:index")]
    for model, model_admin in admin.site._registry.items():
        if model._meta.app_label != "experiments":
            continue
        info = f"admin:{model._meta.app_label}_{model._meta.model_name}"
        urls += [reverse(f"{info}_changelist"), reverse(f"{info}_changelist") + "?q=Obsidian",
                 reverse(f"{info}_changelist") + "?o=1.2.3.4.5"]
        for obj in model._default_manager.all():
            urls += [reverse(f"{info}_change", args=[obj.pk]), reverse(f"{info}_history", args=[obj.pk])]
            for version in getattr(obj, "history", model.objects.none()).all():
                urls.append(reverse(f"{info}_simple_history", args=[obj.pk, version.pk]))
    deviation = w.deviation
    return urls + [reverse("admin:colonies_deviation_change", args=[deviation.pk]),
                   reverse("admin:colonies_deviation_history", args=[deviation.pk])]


def colonies_urls(w) -> list[str]:
    tank = w.cohort.origin_tank.code
    return [reverse("colonies:deviation-detail", args=[w.deviation.pk]), reverse("colonies:deviation-register"),
            reverse("colonies:deviation-csv"), reverse("colonies:tank-detail", args=[tank]),
            reverse("colonies:tank-history", args=[tank])]


def _body(response) -> str:
    content = b"".join(response.streaming_content) if response.streaming else response.content
    text = content.decode("utf-8", errors="replace")
    # SVG charts keep each line of text as a comment (matplotlib); headers carry download file names.
    return text + "\n" + " ".join(re.findall(r"<!-- (.*?) -->", text)) + "\n" + \
        "\n".join(f"{k}: {v}" for k, v in response.headers.items())


def _leaks(client, urls, forbidden) -> dict[str, list[str]]:
    found = {}
    for url in urls:
        response = client.get(url)
        assert response.status_code < 500, url
        body = _body(response)
        leaked = [s for s in forbidden if s in body]
        if leaked:
            found[url] = leaked
    return found


def test_the_url_list_comes_from_the_resolver_and_covers_every_page(world):
    urls = experiments_urls(world)
    names = {p.name for p in get_resolver("experiments.urls").url_patterns}
    assert {get_resolver().resolve(u.split("?")[0]).url_name for u in urls} == names
    assert len(names) >= 25


@pytest.mark.parametrize("persona", PERSONAS)
def test_no_route_shows_a_condition_or_stimulus_to_a_person_blinded_to_it(client, world, persona):
    client.force_login(getattr(world.people, persona))
    urls = experiments_urls(world) + admin_urls(world) + colonies_urls(world)
    assert _leaks(client, urls, _forbidden(persona)) == {}


@pytest.mark.parametrize("persona", PERSONAS)
def test_a_trial_page_shows_its_stimulus_caution_only_to_its_operator(client, world, persona):
    # The UV caution on a trial page would tell a blinded reader that it was the ultraviolet condition.
    client.force_login(getattr(world.people, persona))
    glow = client.get(world.glow.get_absolute_url()).content.decode()
    pulse = client.get(world.pulse.get_absolute_url()).content.decode()
    assert (CAUTION_UV in glow) == (persona == "operator_a")
    assert (CAUTION_ELECTRICAL in pulse) == (persona == "operator_b")


def test_the_operator_sees_the_trials_they_ran_and_the_slot_they_claimed(client, world):
    a, b = world.people.operator_a, world.people.operator_b
    client.force_login(a)
    trial_page = client.get(world.glow.get_absolute_url()).content.decode()
    assert GLOW in trial_page and "2.345" in trial_page and CAUTION_UV in trial_page
    assert f"{GLOW}-dish.png" in trial_page and f"{GLOW} at 60 s" in trial_page
    study_page = client.get(world.study.get_absolute_url()).content.decode()
    assert GLOW in study_page and PULSE not in study_page
    csv_text = b"".join(client.get(reverse("experiments:study-csv", args=[world.study.code])).streaming_content)
    assert GLOW in csv_text.decode() and "Nebula-override" not in csv_text.decode()
    client.force_login(b)
    new_trial = client.get(reverse("experiments:trial-new", args=[world.study.code])).content.decode()
    assert SHAM in new_trial and GLOW not in new_trial  # the slot B claimed; the open glow slot shows its code only
    assert "Nebula-override" in client.get(world.pulse.get_absolute_url()).content.decode()


def test_a_blinded_attachment_downloads_under_its_code(client, world):
    client.force_login(world.people.owner)
    response = client.get(world.attachment.get_absolute_url())
    assert f'filename="{world.glow.code}-file-{world.attachment.pk}.png"' in response["Content-Disposition"]
    client.force_login(world.people.operator_a)
    response = client.get(world.attachment.get_absolute_url())
    assert f'filename="{GLOW}-dish.png"' in response["Content-Disposition"]


@pytest.mark.parametrize("persona", ["owner", "technician", "manager", "operator_a"])
def test_after_unblinding_everyone_sees(client, world, persona):
    services.unblind(user=world.people.owner, study=world.study, reason="All planned trials run and scored", password="pw")
    client.force_login(getattr(world.people, persona))
    study_page = client.get(world.study.get_absolute_url()).content.decode()
    assert all(c in study_page for c in (GLOW, PULSE, SHAM)) and "Dispersal by condition" in study_page
    pulse_page = client.get(world.pulse.get_absolute_url()).content.decode()
    assert "7.77 V" in pulse_page and "Nebula-override" in pulse_page
    glow_page = client.get(world.glow.get_absolute_url()).content.decode()
    assert "2.345" in glow_page and f"{GLOW}-dish.png" in glow_page
    assert GLOW in b"".join(client.get(reverse("experiments:study-csv", args=[world.study.code]))
                            .streaming_content).decode()
    if persona in ("manager", "operator_a"):
        admin_page = client.get(reverse("admin:experiments_trial_change", args=[world.pulse.pk])).content.decode()
        assert PULSE in admin_page and "7.77" in admin_page
        history = client.get(reverse("admin:experiments_trial_history", args=[world.glow.pk])).content.decode()
        assert "2.345" in history
