"""The rows of the daily round, built as HTML in one pass per tank.

The round of a whole facility is hundreds of tanks (6,400 inputs at 400 tanks). Rendered through Django's
form widgets and a row template, each input cost about a millisecond: 3.9 s for the all-rooms round. Here
each row is one string built from values computed once per species and parameter, so the page costs what
the HTML costs. The same builder shows a refused round again: the bound forms' values and errors go in.

A row shows the readings due today (colonies/schedules.py) as inputs; the others are one tap away under
"Other readings", and the observations under "Looks normal" (they default to normal, colonies.models
Check.OBSERVATION_DEFAULTS). Validation stays in `forms.CheckEntryForm` (one per filled row on save); the
attributes the page script reads come from `forms.reading_attrs`, which the form's own widgets use too.
"""
from collections import defaultdict
from collections.abc import Iterable
from datetime import datetime, timedelta
from html import escape

from django.utils import timezone
from django.utils.safestring import SafeString
from django.utils.timesince import timesince

from . import derived, parameters
from .flags import describe, limit_text, out_of_target
from .forms import CheckEntryForm, reading_attrs
from .models import Check, Tank

MARKS = {"high": "▲", "low": "▼"}
WORDS = {"high": "above", "low": "below"}
SELECTS = (("activity", "Activity", Check.Activity.choices), ("clarity", "Water", Check.Clarity.choices),
           ("odour", "Odour", Check.Odour.choices))
BOXES = (("clumping", "Clumping"), ("surface_film", "Film / mould"))
OBSERVATIONS = ("activity", "dead_removed", "clarity", "odour", "clumping", "surface_film", "note")
FLAGGED = ' class="was-flagged"'
MISSING_ACTION_DAYS = 7  # the round and Today list flagged checks of this many days still without an action


def missing_actions(tank_ids, now: datetime) -> dict[int, list[Check]]:
    """Each tank's recent flagged checks that still have no corrective action (one query)."""
    out: dict[int, list[Check]] = defaultdict(list)
    since = now - timedelta(days=MISSING_ACTION_DAYS)
    for check in (Check.objects.needing_action().filter(tank_id__in=list(tank_ids), observed_at__gte=since)
                  .only("pk", "tank_id", "observed_at", "flags").order_by("observed_at")):
        out[check.tank_id].append(check)
    return out


def build_rows(tanks: Iterable[Tank], forms: dict[str, CheckEntryForm], *, due: dict[int, dict[str, str]],
               actions: dict[int, list[Check]], now: datetime, editable: bool) -> list[dict]:
    """One row dict per tank: the tank, its bound form (if the round was refused), its cells and its HTML."""
    targets_by_species: dict[int, dict] = {}
    rows = []
    for tank in tanks:
        species_targets = targets_by_species.get(tank.species_id)
        if species_targets is None:
            species_targets = targets_by_species[tank.species_id] = tank.species_targets()
        row = _row(tank, {**species_targets, **tank.override_targets()}, forms.get(tank.code), due.get(tank.pk, {}))
        row["html"] = SafeString(_html(row, actions.get(tank.pk, ()), now, editable))
        rows.append(row)
    return rows


