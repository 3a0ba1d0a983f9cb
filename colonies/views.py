import html
from datetime import timedelta

from django.contrib import messages
from django.contrib.auth.decorators import login_not_required
from django.core.exceptions import PermissionDenied
from django.core.paginator import Paginator
from django.db.models import Count, Q, prefetch_related_objects
from django.http import FileResponse, Http404, HttpResponse, HttpResponseBadRequest
from django.shortcuts import get_object_or_404, redirect, render
from django.urls import reverse
from django.utils import timezone
from django.utils.html import escape
from django.utils.safestring import mark_safe
from django.views.decorators.http import require_GET, require_http_methods, require_POST

from . import (batch, check_export, derived, due_readings, health_forms, health_series, history_format, parameters, prefill,
               round_rows, services)
from . import labels as labels_module
from . import today_hooks
from .export_stream import csv_response
from .filters import CheckFilter, TankFilter
from .flags import describe
from .forms import (CareTargetFormSet, CensusForm, CheckEntryForm, FeedingForm, MeasurementPlanFormSet, ObservedAtForm, ReasonForm,
                    SpeciesForm, WaterChangeForm)
from .history import history_index, page_entries, species_sources, tank_sources, versions_of
from .models import (Census, Check, DeadRemoval, Deviation, Feeding, Room, Species, Submission, Tank, WaterChange, pk_url_writer,
                     tank_url_writer)
from .idempotency import once_per_submission
from .round_post import ROWS_FIELD, PayloadError, filled_codes, round_data
from .roles import MANAGER, RESEARCHER, TECHNICIAN, can_record_husbandry, role_required
from vermilog.lab_time import moment_formatter

READ_ROLES = (TECHNICIAN, RESEARCHER)
VOIDABLE = {"check": Check, "feeding": Feeding, "water-change": WaterChange, "census": Census,
            "dead-removed": DeadRemoval}


def _get_tank(code: str) -> Tank:
    return get_object_or_404(Tank.objects.select_related("room", "species"), code=code)


# ---------------------------------------------------------------------------------------------
# Overview
# ---------------------------------------------------------------------------------------------
@require_GET
@role_required(*READ_ROLES)
def home(request):
    """Today: per room, what is due or overdue, round progress, and unresolved deviations."""
    now = timezone.now()
    today = timezone.localdate()
    rooms = {}
    tanks = list(Tank.objects.in_use().select_related("room", "species").with_last_events().with_last_measured()
                 .prefetch_related("species__measurement_plans").order_by("room__code", "code"))
    readings_due = due_readings.due_by_tank(tanks, now)
    for tank in tanks:
        entry = rooms.setdefault(tank.room_id, {"room": tank.room, "tanks": 0, "checked_today": 0, "readings": {},
                                                "due": {}, "deviations": [], "missing_actions": 0})
        for key in readings_due[tank.pk]:
            entry["readings"][key] = entry["readings"].get(key, 0) + 1
        entry["tanks"] += 1
        if tank.last_check_at and timezone.localtime(tank.last_check_at).date() == today:
            entry["checked_today"] += 1
        for item in tank.due(now):
            if item["is_due"]:
                entry["due"].setdefault(item["label"], []).append({"tank": tank, "overdue": item["is_overdue"]})
    since = now - timedelta(days=round_rows.MISSING_ACTION_DAYS)
    for room_id, n in (Check.objects.needing_action().filter(observed_at__gte=since, tank__room__in=list(rooms))
                       .values("tank__room").annotate(n=Count("pk")).values_list("tank__room", "n")):
        rooms[room_id]["missing_actions"] = n
    for entry in rooms.values():
        entry["percent"] = round(100 * entry["checked_today"] / entry["tanks"]) if entry["tanks"] else 0
        entry["n_readings"] = sum(entry["readings"].values())
        entry["readings"] = [(parameters.BY_KEY[k].short, n) for k, n in sorted(
            entry["readings"].items(), key=lambda kv: parameters.KEYS.index(kv[0]))]
        entry["due"] = [(label, items, _tank_pills(items))
                        for label, items in sorted(entry["due"].items(), key=lambda kv: DUE_ORDER.index(kv[0]))]
    unresolved = list(Deviation.objects.unresolved().select_related("tank__room").defer("evidence")  # not shown here
                      .order_by("-severity", "-last_seen_at"))
    by_severity = {s.value: 0 for s in Deviation.Severity}
    for dev in unresolved:
        by_severity[dev.severity] += 1
        if dev.tank_id and dev.tank.room_id in rooms:
            rooms[dev.tank.room_id]["deviations"].append(dev)
    ctx = {
        "rooms": list(rooms.values()), "now": now, "missing_action_days": round_rows.MISSING_ACTION_DAYS,
        "severity_counts": [(label, by_severity[value], value) for value, label in reversed(Deviation.Severity.choices)],
        "deviations": unresolved[:25], "n_unresolved": len(unresolved),
        "notices": today_hooks.notices(today),  # e.g. protocols expiring soon (the trials app provides them)
    }
    return render(request, "colonies/home.html", ctx)


