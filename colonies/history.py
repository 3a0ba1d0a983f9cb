"""Reading the change history (django-simple-history tables) for display.

A history page reads one or more *sources*: (label, history queryset, fields hidden from the viewer).
`history_index(sources)` is every version as one UNION query (a Paginator counts and slices it in
the database); `page_entries(sources, rows)` turns a page of it into entries whose changes are
written by colonies/history_format.py (labels, units, values the lab's way). The tank's history
(`tank_sources`) and every other record's page use the same two functions.
"""
from collections import defaultdict
from collections.abc import Callable
from typing import NamedTuple

from django.db import models
from django.db.models import IntegerField, Q, Value
from simple_history.utils import get_m2m_reverse_field_name

from vermilog.lab_time import moment_formatter

from . import history_format
from . import derived
from .models import (CareTarget, Census, Check, DeadRemoval, Feeding, MeasurementPlan, Split, SplitPart,
                     TankMeasurementPlan, WaterChange)

FIELD_SKIP = {"flags", "history_id", "history_date", "history_change_reason", "history_type", "history_user"}
TYPE_WORD = {"+": "created", "~": "changed", "-": "deleted"}


class Source(NamedTuple):
    label: str
    versions: models.QuerySet  # a history model's queryset
    hidden: frozenset = frozenset()  # fields the viewer may not see (experiments/blinding.py)
    name: Callable | None = None  # version -> how the entry names its record (default: "<label> #<id>")


def diff(new, old, skip=frozenset(), m2m=None) -> list[tuple[str, object, object]]:
    """(field, old value, new value) of every field that changed between two versions (FKs as ids).
    Many-to-many fields (a tank's lineage) from `m2m`, {(history_id, field): ids}, read by `_m2m_ids`
    in one query per field for all versions: the library's diff reads them twice per version."""
    m2m_names = [f.name for f in new._history_m2m_fields]
    changes = [(c.field, c.old, c.new)
               for c in new.diff_against(old, excluded_fields={*m2m_names, *skip, *FIELD_SKIP}).changes]
    for name in m2m_names:
        before, after = (m2m or {}).get((old.history_id, name), ()), (m2m or {}).get((new.history_id, name), ())
        if before != after and name not in skip:
            changes.append((name, before, after))
    return changes


def _m2m_ids(history_model, versions) -> dict[tuple[int, str], tuple]:
    """{(history_id, m2m field): sorted ids of the related rows in that version}: one query per field."""
    out: dict[tuple[int, str], tuple] = {}
    for field in history_model._history_m2m_fields:
        meta = history_model._meta  # the library names the version's through table <HistoricalModel>_<field>
        through = meta.apps.get_model(meta.app_label, f"{history_model.__name__}_{field.name}")
        target = get_m2m_reverse_field_name(field)
        rows = through.objects.filter(history_id__in=[v.history_id for v in versions]).values_list(
            "history_id", f"{target}_id").order_by("history_id", f"{target}_id")
        for history_id, related_id in rows:
            out[(history_id, field.name)] = out.get((history_id, field.name), ()) + (related_id,)
    return out


def readable(model, raw_lists) -> list[list[history_format.Change]]:
    """Each list of raw changes written readably. Related rows are named with one query per related
    model over all the lists (never one per change)."""
    wanted: dict[type, set] = defaultdict(set)
    for changes in raw_lists:
        for name, old, new in changes:
            field = model._meta.get_field(name)
            if isinstance(field, models.ForeignKey):
                wanted[field.related_model].update(v for v in (old, new) if v is not None)
            elif isinstance(field, models.ManyToManyField):
                wanted[field.related_model].update((*old, *new))
    related = {}
    for related_model, ids in wanted.items():
        for pk, obj in related_model._default_manager.select_related().in_bulk(ids).items():
            related[(related_model, pk)] = str(obj)
    return [[history_format.change(model, name, old, new, related) for name, old, new in changes]
            for changes in raw_lists]


def _entries_for(source: Source) -> list[dict]:
    # The time written with the lab's format parsed once (vermilog.lab_time.moment_formatter): a |date filter
    # per row took 7-14 ms of a 200-row page at 400 tanks (benchmark), the same text.
    when = moment_formatter()
    entries = list(source.versions.select_related("history_user").order_by("id", "-history_date"))
    m2m = _m2m_ids(source.versions.model, entries) if entries and entries[0]._history_m2m_fields else {}
    by_object: dict[int, list] = {}
    for h in entries:
        by_object.setdefault(h.id, []).append(h)
    out = []
    for versions in by_object.values():
        versions.sort(key=lambda h: (h.history_date, h.history_id))
        prev = None
        for h in versions:
            out.append({"when": h.history_date, "when_text": when(h.history_date), "who": h.history_user,
                        "who_name": h.history_user.get_username() if h.history_user else "system",
                        "what": source.name(h) if source.name else f"{source.label} #{h.id}",
                        "action": _action(h, prev), "reason": h.history_change_reason or "",
                        "changes": [] if prev is None else diff(h, prev, source.hidden, m2m),
                        "object_id": h.id, "history_id": h.history_id})
            prev = h
    model = source.versions.model.instance_type
    for entry, changes in zip(out, readable(model, [e["changes"] for e in out])):
        entry["changes"] = changes
    return out


