"""The rows of the daily round, built as HTML in one pass per tank.

The round of a whole facility is hundreds of tanks with a dozen inputs each (6,400 inputs at 400 tanks).
Rendered through Django's form widgets and a row template, each input costs about a millisecond (the
widget template engine and a template node per attribute): 3.9 s for the all-rooms round. Here each
row is one string built from values computed once per species and parameter, so the page costs what the
HTML costs. The same builder shows a refused round again: the bound forms' values and errors go in.

Validation stays in `forms.CheckEntryForm` (one per filled row on save); the attributes the page
script reads (`data-low`/`data-high`/`data-target`, `data-min`/`data-max`) come from
`forms.reading_attrs`, the function the form's own widgets use, so the two cannot disagree.
"""
from collections.abc import Iterable
from datetime import datetime
from html import escape

from django.utils.safestring import SafeString
from django.utils.timesince import timesince

from . import derived
from .flags import limit_text, out_of_target
from .forms import CheckEntryForm, reading_attrs
from .models import Check, Tank

MARKS = {"high": "▲", "low": "▼"}
WORDS = {"high": "above", "low": "below"}
OBSERVATION_SELECTS = (("activity", "Activity", Check.Activity.choices), ("clarity", "Water", Check.Clarity.choices),
                       ("odour", "Odour", Check.Odour.choices))
FLAGGED_ATTR = ' class="was-flagged"'
OBSERVATION_BOXES = (("clumping", "Clumping"), ("surface_film", "Film / mould"))


def _attrs(pairs: Iterable[tuple[str, object]]) -> str:
    return "".join(f' {k}="{escape(str(v))}"' for k, v in pairs if v is not None)


def build_rows(tanks: Iterable[Tank], forms: dict[str, CheckEntryForm], now: datetime) -> list[dict]:
    """One row dict per tank: the tank, its bound form (if the round was refused), its cells and its HTML."""
    targets_by_species: dict[int, dict] = {}
    rows = []
    for tank in tanks:
        species_targets = targets_by_species.get(tank.species_id)
        if species_targets is None:
            species_targets = targets_by_species[tank.species_id] = tank.species_targets()
        targets = {**species_targets, **tank.override_targets()}
        rows.append(_row(tank, targets, forms.get(tank.code), now))
    return rows


def _row(tank: Tank, targets: dict, form: CheckEntryForm | None, now: datetime) -> dict:
    habitat = tank.species.habitat
    params = tank.relevant_parameters()
    last = {p.key: getattr(tank, f"last_{p.key}", None) for p in params}
    equivalents = derived.raw_equivalents(targets, last, habitat)
    posted = _posted(form)
    errors = form.errors if form is not None else {}
    cells = []
    for p in params:
        target = targets.get(p.key)
        value = posted.get(p.key, "")
        cells.append({
            "param": p, "value": value, "errors": errors.get(p.key, ()),
            "last": p.format(last[p.key]), "last_side": out_of_target(last[p.key], target),
            "target": limit_text(target, p.unit) if target else "",
            "target_full": target.text(p.unit) if target else "",
            "side": out_of_target(_number(value), target),
            "attrs": reading_attrs(tank, p, target or equivalents.get(p.key)),
        })
    derived_last = []
    for d, value in zip(derived.for_habitat(habitat), derived.derive(last, habitat).values()):
        if value is not None:
            derived_last.append({"d": d, "value": d.format(value), "side": out_of_target(value, targets.get(d.key))})
    row = {"tank": tank, "form": form, "cells": cells, "derived": derived_last,
           "flagged": any(c["side"] for c in cells), "errors": bool(errors)}
    row["html"] = SafeString(_html(row, posted, errors, now))
    return row


def _posted(form: CheckEntryForm | None) -> dict[str, str]:
    """What was typed in a refused round, by field name (prefix removed)."""
    if form is None or not form.is_bound:
        return {}
    prefix = form.prefix + "-"
    return {k[len(prefix):]: v for k, v in form.data.items() if k.startswith(prefix)}


def _number(text: str) -> float | None:
    try:
        return float(str(text).strip().replace(",", "."))
    except ValueError:
        return None