DUE_ORDER = ["Daily check", "Feeding", "Water change", "Census"]


def _tank_pills(items) -> str:
    """One link per tank due: built in one call, since Today lists every tank of a facility (1,000+ links)."""
    return mark_safe(" ".join(
        f'<a href="{escape(it["tank"].get_absolute_url())}" class="pill{" due" if it["overdue"] else ""}">'
        f'{escape(it["tank"].code)}</a>' for it in items))


# ---------------------------------------------------------------------------------------------
# The daily round
# ---------------------------------------------------------------------------------------------
ROUND_FIELDS = frozenset(parameters.KEYS) | frozenset(services.OBSERVATION_FIELDS)


def _posted_codes(post) -> set[str]:
    """Every tank code the submitted round refers to: the listed codes and any field's prefix."""
    codes = {c.strip() for c in post.get("tanks", "").split(",") if c.strip()}
    for key in post:
        prefix, _, field = key.rpartition("-")
        if prefix and field in ROUND_FIELDS:
            codes.add(prefix)
    return codes


@require_http_methods(["GET", "POST"])
@role_required(*READ_ROLES)
@once_per_submission
def round_view(request, room_code=None):
    room = get_object_or_404(Room, code=room_code) if room_code else None
    if request.method == "POST":
        if not can_record_husbandry(request.user):
            raise PermissionDenied("Only technicians and managers record the round.")
        try:
            data = round_data(request.POST)
        except PayloadError as error:
            return HttpResponseBadRequest(f"{error} Nothing was saved.", content_type="text/plain; charset=utf-8")
        saved, when, checked = _save_round(request, room, data)
        if saved is not None:
            return saved
    else:
        data, when, checked = None, ObservedAtForm(prefix="round"), {}
    # Shown again after a refusal: the validated rows keep their errors, the others their posted values.
    tanks = list(Tank.objects.for_round().in_room(room))
    bound = checked if data is None else {t.code: checked.get(t.code) or CheckEntryForm(data, tank=t, prefix=t.code)
                                          for t in tanks if t.code in checked or _row_posted(data, t.code)}
    now = timezone.now()
    rows = round_rows.build_rows(tanks, bound, due=due_readings.due_by_tank(tanks, now), now=now,
                                 actions=round_rows.missing_actions((t.pk for t in tanks), now),
                                 editable=can_record_husbandry(request.user))
    ctx = {
        "room": room, "rooms": Room.objects.all(), "rows": rows, "when": when, "n_due": sum(len(r["due"]) for r in rows),
        "saved_keys": _saved_round_keys(request.user, now),
        "tank_codes": ",".join(row["tank"].code for row in rows), "rows_field": ROWS_FIELD,
    }
    return render(request, "colonies/round.html", ctx, status=400 if data is not None else 200)


def _saved_round_keys(user, now) -> str:
    """The keys of this person's rounds the server has saved lately: the page script marks the rounds it kept on
    the device with these keys as sent (a round is recorded once whatever the page shows: see idempotency.py)."""
    keys = (Submission.objects.filter(user=user, path__startswith=reverse("colonies:round"), created_at__gte=now - timedelta(days=7))
            .exclude(result_url="").values_list("key", flat=True)[:SAVED_KEYS_SHOWN])
    return ",".join(str(k) for k in keys)


SAVED_KEYS_SHOWN = 50