def _row(tank: Tank, targets: dict, form: CheckEntryForm | None, due: dict[str, str]) -> dict:
    habitat = tank.species.habitat
    last = {p.key: getattr(tank, f"last_{p.key}", None) for p in tank.relevant_parameters()}
    equivalents = derived.raw_equivalents(targets, last, habitat)
    posted = _posted(form)
    errors = form.errors if form is not None else {}
    cells = []
    for p in tank.relevant_parameters():
        target = targets.get(p.key)
        value = posted.get(p.key, "")
        cells.append({
            "param": p, "value": value, "errors": errors.get(p.key, ()), "due": due.get(p.key, ""),
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
    return {"tank": tank, "form": form, "cells": cells, "derived": derived_last, "posted": posted,
            "flagged": any(c["side"] for c in cells), "errors": bool(errors), "error_map": errors,
            "due": [c["param"] for c in cells if c["due"]]}


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


def _attrs(pairs: Iterable[tuple[str, object]]) -> str:
    return "".join(f' {k}="{escape(str(v))}"' for k, v in pairs if v is not None)


def _html(row: dict, actions, now: datetime, editable: bool) -> str:
    tank, posted, errors = row["tank"], row["posted"], row["error_map"]
    code = escape(tank.code)
    off = "" if editable else " disabled"
    classes = "tankrow" + (" has-error" if errors else "") + (" has-flag" if row["flagged"] else "")
    due_cells = [c for c in row["cells"] if c["due"]]
    other_cells = [c for c in row["cells"] if not c["due"]]
    out = [f'<fieldset class="{classes}" id="tank-{code}" data-tank="{code}"{off}>', _title(tank, now, due_cells)]
    out += _errorbox(errors.get("__all__", ()))
    out += [_action_missing(a) for a in actions]
    if due_cells:
        out.append('<div class="readings">' + "".join(_reading_cell(tank.code, c) for c in due_cells) + "</div>")
    if other_cells:
        opened = any(c["value"] or c["errors"] for c in other_cells)
        names = ", ".join(c["param"].label for c in other_cells)
        out.append(f'<details class="more"{" open" if opened else ""}><summary title="{escape(names)}">'
                   f'{len(other_cells)} more reading{"s" if len(other_cells) > 1 else ""}</summary><div class="readings">'
                   + "".join(_reading_cell(tank.code, c) for c in other_cells) + "</div>" + _derived(row) + "</details>")
    out.append(_observations(tank.code, posted, errors))
    action = posted.get("corrective_action", "")
    out.append(f'<label class="action-line"{"" if row["flagged"] or action else " hidden"}>Corrective action '
               f'<input type="text" name="{code}-corrective_action"{_attrs([("value", action or None)])} '
               f'placeholder="What did you do about the flagged value?" maxlength="{_max("corrective_action")}" '
               f'enterkeyhint="next" id="id_{code}-corrective_action"></label>')
    out += _errorbox(errors.get("corrective_action", ()))
    out.append("</fieldset>")
    return "".join(out)


def _title(tank: Tank, now: datetime, due_cells) -> str:
    species = tank.species.common_name or tank.species.scientific_name
    where = tank.position or tank.room.name
    status = (f' · <span class="pill {escape(tank.status)}">{escape(tank.get_status_display())}</span>'
              if tank.status != Tank.Status.ACTIVE else "")
    last_check = (f"checked {timesince(tank.last_check_at, now, depth=1)} ago" if getattr(tank, "last_check_at", None)
                  else "never checked")
    due_text = "readings done today" if not due_cells else ""
    return (f'<legend class="tankrow-title"><a class="code" href="{escape(tank.get_absolute_url())}">{escape(tank.code)}</a> '
            f'<span class="small">{escape(species)}</span> '
            f'<span class="small muted">{escape(where)}{status} · {last_check}{" · " + due_text if due_text else ""}</span>'
            f'</legend>')


def _action_missing(check: Check) -> str:
    what = "; ".join(describe(k, v) for k, v in check.flags.items() if k in derived.BY_KEY or k in parameters.BY_KEY)
    when = timezone.localtime(check.observed_at)
    return (f'<p class="action-missing small">⚑ {escape(what)} ({when:%d %b %H:%M}): corrective action missing. '
            f'<a href="{escape(check.get_absolute_url())}edit/">Add it</a></p>')


def _reading_cell(code: str, cell: dict) -> str:
    p = cell["param"]
    name = escape(f"{code}-{p.key}")
    target = f"target {cell['target_full']}" if cell["target_full"] else "no target"
    title = f"{p.label_with_unit}; {target}" + (f"; due: {cell['due']}" if cell["due"] else "")
    unit = f' <span class="unit">{escape(p.unit)}</span>' if p.unit else ""
    live = f"{MARKS[cell['side']]} {WORDS[cell['side']]} {cell['target']}" if cell["side"] else ""
    last = f"last {cell['last']}" + (f" {MARKS[cell['last_side']]}" if cell["last_side"] else "") if cell["last"] else ""
    return (f'<div class="reading-cell"><label for="id_{name}" title="{escape(title)}">{escape(p.short)}{unit}</label>'
            f'<input type="text" name="{name}"{_attrs([("value", cell["value"] or None)])}{_attrs(cell["attrs"].items())}'
            f' enterkeyhint="next" id="id_{name}">'
            f'<span class="live" aria-live="polite">{escape(live)}</span>'
            f'<span class="{"last was-flagged" if cell["last_side"] else "last"}">{escape(last)}</span>'
            f'{"".join(_errorbox(cell["errors"]))}</div>')


def _derived(row: dict) -> str:
    if not row["derived"]:
        return ""
    parts = [f'<span{FLAGGED if x["side"] else ""} title="{escape(x["d"].method)}">'
             f'{escape(x["d"].short)} {x["value"]} {escape(x["d"].unit)}{" " + MARKS[x["side"]] if x["side"] else ""}</span>'
             for x in row["derived"]]
    return '<div class="derived-line small muted">From last values: ' + " · ".join(parts) + "</div>"


def _observations(code: str, posted: dict, errors: dict) -> str:
    changed = [name for name in OBSERVATIONS if _changed(name, posted.get(name))]
    opened = " open" if changed or any(name in errors for name in OBSERVATIONS) else ""
    fields = [_select(code, *SELECTS[0], posted)]
    fields.append(f'<label>Dead removed <input type="text" inputmode="numeric" pattern="[0-9]*" '
                  f'name="{escape(code)}-dead_removed"{_attrs([("value", posted.get("dead_removed") or None)])} '
                  f'enterkeyhint="next" id="id_{escape(code)}-dead_removed"></label>')
    fields += [_select(code, *spec, posted) for spec in SELECTS[1:]]
    for name, label in BOXES:
        checked = " checked" if posted.get(name) not in (None, "", "false", "off") else ""
        fields.append(f'<label class="check"><input type="checkbox" name="{escape(code)}-{name}" '
                      f'id="id_{escape(code)}-{name}"{checked}> {label}</label>')
    fields.append(f'<label class="wide">Note <input type="text" name="{escape(code)}-note"'
                  f'{_attrs([("value", posted.get("note") or None)])} maxlength="{_max("note")}" enterkeyhint="next" '
                  f'id="id_{escape(code)}-note"></label>')
    problems = [e for name in OBSERVATIONS for e in errors.get(name, ())]
    summary = "Observations: " + ("changed" if changed else "normal")
    return (f'<details class="obs"{opened}><summary>{summary}</summary><div class="observations">{"".join(fields)}</div>'
            + "".join(_errorbox(problems)) + "</details>")


def _changed(name: str, value) -> bool:
    if value in (None, "", "false", "off", "0"):
        return False
    return value != Check.OBSERVATION_DEFAULTS.get(name)


def _select(code: str, name: str, label: str, choices, posted: dict) -> str:
    chosen = posted.get(name) or Check.OBSERVATION_DEFAULTS[name]
    options = "".join(f'<option value="{escape(v)}"{" selected" if v == chosen else ""}>{escape(str(text))}</option>'
                      for v, text in [("", "—"), *choices])
    return (f'<label>{label} <select name="{escape(code)}-{name}" data-default="{Check.OBSERVATION_DEFAULTS[name]}" '
            f'id="id_{escape(code)}-{name}">{options}</select></label>')


def _max(name: str) -> int:
    return CheckEntryForm.base_fields[name].max_length


def _errorbox(errors) -> list[str]:
    return [f'<div class="errorbox">{escape(str(e))}</div>' for e in errors]

