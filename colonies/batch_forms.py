"""One row of the many-tanks screen (colonies/batch_views.py): a feeding, a water change or a count of
dead animals removed, for one tank (prefix = tank code, as on the round).

Plain forms, not model forms: a model form checks every database constraint with a query of its own,
which for 400 rows would be thousands of queries. The bounds are the same as the tank page's forms
(colonies/forms.py) and the database constraints back them up. Messages name the tank, the field, the
value and the allowed range.
"""
from django import forms

from . import validators
from .models import DeadRemoval, Feeding, WaterChange
from .validators import FEEDING_MAX, MAX_COUNT, MAX_TEXT, NamedErrorsMixin, check_range

TICK = "record"  # the row's "record this tank" box (feedings and water changes): data only, not a form field


class RowForm(NamedErrorsMixin, forms.Form):
    model = None
    ticked_rows = True  # False: a row is wanted when anything is typed in it (no tick box)

    note = forms.CharField(required=False, max_length=MAX_TEXT, label="Note")

    def __init__(self, data, *, tank):
        super().__init__(data, prefix=tank.code)
        self.tank = tank

    def full_clean(self):
        super().full_clean()
        # Every message names the tank: a long page lists them together at the top.
        for name, errors in list(self._errors.items()):
            self._errors[name] = self.error_class([f"Tank {self.tank.code}, {e}" for e in errors])

    def has_entry(self) -> bool:
        raise NotImplementedError

    def build(self, *, user, observed_at):
        """The record to save (not yet saved); call only when the form is valid and has an entry."""
        return self.model(tank=self.tank, recorded_by=user, observed_at=observed_at, **self.cleaned_data)


class FeedingRow(RowForm):
    model = Feeding
    food = forms.CharField(required=False, max_length=80, label="Food")
    amount = forms.FloatField(required=False, label="Amount")
    unit = forms.ChoiceField(choices=Feeding.Unit.choices, label="Unit")

    def has_entry(self) -> bool:
        c = self.cleaned_data
        return bool(c.get("food") or c.get("amount") is not None or c.get("note"))

    def clean(self):
        c = super().clean()
        if self.errors or not self.has_entry():
            return c
        amount, unit = c.get("amount"), c.get("unit")
        if not c.get("food"):
            self.add_error("food", "Food: say what was fed (e.g. liver paste).")
        if amount is None:
            self.add_error("amount", f"Amount: enter how much was fed, 0 to {validators.number(FEEDING_MAX[unit])} {unit}.")
        else:
            try:
                check_range("Amount", amount, 0, FEEDING_MAX[unit], unit)
            except forms.ValidationError as error:
                self.add_error("amount", error)
        return c


class WaterChangeRow(RowForm):
    model = WaterChange
    percent = forms.FloatField(required=False, label="Percent of volume")
    litres = forms.FloatField(required=False, label="Litres")
    source_water = forms.CharField(required=False, max_length=80, label="Source water")

    def has_entry(self) -> bool:
        c = self.cleaned_data
        return bool(c.get("percent") is not None or c.get("litres") is not None or c.get("source_water")
                    or c.get("note"))

    def clean(self):
        c = super().clean()
        if self.errors or not self.has_entry():
            return c
        checks = (("percent", "Percent of volume", 0, 100, "%", ""),
                  ("litres", "Litres", 0, self.tank.volume_l, "L", f" (the volume of tank {self.tank.code})"))
        for name, label, low, high, unit, why in checks:
            try:
                check_range(label, c.get(name), low, high, unit, why)
            except forms.ValidationError as error:
                self.add_error(name, error)
        if c.get("percent") is None and c.get("litres") is None:
            self.add_error("percent", "Water change: enter the percent of volume or the litres changed.")
        return c


class RemovalRow(RowForm):
    model = DeadRemoval
    ticked_rows = False
    count = forms.IntegerField(required=False, label="Dead removed")

    def has_entry(self) -> bool:
        c = self.cleaned_data
        return bool(c.get("count") is not None or c.get("note"))

    def clean(self):
        c = super().clean()
        if self.errors or not self.has_entry():
            return c
        if c.get("count") is None:
            self.add_error("count", f"Dead removed: enter how many, 1 to {MAX_COUNT} animals.")
            return c
        try:
            check_range("Dead removed", c["count"], 1, MAX_COUNT, "animals", " (leave it empty when none were removed)")
        except forms.ValidationError as error:
            self.add_error("count", error)
        return c