@require_GET
@login_not_required  # static code, no data: the browser fetches it to update the worker
def round_service_worker(request):
    """The round's service worker (templates/colonies/round-sw.js), served under /round/ so that it may control
    the round pages: it keeps the last copy of each round page and its files for a reload without network."""
    response = render(request, "colonies/round-sw.js", {"version": ROUND_SW_VERSION},
                      content_type="text/javascript; charset=utf-8")
    response["Cache-Control"] = "no-cache"
    return response


ROUND_SW_VERSION = "1"  # bump when the worker's caching changes: the old caches are dropped on activation


def _save_round(request, room, data):
    """Validate and save the filled rows only (forms for them alone).

    Returns (redirect, None, {}) when saved, else (None, the time form, the validated forms by code).

    Every posted tank code must be a tank in use in scope, otherwise nothing is saved.
    """
    in_scope = set(Tank.objects.in_use().in_room(room).values_list("code", flat=True))
    unknown = sorted(_posted_codes(data) - in_scope)
    filled = filled_codes(data, ROUND_FIELDS, Check.OBSERVATION_DEFAULTS) & in_scope
    tanks = Tank.objects.for_round().in_room(room).filter(code__in=filled)
    forms = [CheckEntryForm(data, tank=t, prefix=t.code) for t in tanks]
    when = ObservedAtForm(data, prefix="round")
    valid = when.is_valid() & all([f.is_valid() for f in forms])
    valid = valid and when.check_started([f.tank for f in forms if f.has_entry()])
    if valid and not unknown:
        rows = [(f.tank, f.row()) for f in forms if f.has_entry()]
        saved = services.record_round(user=request.user, rows=rows, observed_at=when.moment())
        _flash_round(request, saved)
        return redirect(request.path), None, {}
    for code in unknown:
        messages.error(request, f"Tank code '{code}' does not exist or is retired; allowed: the codes of "
                                f"tanks in use {'in ' + room.name if room else 'in any room'}. Nothing was saved.")
    messages.error(request, "Nothing was saved. Correct the fields marked below and save again.")
    return None, when, {f.tank.code: f for f in forms}


def _flash_round(request, saved):
    flagged = sum(1 for c in saved if c.flags)
    missing_action = sum(1 for c in saved if c.needs_corrective_action)
    msg = f"Saved {len(saved)} check{'s' if len(saved) != 1 else ''}; {flagged} with flagged values."
    if missing_action:
        messages.warning(request, msg + f" {missing_action} still need a corrective-action note.")
    else:
        messages.success(request, msg)


def _row_posted(data, code: str) -> bool:
    prefix = code + "-"
    return any(key.startswith(prefix) for key in data)


# ---------------------------------------------------------------------------------------------
# Tanks
# ---------------------------------------------------------------------------------------------
@require_GET
@role_required(*READ_ROLES)
def tank_list(request):
    tank_filter = TankFilter(request.GET, queryset=Tank.objects.with_last_check())
    tanks = tank_filter.qs  # in the context for tests and templates; the rows below read plain values
    return render(request, "colonies/tank_list.html", {"filter": tank_filter, "tanks": tanks, "rows": _tank_rows(tanks),
                                                       "batch_links": [(k.slug, k.title) for k in batch.KINDS.values()]})


# data-label: the column's name, shown beside each value when the table stacks on a phone (vermilog.css).
TANK_ROW = ('<tr><td class="row-head wide" data-label="Code"><a href="{}">{}</a></td><td data-label="Room">{}</td>'
            '<td data-label="Position">{}</td><td data-label="Species">{}</td>'
            '<td data-label="Status"><span class="pill {}">{}</span></td><td class="num" data-label="Volume (L)">{}</td>'
            '<td data-label="System">{}</td><td data-label="Last check">{}</td></tr>')
TANK_ROW_FIELDS = ("code", "room__name", "position", "species__common_name", "species__scientific_name", "status",
                   "volume_l", "system", "last_check_at")


