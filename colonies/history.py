"""Reading the change history (django-simple-history tables) for display."""
from django.db.models import Q

from .models import Census, Check, Feeding, Split, SplitPart, WaterChange

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
                        "reason": h.history_change_reason or "", "changes": changes, "object_id": h.id})
            prev = h
    return out


def _action(h, prev) -> str:
    voided_now = getattr(h, "voided_at", None) is not None
    voided_before = prev is not None and getattr(prev, "voided_at", None) is not None
    if voided_now and not voided_before:
        return "voided"
    return TYPE_WORD.get(h.history_type, h.history_type)


def record_history(tank) -> list[dict]:
    """Every version of the tank and of its records (splits included), newest first.

    A fixed number of queries (one per record type), whatever the number of records; the page
    shows them in pages, nothing is cut off.
    """
    entries = _entries_for(tank.history.all(), "Tank")
    entries += _entries_for(tank.target_overrides.model.history.filter(tank_id=tank.pk), "Tank target")
    for model, label in ((Check, "Check"), (Feeding, "Feeding"), (WaterChange, "Water change"), (Census, "Census")):
        entries += _entries_for(model.history.filter(tank_id=tank.pk), label)
    split_ids = SplitPart.history.filter(destination_id=tank.pk).values("split_id")
    entries += _entries_for(Split.history.filter(Q(source_id=tank.pk) | Q(id__in=split_ids)), "Split")
    entries += _entries_for(SplitPart.history.filter(Q(destination_id=tank.pk) | Q(split__source_id=tank.pk)),
                            "Split part")
    entries.sort(key=lambda e: e["when"], reverse=True)
    return entries
