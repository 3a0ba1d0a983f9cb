"""Reading the change history (django-simple-history tables) for display."""
from django.contrib.auth import get_user_model
from django.db.models import IntegerField, Q, Value

from vermilog.lab_time import moment_formatter

from .models import Census, Check, DeadRemoval, Feeding, Split, SplitPart, WaterChange

MOMENT = "d M Y H:i:s"  # to the second: several versions of a record are often saved within a minute
FIELD_SKIP = {"flags", "history_id", "history_date", "history_change_reason", "history_type", "history_user"}
TYPE_WORD = {"+": "created", "~": "changed", "-": "deleted"}


def _entries_for(history_qs, label):
    # Who: the user's id here, the users themselves in one query for the page (page_entries); a join per
    # record type built a User for each of a page's 200 versions (~4 ms of the page).
    entries = list(history_qs.order_by("id", "-history_date"))
    by_object: dict[int, list] = {}
    for h in entries:
        by_object.setdefault(h.id, []).append(h)
    out = []
    for versions in by_object.values():
        versions.sort(key=lambda h: (h.history_date, h.history_id))
        prev = None
        for h in versions:
            changes = []
            if prev is not None:
                changes = [(c.field, c.old, c.new) for c in h.diff_against(prev).changes if c.field not in FIELD_SKIP]
            out.append({"when": h.history_date, "who": h.history_user_id, "what": f"{label} #{h.id}",
                        "action": _action(h, prev),
                        "reason": h.history_change_reason or "", "changes": changes, "object_id": h.id,
                        "history_id": h.history_id})
            prev = h
    return out


def _action(h, prev) -> str:
    voided_now = getattr(h, "voided_at", None) is not None
    voided_before = prev is not None and getattr(prev, "voided_at", None) is not None
    if voided_now and not voided_before:
        return "voided"
    return TYPE_WORD.get(h.history_type, h.history_type)


def history_sources(tank) -> list[tuple[str, object]]:
    """(label, history queryset) of the tank and of every record type shown in its history."""
    split_ids = SplitPart.history.filter(destination_id=tank.pk).values("split_id")
    return [
        ("Tank", tank.history.all()),
        ("Tank target", tank.target_overrides.model.history.filter(tank_id=tank.pk)),
        *((label, model.history.filter(tank_id=tank.pk)) for model, label in (
            (Check, "Check"), (Feeding, "Feeding"), (WaterChange, "Water change"), (Census, "Census"),
            (DeadRemoval, "Dead removed"))),
        ("Split", Split.history.filter(Q(source_id=tank.pk) | Q(id__in=split_ids))),
        ("Split part", SplitPart.history.filter(Q(destination_id=tank.pk) | Q(split__source_id=tank.pk))),
    ]


def history_index(tank, sources=None):
    """Every version of the tank and its records (splits included) as (source, history_id, date) rows,
    newest first: one UNION query, so a Paginator counts and slices it in the database. `sources`: history_sources(tank),
    when the caller has it already (building them is a quarter of the page's query work)."""
    parts = [qs.annotate(history_source=Value(i, IntegerField()))
             .values_list("history_source", "history_id", "history_date")
             .order_by() for i, (_, qs) in enumerate(sources or history_sources(tank))]
    return parts[0].union(*parts[1:], all=True).order_by("-history_date", "history_source", "-history_id")


def page_entries(tank, rows, sources=None) -> list[dict]:
    """The displayed entries for one page of history_index() rows, each with its changes since the
    version before. One query per record type on the page (all versions of the objects it shows), and one
    for the people who made them."""
    sources = sources or history_sources(tank)
    wanted: dict[int, set[int]] = {}
    for source, history_id, _ in rows:
        wanted.setdefault(source, set()).add(history_id)
    by_key = {}
    for source, ids in wanted.items():
        label, qs = sources[source]
        objects = qs.filter(history_id__in=ids).values("id")
        for entry in _entries_for(qs.filter(id__in=objects), label):
            if entry["history_id"] in ids:
                by_key[(source, entry["history_id"])] = entry
    entries = [by_key[(source, history_id)] for source, history_id, _ in rows]
    users = get_user_model().objects.in_bulk({e["who"] for e in entries if e["who"] is not None})
    when = moment_formatter(MOMENT)  # the format parsed once: a |date filter per row took 7-14 ms of a 200-row page
    for e in entries:
        e["who"] = users.get(e["who"])  # None: a change made by no one signed in (shown as "system")
        e["when_text"] = when(e["when"])
    return entries


def record_history(tank) -> list[dict]:
    """Every version of the tank and of its records, newest first (all of them; tests and small uses)."""
    return page_entries(tank, list(history_index(tank)))