def _tank_rows(tanks) -> str:
    """The list's table body in one call (a template loop costs ~0.1 ms a row; a facility lists 400+).

    Measured at 400 tanks (CPU, whole page 57 -> ~20 ms): plain values instead of tank, room and species
    instances (-15 ms), the date format parsed once (lab_time.moment_formatter, -20 ms), html.escape
    instead of format_html per row with room and species names escaped once (-5 ms), the tank address
    pattern looked up once (tank_url_writer, -3 ms)."""
    last = moment_formatter("SHORT_DATETIME_FORMAT")
    tank_url = tank_url_writer()
    status, system = dict(Tank.Status.choices), dict(Tank.System.choices)
    names = {}  # a room's or species' escaped name, once per list

    def name(text):
        if text not in names:
            names[text] = html.escape(text)
        return names[text]
    return mark_safe("".join(TANK_ROW.format(
        html.escape(tank_url(code)), html.escape(code), name(room), html.escape(position),
        name(common or scientific), html.escape(st), html.escape(status.get(st, st)), volume,
        html.escape(system.get(sy, sy)), last(last_at) if last_at else "never")
        for code, room, position, common, scientific, st, volume, sy, last_at
        in tanks.values_list(*TANK_ROW_FIELDS)))


@require_GET
@role_required(*READ_ROLES)
def tank_labels(request):
    """A printable sheet of tank labels (code, species, place, QR code to the tank page)."""
    tank_filter = TankFilter(request.GET or {"status": Tank.Status.ACTIVE},
                             queryset=Tank.objects.select_related("room", "species"))
    labels = [{"tank": t, "qr": mark_safe(labels_module.qr_svg(request.build_absolute_uri(t.get_absolute_url())))}
              for t in tank_filter.qs.order_by("room__code", "code")]
    return render(request, "colonies/tank_labels.html", {"filter": tank_filter, "labels": labels})


def _tank_page_ctx(request, tank, **forms):
    # One tank, not a round: for_round()'s 24 subqueries cost 17 ms of query building (CPU) for one row. The latest
    # check, feeding, water change and census are the first of the records this page lists anyway (newest first,
    # current only, as with_last_events() reads them); the latest readings the check form's hints need take one small
    # query (Tank.last_readings); the care targets two prefetches. Tank page CPU 105 -> see the commit message.
    prefetch_related_objects([tank], "species__targets", "target_overrides")
    checks = list(tank.check_set.current().select_related("recorded_by")[:30])
    feedings = list(tank.feeding_set.current().select_related("recorded_by")[:10])
    water_changes = list(tank.waterchange_set.current().select_related("recorded_by")[:10])
    censuses = list(tank.census_set.current().select_related("recorded_by")[:10])
    for name, records in (("check", checks), ("feeding", feedings), ("water_change", water_changes),
                          ("census", censuses)):
        setattr(tank, f"last_{name}_at", records[0].observed_at if records else None)
    in_use = tank.status != Tank.Status.RETIRED
    if in_use:  # the record form's hints (a retired tank has no form)
        tank.__dict__.update(tank.last_readings(derived.EQUIVALENT_INPUTS))
    summary = health_series.tank_summary(tank)  # population, growth, forecast, mortality, splits: fixed queries
    split_form, part_forms = health_forms.split_forms(tank, latest=summary.latest.value if summary.latest else None)
    params = tank.relevant_parameters()
    columns = params + derived.for_habitat(tank.species.habitat)
    targets = tank.care_targets()  # prefetched above: no extra queries
    rows = []
    check_url = pk_url_writer("colonies:check-detail")
    for c in checks:
        c.tank = tank
        values = c.values()
        rows.append({"check": c, "url": check_url(c.pk), "cells": [{"param": p, "value": p.format(values.get(p.key)),
                                            "side": (c.flags.get(p.key) or {}).get("side")} for p in columns],
                     "flag_text": _flag_text(c)})
    deviations = list(tank.deviations.unresolved().order_by("-severity", "-last_seen_at"))
    for deviation in deviations:
        deviation.tank = tank  # the page's tank, not a join and a copy per deviation
    ctx = {
        "tank": tank,
        "due": tank.due() if in_use else [],  # as before: nothing is due on a retired tank
        "params": columns,
        "targets": [(p, targets.get(p.key)) for p in columns],
        "deviations": deviations,
        "rows": rows, "recent_rows": rows[:RECENT_CHECKS_SHOWN], "earlier_rows": rows[RECENT_CHECKS_SHOWN:],
        "figure_days": TANK_FIGURE_DAYS,
        "feedings": feedings,
        "water_changes": water_changes,
        "censuses": censuses,
        # Lists, not querysets: read here rather than by the template, so that the template's own cost stays its own.
        "removals": list(tank.deadremoval_set.current().select_related("recorded_by")[:10]),
        "check_form": forms.get("check_form") or CheckEntryForm(tank=tank, prefix="check"),
        "feeding_form": forms.get("feeding_form") or _prefilled(FeedingForm(prefix="feeding"), prefill.feeding(
            tank.species, feedings[0] if feedings else None), "feeding", "food"),
        "water_form": forms.get("water_form") or _prefilled(WaterChangeForm(prefix="water"), prefill.water_change(
            tank.species, water_changes[0] if water_changes else None), "water change", "percent"),
        "census_form": forms.get("census_form") or CensusForm(prefix="census"),
        "batch_links": [(k.slug, k.title) for k in batch.KINDS.values()],
        "parents": list(tank.founded_from.all()),
        "offspring": list(tank.offspring.all()),
        "summary": summary,
        "split_form": forms.get("split_form") or split_form,
        "part_forms": forms.get("part_forms") or part_forms,
    }
    ctx["split_first"] = "split_form" in forms  # a refused split: its form and errors at the top
    ctx["sections"], ctx["jump"] = tank_sections(request.user, tank, deviations, split_first=ctx["split_first"])
    return ctx


