"""How every change history shows a field and its values: one set of rules for all of them.

A field is named, in this order, by the parameter registry (a reading's label, unit and decimals),
by the model field's own verbose name when the model sets one ("Irradiance (mW/cm²)"), by the
label and unit of its bounds validator (`Range("Census interval", 1, 365, "days")`), or else by its
name read as words with the unit its name ends in (`min_rest_hours` → "Minimum rest", h). Values
are written the lab's way: numbers with the registry's decimals and their unit, choices by their
display label, yes/no, dates and moments in the lab's time (vermilog/lab_time.py), related rows by
their str (resolved by the caller in one query per related model, or given as objects), JSON as
"Label: value" pairs with its keys named like fields.

Django-light: it reads the models' field definitions, never the database.
"""
from __future__ import annotations

import json
import re
from dataclasses import dataclass
from datetime import date, datetime
from functools import lru_cache
from typing import Any, Mapping

from django.db import models
from django.utils.text import capfirst

from vermilog.lab_time import lab_date, lab_moment

from . import derived, parameters
from .validators import Range

EMPTY = "—"
YES, NO = "yes", "no"

# A field name ending in one of these carries the value's unit (longest first).
UNIT_SUFFIXES = (
    ("_mj_cm2", "mJ/cm²"), ("_mw_cm2", "mW/cm²"), ("_c_min", "°C/min"), ("_us_cm", "µS/cm"), ("_mg_l", "mg/L"),
    ("_v_cm", "V/cm"), ("_per_l", "per L"), ("_bytes", "bytes"), ("_hours", "h"), ("_days", "days"),
    ("_min", "min"), ("_ms", "ms"), ("_nm", "nm"), ("_mm", "mm"), ("_ml", "mL"), ("_hz", "Hz"), ("_um", "µM"),
    ("_cm", "cm"), ("_s", "s"), ("_l", "L"), ("_g", "g"), ("_c", "°C"), ("_v", "V"),
)
# Abbreviations in field names, written out in labels.
WORDS = {"max": "maximum", "min": "minimum", "temp": "temperature", "sha256": "SHA-256", "24h": "24 h",
         "id": "ID", "pct": "%", "sat": "saturation"}
NUMERIC = (models.IntegerField, models.FloatField, models.DecimalField)
_UNIT_IN_NAME = re.compile(r"^(?P<label>.+?) \((?P<unit>[^()]+)\)$")


@dataclass(frozen=True)
class FieldInfo:
    label: str
    unit: str = ""
    decimals: int | None = None  # None: the shortest exact form

    @property
    def heading(self) -> str:
        """The label with its unit, for a column or a row that shows no value beside it."""
        return f"{self.label} ({self.unit})" if self.unit else self.label


@dataclass(frozen=True)
class Change:
    label: str
    old: str
    new: str


def _words(name: str) -> str:
    return capfirst(" ".join(WORDS.get(w, w) for w in name.split("_") if w))


@lru_cache(maxsize=None)
def field_info(model: type[models.Model], name: str) -> FieldInfo:
    """How `model`'s field `name` is named (and its unit and decimals)."""
    entry = parameters.BY_KEY.get(name) or derived.BY_KEY.get(name)
    if entry is not None:
        return FieldInfo(entry.label, entry.unit, entry.decimals)
    try:
        field = model._meta.get_field(name)
    except Exception:  # a key that is no field (a JSON key, a removed column): read its name
        return _from_name(name, numeric=False)
    verbose = str(getattr(field, "verbose_name", "") or "")
    if verbose and verbose != name.replace("_", " "):  # set by the model
        match = _UNIT_IN_NAME.match(verbose)
        return FieldInfo(capfirst(match["label"]), match["unit"]) if match else FieldInfo(capfirst(verbose))
    for validator in getattr(field, "validators", ()):
        if isinstance(validator, Range):
            return FieldInfo(capfirst(validator.label), validator.unit)
    return _from_name(name, numeric=isinstance(field, NUMERIC))


def _from_name(name: str, *, numeric: bool) -> FieldInfo:
    if numeric:
        for suffix, unit in UNIT_SUFFIXES:
            if name.endswith(suffix) and len(name) > len(suffix):
                return FieldInfo(_words(name[: -len(suffix)]), unit)
    return FieldInfo(_words(name))


