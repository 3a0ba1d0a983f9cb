"""Husbandry for many tanks: one screen to record a feeding, a water change or the dead animals removed
for a room, a rack or the tanks due, each row pre-filled and editable, saved all or none."""
from django.contrib import messages
from django.http import Http404, HttpResponseBadRequest
from django.shortcuts import get_object_or_404, redirect, render
from django.urls import reverse
from django.utils import timezone
from django.utils.http import urlencode
from django.views.decorators.http import require_http_methods

from . import batch, services
from .batch_forms import TICK
from .forms import ObservedAtForm
from .idempotency import once_per_submission
from .models import Room
from .roles import TECHNICIAN, role_required
from .round_post import ROWS_FIELD, PayloadError, round_data

WHEN_PREFIX = "batch"


@require_http_methods(["GET", "POST"])
@role_required(TECHNICIAN)
@once_per_submission
def batch_entry(request, kind):
    kind = batch.KINDS.get(kind) or _unknown()
    room = get_object_or_404(Room, code=request.GET["room"]) if request.GET.get("room") else None
    rack, due = request.GET.get("rack", "").strip(), request.GET.get("due") == "1" and bool(kind.due_key)
    scope = []
    if request.method == "POST":
        try:
            data = round_data(request.POST)
        except PayloadError as error:
            return HttpResponseBadRequest(f"{error} Nothing was saved.", content_type="text/plain; charset=utf-8")
        saved, when, rows = _save(request, kind, data)
        if saved is not None:
            return saved
    else:
        scope = batch.load_tanks(kind, room=room)
        tanks = batch.select(kind, scope, rack=rack, due=due)
        when, rows = ObservedAtForm(prefix=WHEN_PREFIX), batch.build_rows(kind, tanks)
    ctx = {"kind": kind, "room": room, "rack": rack, "due": due, "rows": rows, "when": when, "rows_field": ROWS_FIELD,
           "tank_codes": ",".join(row["tank"].code for row in rows), "links": _links(kind, room, rack, due, scope),
           "errors": [m for row in rows for errs in row["errors"].values() for m in errs]}
    return render(request, "colonies/batch.html", ctx, status=400 if request.method == "POST" else 200)


def _links(kind, room, rack, due, scope) -> dict[str, list[tuple[str, str, bool]]]:
    """(label, address, is current) for each way to change the selection: the kind, the room, the rack, due or all."""
    def url(k=kind, r=room, rk=rack, d=due):
        query = urlencode({k_: v for k_, v in (("room", r.code if r else ""), ("rack", rk if r else ""),
                                                ("due", "1" if d and k.due_key else "")) if v})
        return reverse("colonies:batch", args=[k.slug]) + (f"?{query}" if query else "")
    links = {"kinds": [(k.title, url(k=k), k == kind) for k in batch.KINDS.values()],
             "rooms": [("All rooms", url(r=None), room is None)]
             + [(r.name, url(r=r, rk=""), room is not None and r.pk == room.pk) for r in Room.objects.all()],
             "racks": [], "due": []}
    if room and scope:
        links["racks"] = [("All racks", url(rk=""), not rack)] + [(r, url(rk=r), r == rack) for r in batch.racks(scope)]
    if kind.due_key and scope:
        n_due, n_all = (len(batch.select(kind, scope, rack=rack, due=d)) for d in (True, False))
        links["due"] = [(f"Due ({n_due})", url(d=True), due), (f"All tanks ({n_all})", url(d=False), not due)]
    return links


def _unknown():
    raise Http404("Unknown kind of record; allowed: " + ", ".join(batch.KINDS) + ".")


def _save(request, kind, data):
    """Validate the wanted rows (ticked, or typed in for removals) and save them all, or none.

    Returns (redirect, None, None) when saved, else (None, the time form, the rows to show again).
    """
    listed = [c.strip() for c in data.get("tanks", "").split(",") if c.strip()]
    codes = set(listed) | _prefixes(data, batch.ROW_FIELDS[kind.slug])
    tanks = {t.code: t for t in batch.load_tanks(kind, codes=codes)}
    unknown = sorted(codes - set(tanks))
    wanted = [c for c in tanks if not kind.ticked or data.get(f"{c}-{TICK}")]
    forms = {c: kind.form(data, tank=tanks[c]) for c in wanted}
    when = ObservedAtForm(data, prefix=WHEN_PREFIX)
    valid = when.is_valid() & all([f.is_valid() for f in forms.values()])
    entries = [f for f in forms.values() if valid and f.has_entry()]
    if valid and entries and not unknown and when.check_started([f.tank for f in entries]):
        observed_at = when.cleaned_data.get("observed_at") or timezone.now()
        saved = services.record_batch(user=request.user, records=[f.build(user=request.user, observed_at=observed_at)
                                                                  for f in entries])
        messages.success(request, f"Saved {len(saved)} {kind.plural if len(saved) != 1 else kind.noun}: "
                                  f"{_codes(f.tank.code for f in entries)}.")
        return redirect(request.get_full_path()), None, None
    for code in unknown:
        messages.error(request, f"Tank code '{code}' does not exist or is retired; allowed: the codes of tanks in use. "
                                "Nothing was saved.")
    if valid and not entries:
        messages.error(request, "Nothing was saved: no row was " + ("ticked with values in it." if kind.ticked
                                                                    else "filled in."))
    else:
        messages.error(request, "Nothing was saved. Correct the fields marked below and save again.")
    shown = [tanks[c] for c in dict.fromkeys(listed) if c in tanks] or list(tanks.values())
    return None, when, batch.build_rows(kind, shown, posted=data, forms=forms)


def _codes(codes, shown: int = 12) -> str:
    codes = list(codes)
    more = f" and {len(codes) - shown} more" if len(codes) > shown else ""
    return ", ".join(codes[:shown]) + more


def _prefixes(data, fields) -> set[str]:
    """Tank codes that posted fields refer to ("LV-03-amount" -> "LV-03")."""
    codes = set()
    for key in data:
        prefix, _, name = key.rpartition("-")
        if prefix and name in fields:
            codes.add(prefix)
    return codes