def _prefilled(form, offer: prefill.Prefill, what: str, first_field: str):
    """The form with the offered values, and where they come from as the first field's help."""
    form.initial.update(offer.values)
    form.fields[first_field].help_text = f"Pre-filled {offer.text(what)}." if offer.source else ""
    return form


# The tank page's sections (templates/colonies/tank/_<name>.html) in the order each person needs them:
# who records starts with the forms (always first in tank_detail.html), then what is due and wrong;
# who only reads starts with the population summary and the figure. Jump links lead to each.
RECENT_CHECKS_SHOWN = 10  # the rest of the 30 are one tap away (a phone showed 30 checks in 5 screens)
TANK_FIGURE_DAYS = 120  # the health page's default period too (health_views.DEFAULT_PLOT_DAYS): one cached figure for both
SECTION_LABELS = {"record": "Record", "due": "Due", "deviations": "Deviations", "checks": "Checks",
                  "population": "Population", "figure": "Figure", "husbandry": "Husbandry", "split": "Split",
                  "about": "About"}
# The split form is long and rarely used: its own section near the end, not among the daily forms.
RECORDER_ORDER = ("due", "deviations", "checks", "population", "figure", "husbandry", "split", "about")
READER_ORDER = ("population", "figure", "checks", "deviations", "due", "husbandry", "about")


def tank_sections(user, tank, deviations, split_first: bool = False) -> tuple[list[str], list[tuple[str, str]]]:
    """(section names in order, jump links (anchor = section name, label)). The template places the
    record section first (and before it the split section when `split_first`)."""
    records = can_record_husbandry(user) and tank.status != Tank.Status.RETIRED
    order = [name for name in (RECORDER_ORDER if records else READER_ORDER)
             if (name != "deviations" or deviations) and (name != "split" or not split_first)]
    top = (["split"] if split_first and records else []) + (["record"] if records else [])
    jump = [(name, SECTION_LABELS[name] + (f" ({len(deviations)})" if name == "deviations" else ""))
            for name in top + order]
    return order, jump


@require_GET
@role_required(*READ_ROLES)
def tank_detail(request, code):
    tank = _get_tank(code)
    return render(request, "colonies/tank_detail.html", _tank_page_ctx(request, tank))


