"""The many-tanks screen's data: what each kind of record needs, which tanks a selection holds, and each
row's HTML (colonies/batch_views.py is the view).

A selection is a room, a rack in it (the tank position's text before its first comma, Tank.rack) and
optionally only the tanks due (Tank.due()). Tanks and their last entry of the kind come in two queries
whatever their number; rows are built as one string each, as the round does (colonies/round_rows.py),
since a facility-wide screen has 400 rows.
"""
from dataclasses import dataclass

from django.db.models import OuterRef, Subquery
from django.utils import timezone
from django.utils.dateformat import format as date_format
from django.utils.html import format_html, format_html_join
from django.utils.safestring import mark_safe

from . import prefill
from .batch_forms import TICK, FeedingRow, RemovalRow, RowForm, WaterChangeRow
from .models import DeadRemoval, Feeding, Room, Tank, WaterChange
from .validators import MAX_TEXT


@dataclass(frozen=True)
class Input:
    name: str
    label: str
    kind: str = "text"  # text, decimal, whole or select
    size: str = ""  # a CSS class: "short" for numbers and units
    maxlength: int | None = None


@dataclass(frozen=True)
class Kind:
    slug: str  # in the address
    title: str  # "Feeding"
    noun: str  # "feeding", as in "the last feeding"
    plural: str  # "feedings"
    model: type
    form: type[RowForm]
    inputs: tuple[Input, ...]
    due_key: str = ""  # the item of Tank.due() that says the tank is due; "" for no schedule
    prefill: object = None  # prefill.feeding or prefill.water_change; None offers nothing

    @property
    def ticked(self) -> bool:
        return self.form.ticked_rows


NOTE = Input("note", "Note", maxlength=MAX_TEXT)
KINDS = {k.slug: k for k in (
    Kind("feeding", "Feeding", "feeding", "feedings", Feeding, FeedingRow,
         (Input("food", "Food", maxlength=80), Input("amount", "Amount", "decimal", "short"),
          Input("unit", "Unit", "select", "short"), NOTE),
         due_key="feeding", prefill=prefill.feeding),
    Kind("water-change", "Water change", "water change", "water changes", WaterChange, WaterChangeRow,
         (Input("percent", "Percent of volume", "decimal", "short"), Input("litres", "Litres", "decimal", "short"),
          Input("source_water", "Source water", maxlength=80), NOTE),
         due_key="water_change", prefill=prefill.water_change),
    Kind("dead-removed", "Dead removed", "removal", "removals", DeadRemoval, RemovalRow,
         (Input("count", "Dead removed", "whole", "short"), NOTE)),
)}
ROW_FIELDS = {k.slug: frozenset(i.name for i in k.inputs) | {TICK} for k in KINDS.values()}


def load_tanks(kind: Kind, *, room: Room | None = None, codes=None) -> list[Tank]:
    """Tanks in use (in the room, or with these codes), each with `last` (its newest current record of the
    kind, or None) and the time Tank.due() reads for the kind. Two queries whatever the number of tanks."""
    tanks = Tank.objects.in_use().in_room(room).select_related("room", "species")
    if codes is not None:
        tanks = tanks.filter(code__in=list(codes))
    if kind.prefill is not None or kind.due_key:
        newest = kind.model.objects.current().filter(tank=OuterRef("pk")).order_by("-observed_at", "-pk")
        tanks = tanks.annotate(**{f"last_{kind.due_key}_at": Subquery(newest.values("observed_at")[:1]),
                                  "last_pk": Subquery(newest.values("pk")[:1])})
    tanks = list(tanks.order_by("room__code", "position", "code"))
    wanted = [t.last_pk for t in tanks if getattr(t, "last_pk", None)]
    last = kind.model.objects.in_bulk(wanted) if wanted else {}
    for tank in tanks:
        tank.last = last.get(getattr(tank, "last_pk", None))
    return tanks


def due_item(kind: Kind, tank: Tank, now) -> dict | None:
    if not kind.due_key:
        return None
    return next(item for item in tank.due(now) if item["key"] == kind.due_key)


def racks(tanks) -> list[str]:
    return sorted({t.rack for t in tanks if t.rack})