def field_label(model: type[models.Model], name: str) -> str:
    """A field's label with its unit: "Census interval (days)"."""
    return field_info(model, name).heading


def key_label(model: type[models.Model] | None, key: str) -> str:
    """A JSON key or a registry key as a heading: a field's label, a parameter's, or its words."""
    if model is not None:
        return field_label(model, key)
    entry = parameters.BY_KEY.get(key) or derived.BY_KEY.get(key)
    return entry.label_with_unit if entry else _from_name(key, numeric=True).heading


def number_text(value: float | int, decimals: int | None = None) -> str:
    if isinstance(value, bool):
        return YES if value else NO
    if decimals is not None:
        return f"{value:.{decimals}f}"
    if isinstance(value, int):
        return str(value)
    text = f"{value:.6g}"
    if "e" in text:  # a very large or small number: plain digits read better than 1.2e+06
        text = f"{value:.6f}".rstrip("0").rstrip(".")
    return text


def json_text(value: Any, model: type[models.Model] | None = None, depth: int = 0) -> str:
    """A JSON value readably: "Label: value; Label: value" for an object, items joined for a list."""
    if value is None or value == "" or value == [] or value == {}:
        return EMPTY
    if isinstance(value, str) and depth == 0:
        try:  # a history row may hold the JSON as text
            value = json.loads(value)
        except ValueError:
            return value
    if isinstance(value, bool):
        return YES if value else NO
    if isinstance(value, (int, float)):
        return number_text(value)
    if isinstance(value, dict):
        parts = [f"{key_label(model, str(k))}: {json_text(v, None, depth + 1)}" for k, v in value.items()]
        return ("; " if depth == 0 else ", ").join(parts)
    if isinstance(value, list):
        return ("; " if any(isinstance(v, dict) for v in value) else ", ").join(
            json_text(v, None, depth + 1) for v in value)
    return str(value)


def value_text(model: type[models.Model], name: str, value: Any,
               related: Mapping[tuple[type[models.Model], Any], str] | None = None) -> str:
    """One value of `model`'s field `name` as a person reads it.

    A foreign key's value is either the related object (str of it) or its id, looked up in
    `related` as {(related model, id): text}."""
    if value is None or value == "" or value == () or value == []:
        return EMPTY
    info = field_info(model, name)
    try:
        field = model._meta.get_field(name)
    except Exception:
        field = None
    if isinstance(field, models.ManyToManyField):  # ids, or the library's rows in the back office
        if isinstance(value, (list, tuple)) and all(isinstance(v, int) for v in value):
            return ", ".join(sorted((related or {}).get((field.related_model, v), f"#{v}") for v in value)) or EMPTY
        return ", ".join(str(v) for v in value) or EMPTY
    if isinstance(field, models.ForeignKey):
        if not isinstance(value, (int, str)):  # the related object itself (or the library's DeletedObject)
            return str(value)
        return (related or {}).get((field.related_model, value), f"#{value}")
    if isinstance(field, models.JSONField):
        return json_text(value, model if name == "sources" else None)
    if isinstance(field, models.BooleanField) or isinstance(value, bool):
        return YES if value else NO
    if field is not None and field.choices:
        return str(dict(field.flatchoices).get(value, value))
    if name == "parameter" and isinstance(value, str):  # a registry key kept without choices (deviations)
        entry = parameters.BY_KEY.get(value) or derived.BY_KEY.get(value)
        return entry.label_with_unit if entry else value
    if isinstance(value, datetime):
        return lab_moment(value)
    if isinstance(value, date):
        return lab_date(value)
    if isinstance(value, (int, float)):
        text = number_text(value, info.decimals)
        return f"{text} {info.unit}" if info.unit else text
    return str(value)


def change(model: type[models.Model], name: str, old: Any, new: Any,
           related: Mapping[tuple[type[models.Model], Any], str] | None = None) -> Change:
    return Change(field_info(model, name).label, value_text(model, name, old, related),
                  value_text(model, name, new, related))
