"""Reading the change history (django-simple-history tables) for display."""
from django.db.models import IntegerField, Q, Value

from .models import Census, Check, DeadRemoval, Feeding, Split, SplitPart, WaterChange

FIELD_SKIP = {"flags", "history_id", "history_date", "history_change_reason", "history_type", "history_user"}
TYPE_WORD = {"+": "created", "~": "changed", "-": "deleted"}


def _entries_for(history_qs, label):
    entries = list(history_qs.select_related("history_user").order_by("id", "-history_date"))
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
            out.append({"when": h.history_date, "who": h.history_user, "what": f"{label} #{h.id}",
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


def _sources(tank) -> list[tuple[str, object]]:
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


def history_index(tank):
    """Every version of the tank and its records (splits included) as (source, history_id, date) rows,
    newest first: one UNION query, so a Paginator counts and slices it in the database."""
    parts = [qs.annotate(history_source=Value(i, IntegerField()))
             .values_list("history_source", "history_id", "history_date")
             .order_by() for i, (_, qs) in enumerate(_sources(tank))]
    return parts[0].union(*parts[1:], all=True).order_by("-history_date", "history_source", "-history_id")


def page_entries(tank, rows) -> list[dict]:
    """The displayed entries for one page of history_index() rows, each with its changes since the
    version before. One query per record type on the page (all versions of the objects it shows)."""
    sources = _sources(tank)
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
    return [by_key[(source, history_id)] for source, history_id, _ in rows]


def record_history(tank) -> list[dict]:
    """Every version of the tank and of its records, newest first (all of them; tests and small uses)."""
    return page_entries(tank, list(history_index(tank)))