def select(kind: Kind, tanks, *, rack: str = "", due: bool = False, now=None) -> list[Tank]:
    now = now or timezone.now()
    return [t for t in tanks if (not rack or t.rack == rack) and (not due or due_item(kind, t, now)["is_due"])]


# ---------------------------------------------------------------------------------------------
# Rows
# ---------------------------------------------------------------------------------------------
def initial(kind: Kind, tank: Tank) -> tuple[dict, str]:
    """The values a row starts with and where they come from."""
    if kind.prefill is None:
        return {}, ""
    offer = kind.prefill(tank.species, tank.last)
    return offer.values, offer.text(kind.noun)


def build_rows(kind: Kind, tanks, *, posted=None, forms=None, now=None) -> list[dict]:
    """One dict per tank: the tank, its HTML and its errors. `posted` (the submitted data) replaces the
    pre-filled values after a refusal; `forms` (validated rows by tank code) give the errors."""
    now = now or timezone.now()
    forms = forms or {}
    rows = []
    for tank in tanks:
        form = forms.get(tank.code)
        errors = {name: list(errs) for name, errs in form.errors.items()} if form is not None else {}
        values, source = initial(kind, tank)
        item = due_item(kind, tank, now)
        if posted is not None:
            values = {i.name: posted.get(f"{tank.code}-{i.name}", "") for i in kind.inputs}
            ticked = bool(posted.get(f"{tank.code}-{TICK}"))
        else:
            ticked = bool(item and item["is_due"])
        rows.append({"tank": tank, "errors": errors,
                     "html": _row(kind, tank, values, errors, ticked, source, item)})
    return rows


def _row(kind, tank, values, errors, ticked, source, item) -> str:
    code = tank.code
    tick = format_html('<label class="tick"><input type="checkbox" name="{}-{}"{}> Record</label>', code, TICK,
                       mark_safe(" checked") if ticked else "") if kind.ticked else ""
    cells = format_html_join("", "{}", ((_input(code, i, values.get(i.name, ""), errors.get(i.name)),)
                                        for i in kind.inputs))
    meta = [_due_text(item), source]
    messages = format_html_join("", '<div class="errorbox">{}</div>',
                                ((m,) for errs in errors.values() for m in errs))
    # A group named by the tank's code (not a fieldset: its legend cannot sit beside the inputs on a wide screen).
    return format_html(
        '<div class="batchrow{}" id="tank-{}" role="group" aria-labelledby="name-{}"><div class="batchrow-title">'
        '<a class="code" id="name-{}" href="{}">{}</a> <span class="where">{}</span><div class="batchrow-meta">{}</div>'
        '</div><div class="batchrow-fields">{}{}</div>{}</div>',
        " has-error" if errors else "", code, code, code, tank.get_absolute_url(), code, tank.position,
        format_html_join(" · ", "{}", ((m,) for m in meta if m)), tick, cells, messages)


def _due_text(item) -> str:
    if item is None:
        return ""
    if item["due_at"] is None:
        return mark_safe('<span class="pill due">due (never done)</span>')
    when = date_format(timezone.localtime(item["due_at"]), "j M H:i")
    if item["is_due"]:
        return format_html('<span class="pill due">{} since {}</span>', "overdue" if item["is_overdue"] else "due", when)
    return format_html("next by {}", when)


def _input(code: str, spec: Input, value, errors) -> str:
    name = f"{code}-{spec.name}"
    invalid = mark_safe(' aria-invalid="true"') if errors else ""
    if spec.kind == "select":
        options = format_html_join("", '<option value="{}"{}>{}</option>', (
            (v, mark_safe(" selected") if v == value else "", label) for v, label in Feeding.Unit.choices))
        field = format_html('<select name="{}"{}>{}</select>', name, invalid, options)
    else:
        mode = {"decimal": ' inputmode="decimal"', "whole": ' inputmode="numeric"'}.get(spec.kind, "")
        limit = format_html(' maxlength="{}"', spec.maxlength) if spec.maxlength else ""
        field = format_html('<input type="text" name="{}" value="{}"{}{}{} autocomplete="off">', name, value,
                            mark_safe(mode), limit, invalid)
    return format_html('<label class="{}">{} {}</label>', spec.size or "wide", spec.label, field)