@require_POST
@role_required(TECHNICIAN)
@once_per_submission
def tank_add(request, code, kind):
    tank = _get_tank(code)
    if tank.status == Tank.Status.RETIRED:
        messages.error(request, f"Tank {tank.code} is retired; records can no longer be added.")
        return redirect(tank)
    user = request.user
    if kind == "check":
        form = CheckEntryForm(request.POST, tank=tank, prefix="check")
        if form.is_valid() and form.has_entry():
            check = services.record_check(user=user, tank=tank, row=form.row())
            _flash_check(request, check)
            return redirect(tank)
        if form.is_valid():
            form.add_error(None, "Enter at least one reading or observation.")
        forms = {"check_form": form}
    elif kind == "feeding":
        form = FeedingForm(request.POST, prefix="feeding", instance=Feeding(tank=tank, recorded_by=user))
        if form.is_valid():
            services.record_feeding(user=user, feeding=form.instance)
            messages.success(request, f"Feeding of {tank.code} saved.")
            return redirect(tank)
        forms = {"feeding_form": form}
    elif kind == "water-change":
        form = WaterChangeForm(request.POST, prefix="water", instance=WaterChange(tank=tank, recorded_by=user))
        if form.is_valid():
            services.record_water_change(user=user, change=form.instance)
            messages.success(request, f"Water change of {tank.code} saved.")
            return redirect(tank)
        forms = {"water_form": form}
    elif kind == "census":
        form = CensusForm(request.POST, prefix="census", instance=Census(tank=tank, recorded_by=user))
        if form.is_valid():
            census = services.record_census(user=user, census=form.instance)
            messages.success(request, f"Census of {tank.code} saved: about {census.estimate:.0f} animals "
                                      f"({census.estimate_lower:.0f}–{census.estimate_upper:.0f}).")
            return redirect(tank)
        forms = {"census_form": form}
    else:
        raise Http404("Unknown record type.")
    messages.error(request, "Nothing was saved. Correct the fields marked below.")
    return render(request, "colonies/tank_detail.html", _tank_page_ctx(request, tank, **forms), status=400)


def _flag_text(check) -> list[str]:
    return [describe(k, v) for k, v in check.flags.items() if k in parameters.BY_KEY or k in derived.BY_KEY]


def _flash_check(request, check):
    if check.flags:
        text = "; ".join(describe(k, v) for k, v in check.flags.items())
        level = messages.warning if check.needs_corrective_action else messages.info
        level(request, f"Check of {check.tank.code} saved with flags: {text}."
                       + (" Please add a corrective action." if check.needs_corrective_action else ""))
    else:
        messages.success(request, f"Check of {check.tank.code} saved; all readings within care targets.")


@require_GET
@role_required(*READ_ROLES)
def tank_history(request, code):
    tank = _get_tank(code)
    # Counted and sliced in the database; only the page's versions (and the ones before them) are loaded.
    sources = tank_sources(tank)  # built once: building them is a quarter of the page's query work
    page = Paginator(history_index(sources), HISTORY_PAGE_SIZE).get_page(request.GET.get("page"))
    return render(request, "colonies/history.html", {"tank": tank, "entries": page_entries(sources, page.object_list),
                                                     "page": page})


HISTORY_PAGE_SIZE = 200


# ---------------------------------------------------------------------------------------------
# One check: view, correct, void
# ---------------------------------------------------------------------------------------------
@require_GET
@role_required(*READ_ROLES)
def check_detail(request, pk):
    check = get_object_or_404(Check.objects.select_related("tank__species", "recorded_by", "voided_by"), pk=pk)
    params = check.tank.relevant_parameters()
    return render(request, "colonies/check_detail.html", {
        "check": check, "entries": versions_of("Check", check.history.all()), "params": params,
        "flag_text": _flag_text(check),
        "cells": [{"param": p, "value": p.format(check.values().get(p.key)),
                   "side": (check.flags.get(p.key) or {}).get("side")}
                  for p in params + derived.for_habitat(check.tank.species.habitat)],
    })


@require_http_methods(["GET", "POST"])
@role_required(TECHNICIAN)
@once_per_submission
def check_edit(request, pk):
    check = get_object_or_404(Check.objects.select_related("tank__species"), pk=pk)
    if check.is_voided:
        messages.error(request, "A voided check cannot be changed.")
        return redirect(check)
    tank = Tank.objects.prefetch_related("species__targets", "target_overrides").select_related("species").get(pk=check.tank_id)
    check.tank = tank
    initial = {p.key: p.format(getattr(check, p.key)) for p in tank.relevant_parameters()}
    initial.update({f: getattr(check, f) for f in services.OBSERVATION_FIELDS})
    form = CheckEntryForm(request.POST or None, tank=tank, prefix="check", initial=initial)
    reason = ReasonForm(request.POST or None)
    if request.method == "POST" and form.is_valid() & reason.is_valid():
        services.update_check(user=request.user, check=check, row=form.row(), reason=reason.cleaned_data["reason"])
        messages.success(request, f"Check corrected; the earlier values stay in its history.")
        return redirect(check)
    return render(request, "colonies/check_edit.html", {"check": check, "form": form, "reason": reason,
                                                        "entries": versions_of("Check", check.history.all())},
                  status=400 if request.method == "POST" else 200)