def _action(h, prev) -> str:
    voided_now = getattr(h, "voided_at", None) is not None
    voided_before = prev is not None and getattr(prev, "voided_at", None) is not None
    if voided_now and not voided_before:
        return "voided"
    return TYPE_WORD.get(h.history_type, h.history_type)


def tank_sources(tank) -> list[Source]:
    """The tank and every record type shown in its history."""
    split_ids = SplitPart.history.filter(destination_id=tank.pk).values("split_id")
    return [
        Source("Tank", tank.history.all()),
        Source("Tank target", tank.target_overrides.model.history.filter(tank_id=tank.pk)),
        Source("Tank measurement plan", TankMeasurementPlan.history.filter(tank_id=tank.pk)),
        *(Source(label, model.history.filter(tank_id=tank.pk)) for model, label in (
            (Check, "Check"), (Feeding, "Feeding"), (WaterChange, "Water change"), (Census, "Census"),
            (DeadRemoval, "Dead removed"))),
        Source("Split", Split.history.filter(Q(source_id=tank.pk) | Q(id__in=split_ids))),
        Source("Split part", SplitPart.history.filter(Q(destination_id=tank.pk) | Q(split__source_id=tank.pk))),
    ]


def species_sources(species) -> list[Source]:
    """The species' care profile: the species row, its care targets and its measurement plans."""
    return [
        Source("Species", species.history.all(), name=lambda h: "Care profile"),
        Source("Care target", CareTarget.history.filter(species_id=species.pk),
               name=lambda h: f"Care target: {derived.label_for(h.parameter).label_with_unit}"),
        Source("Measurement plan", MeasurementPlan.history.filter(species_id=species.pk),
               name=lambda h: f"Measurement plan: {derived.label_for(h.parameter).label_with_unit}"),
    ]


def _as_sources(subject) -> list[Source]:
    return subject if isinstance(subject, list) else tank_sources(subject)


def history_index(subject):
    """Every version of the sources (or of a tank and its records) as (source, history_id, date) rows,
    newest first: one UNION query, so a Paginator counts and slices it in the database."""
    parts = [source.versions.annotate(history_source=Value(i, IntegerField()))
             .values_list("history_source", "history_id", "history_date")
             .order_by() for i, source in enumerate(_as_sources(subject))]
    if len(parts) == 1:
        return parts[0].order_by("-history_date", "-history_id")
    return parts[0].union(*parts[1:], all=True).order_by("-history_date", "history_source", "-history_id")


def page_entries(subject, rows) -> list[dict]:
    """The displayed entries for one page of history_index() rows, each with its changes since the
    version before. One query per source on the page (all versions of the objects it shows) and one
    per related model its changes name."""
    sources = _as_sources(subject)
    wanted: dict[int, set[int]] = {}
    for source, history_id, _ in rows:
        wanted.setdefault(source, set()).add(history_id)
    by_key = {}
    for index, ids in wanted.items():
        source = sources[index]
        objects = source.versions.filter(history_id__in=ids).values("id")
        for entry in _entries_for(source._replace(versions=source.versions.filter(id__in=objects))):
            if entry["history_id"] in ids:
                by_key[(index, entry["history_id"])] = entry
    return [by_key[(index, history_id)] for index, history_id, _ in rows]


def record_history(subject) -> list[dict]:
    """Every version of the sources (or of a tank and its records), newest first (all; tests and small uses)."""
    return page_entries(subject, list(history_index(subject)))


def versions_of(label: str, versions, hidden=frozenset(), limit: int | None = None, no_user: str = "") -> list[dict]:
    """The newest `limit` (or all) versions of one record, for the history section of its own page.
    Loads those and the one before them only (a deviation may have hundreds of versions, each with
    its evidence list). `no_user`: who made a version saved by no person (the deviation rules)."""
    hidden = frozenset(hidden)
    newest = versions.order_by("-history_date", "-history_id").values_list("history_id", flat=True)
    ids = list(newest if limit is None else newest[:limit + 1])
    source = Source(label, versions.filter(history_id__in=ids).defer(*hidden), hidden)
    entries = sorted(_entries_for(source), key=lambda e: (e["when"], e["history_id"]), reverse=True)
    entries = entries if limit is None else entries[:limit]
    for entry in entries:
        if no_user and entry["who"] is None:
            entry["who_name"] = no_user
    return entries