def _html(row: dict, posted: dict, errors: dict, now: datetime) -> str:
    tank = row["tank"]
    code = tank.code
    species = tank.species.common_name or tank.species.scientific_name
    where = tank.position or tank.room.name
    status = (f' · <span class="pill {escape(tank.status)}">{escape(tank.get_status_display())}</span>'
              if tank.status != Tank.Status.ACTIVE else "")
    last_check = (f"last check {timesince(tank.last_check_at, now)} ago" if getattr(tank, "last_check_at", None)
                  else "never checked")
    classes = "tankrow" + (" has-error" if errors else "") + (" has-flag" if row["flagged"] else "")
    out = [f'<fieldset class="{classes}" id="tank-{escape(code)}" data-tank="{escape(code)}">'
           f'<div class="tankrow-title"><a class="code" href="{escape(tank.get_absolute_url())}">{escape(code)}</a> '
           f'<span class="small">{escape(species)}</span> <span class="small muted">{escape(where)}{status}</span> '
           f'<span class="small muted">{last_check}</span></div><div class="tankrow-body">']
    out += _errorbox(errors.get("__all__", ()))
    out.append('<div class="readings">')
    for cell in row["cells"]:
        out.append(_reading_cell(code, cell))
    out.append("</div>")
    if row["derived"]:
        parts = [f'<span{FLAGGED_ATTR if x["side"] else ""} title="{escape(x["d"].method)}">'
                 f'{escape(x["d"].short)} {x["value"]} {escape(x["d"].unit)}'
                 f'{" " + MARKS[x["side"]] if x["side"] else ""}</span>' for x in row["derived"]]
        out.append('<div class="derived-line small muted">From last values: ' + " · ".join(parts) + "</div>")
    out.append('<div class="observations">')
    out.append(_select(code, *OBSERVATION_SELECTS[0], posted))
    dead = posted.get("dead_removed", "")
    out.append(f'<label>Dead removed <input type="number" name="{escape(code)}-dead_removed"'
               f'{_attrs([("value", dead or None)])} id="id_{escape(code)}-dead_removed"></label>')
    for spec in OBSERVATION_SELECTS[1:]:
        out.append(_select(code, *spec, posted))
    for name, label in OBSERVATION_BOXES:
        checked = " checked" if posted.get(name) not in (None, "", "false", "off") else ""
        out.append(f'<div class="check"><label><input type="checkbox" name="{escape(code)}-{name}" '
                   f'id="id_{escape(code)}-{name}"{checked}> {label}</label></div>')
    out.append("</div>")
    for name in ("activity", "dead_removed", "clumping", "surface_film", "odour", "clarity"):
        out += _errorbox(errors.get(name, ()))
    out.append('<div class="note-line">')
    out.append(_text(code, "note", "Note", posted))
    out.append('<div class="action-line">' + _text(code, "corrective_action", "What did you do about the flagged value?",
                                                    posted) + "</div>")
    out += _errorbox(errors.get("note", ())) + _errorbox(errors.get("corrective_action", ()))
    out.append("</div></div></fieldset>")
    return "".join(out)


def _reading_cell(code: str, cell: dict) -> str:
    p = cell["param"]
    name = f"{code}-{p.key}"
    title = p.label_with_unit + (f"; target {cell['target_full']}" if cell["target_full"] else "")
    unit = f' <span class="muted">{escape(p.unit)}</span>' if p.unit else ""
    live = f"{MARKS[cell['side']]} {WORDS[cell['side']]} {cell['target']}" if cell["side"] else ""
    last = ""
    if cell["last"]:
        last = f"last {cell['last']}" + (f" {MARKS[cell['last_side']]}" if cell["last_side"] else "")
    last_class = "last was-flagged" if cell["last_side"] else "last"
    return (f'<div class="reading-cell"><label for="id_{escape(name)}" title="{escape(title)}">{escape(p.short)}{unit}</label>'
            f'<input type="text" name="{escape(name)}"{_attrs([("value", cell["value"] or None)])}{_attrs(cell["attrs"].items())}'
            f' id="id_{escape(name)}">'
            f'<span class="live" aria-live="polite">{escape(live)}</span>'
            f'<span class="{last_class}">{escape(last)}</span>{"".join(_errorbox(cell["errors"]))}</div>')


def _select(code: str, name: str, label: str, choices, posted: dict) -> str:
    chosen = posted.get(name, "")
    options = "".join(f'<option value="{escape(v)}"{" selected" if v == chosen else ""}>{escape(str(text))}</option>'
                      for v, text in [("", "—"), *choices])
    return f'<label>{label} <select name="{escape(code)}-{name}" id="id_{escape(code)}-{name}">{options}</select></label>'


def _text(code: str, name: str, placeholder: str, posted: dict) -> str:
    return (f'<input type="text" name="{escape(code)}-{name}"{_attrs([("value", posted.get(name) or None)])} '
            f'placeholder="{escape(placeholder)}" maxlength="{CheckEntryForm.base_fields[name].max_length}" '
            f'id="id_{escape(code)}-{name}">')


def _errorbox(errors) -> list[str]:
    return [f'<div class="errorbox">{escape(str(e))}</div>' for e in errors]