@require_http_methods(["GET", "POST"])
@role_required(TECHNICIAN)
@once_per_submission
def record_void(request, kind, pk):
    model = VOIDABLE.get(kind)
    if model is None:
        raise Http404("Unknown record type.")
    record = get_object_or_404(model.objects.select_related("tank"), pk=pk)
    if record.is_voided:
        messages.info(request, f"{record} is already voided.")
        return redirect(record.tank)
    form = ReasonForm(request.POST or None)
    if request.method == "POST" and form.is_valid():
        services.void_record(user=request.user, record=record, reason=form.cleaned_data["reason"])
        messages.success(request, f"Voided: {record}. It stays in the tank's history.")
        return redirect(record.tank)
    return render(request, "colonies/void.html", {"record": record, "form": form, "kind": kind,
                                                  "entries": versions_of(model._meta.verbose_name.capitalize(),
                                                                         record.history.all())},
                  status=400 if request.method == "POST" else 200)


# ---------------------------------------------------------------------------------------------
# Species care profiles
# ---------------------------------------------------------------------------------------------
@require_GET
@role_required(*READ_ROLES)
def species_list(request):
    species = Species.objects.annotate(n_tanks=Count("tanks", filter=~Q(tanks__status=Tank.Status.RETIRED)))
    return render(request, "colonies/species_list.html", {"species_list": species})


@require_GET
@role_required(*READ_ROLES)
def species_detail(request, pk):
    species = get_object_or_404(Species, pk=pk)
    targets = {t.parameter: t for t in species.targets.all()}
    # Measured parameters, then the values derived from them (a target on DO % saturation or NH3).
    rows = [(p, targets.get(p.key), getattr(p, "method", "")) for p in
            (*species.relevant_parameters(), *derived.for_habitat(species.habitat))]
    plans = [(parameters.BY_KEY[key], plan) for key, plan in species.plans().items()]
    sources = species_sources(species)
    changes = Paginator(history_index(sources), SPECIES_HISTORY_PAGE_SIZE).get_page(request.GET.get("page"))
    return render(request, "colonies/species_detail.html", {
        "species": species, "rows": rows, "plans": plans,
        "sources": [(history_format.key_label(Species, k), v) for k, v in sorted(species.sources.items())],
        "entries": page_entries(sources, changes.object_list), "page": changes})


SPECIES_HISTORY_PAGE_SIZE = 50


@require_http_methods(["GET", "POST"])
@role_required(MANAGER)
@once_per_submission
def species_edit(request, pk):
    species = get_object_or_404(Species, pk=pk)
    form = SpeciesForm(request.POST or None, instance=species)
    targets = CareTargetFormSet(request.POST or None, instance=species, prefix="targets")
    plans = MeasurementPlanFormSet(request.POST or None, instance=species, prefix="plans")
    reason = ReasonForm(request.POST or None)
    if request.method == "POST" and form.is_valid() & targets.is_valid() & plans.is_valid() & reason.is_valid():
        services.save_reference(user=request.user, obj=form.save(commit=False),
                                rows=targets.save(commit=False) + plans.save(commit=False),
                                reason=reason.cleaned_data["reason"])
        messages.success(request, f"Care profile of {species} updated.")
        return redirect(species)
    return render(request, "colonies/species_edit.html", {"species": species, "form": form, "targets": targets,
                                                           "plans": plans, "reason": reason},
                  status=400 if request.method == "POST" else 200)


# ---------------------------------------------------------------------------------------------
# Export
# ---------------------------------------------------------------------------------------------
@require_GET
@role_required(*READ_ROLES)
def checks_csv(request):
    """All checks matching the filter, one row each; columns come from the parameter registry."""
    return csv_response(check_export.csv_text(_check_export(request)), "vermilog-checks.csv")


@require_GET
@role_required(*READ_ROLES)
def checks_xlsx(request):
    """The same table as the CSV, as a spreadsheet (one sheet; times in UTC), built in a temporary file."""
    return FileResponse(check_export.write_xlsx(_check_export(request)), as_attachment=True,
                        filename="vermilog-checks.xlsx",
                        content_type="application/vnd.openxmlformats-officedocument.spreadsheetml.sheet")


def _check_export(request):
    """The checks matching the request's filter (rows are built by colonies.check_export)."""
    return CheckFilter(request.GET, queryset=Check.objects.all()).qs
