from django import forms
from django.utils import timezone

from . import derived, parameters, schedules, validators
from .flags import limit_text, out_of_target
from .models import (REASON_MAX_CHARS, Census, CareTarget, Check, Feeding, MeasurementPlan, Species, Tank,
                     TankMeasurementPlan, TankTarget, WaterChange)


def reason_field(label: str = "Reason", **kwargs) -> forms.CharField:
    """A reason kept in the history, refused beyond REASON_MAX_CHARS with a message naming the field."""
    kwargs.setdefault("widget", forms.Textarea(attrs={"rows": 2}))
    return forms.CharField(
        label=label, max_length=REASON_MAX_CHARS,
        error_messages={"max_length": f"{label}: at most {REASON_MAX_CHARS:,} characters are kept; "
                                      "this one has %(show_value)s. Shorten it.",
                        **kwargs.pop("error_messages", {})},
        **kwargs,
    )
from .validators import MAX_COUNT, MAX_TEXT, NamedErrorsMixin, check_range

# A species' husbandry defaults, pre-filled for a tank with no earlier feeding or water change.
SPECIES_DEFAULT_FIELDS = ("default_food", "default_feeding_amount", "default_feeding_unit", "default_source_water")
MAX_ALIQUOTS = 100  # aliquots counted in one census; more is a pasted column, not a census


def _impossible(tank, p: parameters.Parameter, raw) -> str:
    where = f"Tank {tank.code}, " if tank is not None else ""
    return f"{where}{p.label_with_unit}: {raw} is impossible; allowed range {p.bounds_text()}."


def reading_attrs(tank: Tank, p: parameters.Parameter, target) -> dict[str, str]:
    """The attributes of a reading input that the page script reads: the care target (or the raw equivalent of
    a derived one) as data-low/data-high/data-target, and the physical bounds as data-min/data-max."""
    attrs = {"inputmode": "decimal", "step": "any", "data-param": p.key, "class": "reading",
             "aria-label": f"{tank.code} {p.label_with_unit}", "autocomplete": "off",
             "data-min": f"{p.minimum:g}", "data-max": f"{p.maximum:g}"}
    if target is not None:
        if target.low is not None:
            attrs["data-low"] = f"{target.low:g}"
        if target.high is not None:
            attrs["data-high"] = f"{target.high:g}"
        attrs["data-target"] = target.text if isinstance(target, derived.RawEquivalent) else limit_text(target, p.unit)
    return attrs


class CheckEntryForm(NamedErrorsMixin, forms.Form):
    """One tank's daily check: used as a row of the round (prefix = tank code) and on the tank page.

    Physically impossible values are errors that name the tank, the field, the value and the range.
    Values outside the care targets are accepted; they are flagged when saved.
    """

    activity = forms.ChoiceField(choices=[("", "—")] + Check.Activity.choices, required=False)
    dead_removed = forms.IntegerField(required=False, label="Dead removed")  # bounds checked in clean_dead_removed
    clumping = forms.BooleanField(required=False)
    surface_film = forms.BooleanField(required=False, label="Film / mould")
    odour = forms.ChoiceField(choices=[("", "—")] + Check.Odour.choices, required=False)
    clarity = forms.ChoiceField(choices=[("", "—")] + Check.Clarity.choices, required=False)
    note = forms.CharField(required=False, max_length=MAX_TEXT, widget=forms.TextInput(attrs={"placeholder": "Note"}))
    corrective_action = forms.CharField(
        required=False, label="Corrective action", max_length=MAX_TEXT,
        widget=forms.TextInput(attrs={"placeholder": "What did you do about the flagged value?"}),
    )

    def __init__(self, *args, tank: Tank, **kwargs):
        kwargs["initial"] = {**Check.OBSERVATION_DEFAULTS, **(kwargs.get("initial") or {})}
        super().__init__(*args, **kwargs)
        self.tank = tank
        self.params = tank.relevant_parameters()
        targets = tank.care_targets()
        # A derived target (DO % saturation, NH3) becomes a live hint on the raw input, computed from
        # the tank's latest readings when the page has them (the round's annotated tanks).
        last = {p.key: getattr(tank, f"last_{p.key}", None) for p in self.params}
        equivalents = derived.raw_equivalents(targets, last, tank.species.habitat)
        reading_fields = {
            p.key: forms.CharField(required=False, label=p.label_with_unit, widget=forms.TextInput(
                attrs=reading_attrs(tank, p, targets.get(p.key) or equivalents.get(p.key))))
            for p in self.params
        }
        # readings first, then observations
        self.fields = {**reading_fields, **self.fields}
        self.targets = targets

    def reading_fields(self):
        return [self[p.key] for p in self.params]

    def observation_fields(self):
        return [self[name] for name in ("activity", "dead_removed", "clumping", "surface_film", "odour", "clarity")]

    def _clean_reading(self, p: parameters.Parameter):
        raw = (self.cleaned_data.get(p.key) or "").strip().replace(",", ".")
        if raw == "":
            return None
        try:
            value = float(raw)
        except ValueError:
            raise forms.ValidationError(
                f"Tank {self.tank.code}, {p.label_with_unit}: '{raw}' is not a number; allowed range {p.bounds_text()}."
            ) from None
        if not (p.minimum <= value <= p.maximum):
            raise forms.ValidationError(_impossible(self.tank, p, raw))
        return value

    def clean_dead_removed(self):
        value = self.cleaned_data.get("dead_removed")
        if value is not None and not 0 <= value <= MAX_COUNT:
            raise forms.ValidationError(
                f"Tank {self.tank.code}, dead removed: {value} is impossible; allowed range 0 to {MAX_COUNT:,}."
            )
        return value

    def clean(self):
        cleaned = super().clean()
        for p in self.params:
            if p.key in self.errors:
                continue
            try:
                cleaned[p.key] = self._clean_reading(p)
            except forms.ValidationError as error:
                self.add_error(p.key, error)
        return cleaned

    def has_entry(self) -> bool:
        """True when the technician entered anything for this tank (empty rows are skipped)."""
        c = self.cleaned_data
        looks = {name: c.get(name) for name in ("activity", "odour", "clarity")}
        return (
            any(c.get(p.key) is not None for p in self.params)
            or any(value and value != Check.OBSERVATION_DEFAULTS[name] for name, value in looks.items())
            or bool(c.get("dead_removed") or c.get("clumping") or c.get("surface_film") or c.get("note")
                    or c.get("corrective_action"))
        )

    def row(self) -> dict:
        c = self.cleaned_data
        row = {p.key: c.get(p.key) for p in self.params}
        row.update({
            "activity": c.get("activity") or "",
            "dead_removed": c.get("dead_removed") or 0,
            "clumping": bool(c.get("clumping")),
            "surface_film": bool(c.get("surface_film")),
            "odour": c.get("odour") or "",
            "clarity": c.get("clarity") or "",
            "note": c.get("note") or "",
            "corrective_action": c.get("corrective_action") or "",
        })
        return row

    def flagged(self) -> dict[str, str]:
        """Out-of-target sides for values in the bound data (for re-showing flags after an error)."""
        result = {}
        if not self.is_bound:
            return result
        for p in self.params:
            raw = (self.data.get(self.add_prefix(p.key)) or "").strip().replace(",", ".")
            try:
                value = float(raw)
            except ValueError:
                continue
            side = out_of_target(value, self.targets.get(p.key))
            if side:
                result[p.key] = side
        return result


def observed_at_field(help_text: str = "Leave empty for now. Set it when entering readings taken earlier.") -> forms.DateTimeField:
    return forms.DateTimeField(
        required=False, label="Observed at", help_text=help_text,
        widget=forms.DateTimeInput(attrs={"type": "datetime-local"}, format="%Y-%m-%dT%H:%M"),
    )


class ObservedAtForm(NamedErrorsMixin, forms.Form):
    observed_at = observed_at_field()
    # Set by the round's page script when a round is saved on the device (no network): the moment it was
    # saved there, in UTC, so a round sent later is not stamped with the time it reached the server.
    kept_at = forms.DateTimeField(required=False, widget=forms.HiddenInput, label="Saved on the device at")

    def clean_observed_at(self):
        return validators.check_moment("Observed at", self.cleaned_data.get("observed_at"))

    def clean_kept_at(self):
        return validators.check_moment("Saved on the device at", self.cleaned_data.get("kept_at"))

    def moment(self):
        """The observed time to record: the typed one, else when the round was saved on the device, else now."""
        return self.cleaned_data.get("observed_at") or self.cleaned_data.get("kept_at")

    def check_started(self, tanks) -> bool:
        """False (with an error on the field) when the time is before any of these tanks was started."""
        value = self.moment() if self.is_valid() else None
        if value is None or not tanks:
            return self.is_valid()
        latest_start = max(tanks, key=lambda t: t.started_on)
        try:
            validators.check_moment("Observed at", value, started_on=latest_start.started_on,
                                    what=f"when tank {latest_start.code} was started")
        except forms.ValidationError as error:
            self.add_error("observed_at", error)
            return False
        return True


class ReasonForm(NamedErrorsMixin, forms.Form):
    reason = reason_field(help_text="Required: why is this record being changed or voided? It is kept in the history.")

    def clean_reason(self):
        reason = self.cleaned_data["reason"].strip()
        if not reason:
            raise forms.ValidationError("Reason: please say why.")
        return reason


class ObservedAtMixin:
    """An entry form's observed time (a model form of a tank's record): empty means now; back-dating is allowed
    back to the tank's start (validators.check_moment); a record entered long after is shown as a late entry."""

    def __init__(self, *args, **kwargs):
        super().__init__(*args, **kwargs)
        if not self.is_bound:
            self.initial["observed_at"] = None  # empty, not the moment the page was drawn: saved as "now"

    def clean_observed_at(self):
        value = self.cleaned_data.get("observed_at")
        tank = self.instance.tank if self.instance.tank_id else None
        if tank is None:
            return validators.check_moment("Observed at", value) or timezone.now()
        return validators.check_moment("Observed at", value, started_on=tank.started_on,
                                       what=f"when tank {tank.code} was started") or timezone.now()


LATER = "Leave empty for now. Set it when entering work done earlier; it is then shown as a late entry."


class FeedingForm(ObservedAtMixin, NamedErrorsMixin, forms.ModelForm):
    observed_at = observed_at_field(LATER)

    class Meta:
        model = Feeding
        fields = ["food", "amount", "unit", "observed_at", "note"]

    def clean(self):
        cleaned = super().clean()
        amount, unit = cleaned.get("amount"), cleaned.get("unit")
        if amount is not None and unit in validators.FEEDING_MAX:
            try:
                check_range("Amount", amount, 0, validators.FEEDING_MAX[unit], unit)
            except forms.ValidationError as error:
                self.add_error("amount", error)
        return cleaned


class WaterChangeForm(ObservedAtMixin, NamedErrorsMixin, forms.ModelForm):
    observed_at = observed_at_field(LATER)

    class Meta:
        model = WaterChange
        fields = ["percent", "litres", "source_water", "observed_at", "note"]
        labels = {"percent": "Percent of volume", "litres": "Litres"}

    def clean_percent(self):
        return check_range("Percent of volume", self.cleaned_data.get("percent"), 0, 100, "%")

    def clean_litres(self):
        litres = self.cleaned_data.get("litres")
        tank = self.instance.tank if self.instance.tank_id else None
        if tank is not None:
            return check_range("Litres", litres, 0, tank.volume_l, "L", f" (the volume of tank {tank.code})")
        return check_range("Litres", litres, 0, validators.MAX_TANK_VOLUME_L, "L")

    def clean(self):
        cleaned = super().clean()
        if cleaned.get("percent") is None and cleaned.get("litres") is None and not self.errors:
            raise forms.ValidationError("Water change: enter the percent of volume or the litres changed.")
        return cleaned


class CensusForm(ObservedAtMixin, NamedErrorsMixin, forms.ModelForm):
    aliquot_counts_text = forms.CharField(
        required=False, label="Aliquot counts",
        help_text="Animals in each aliquot, separated by commas or spaces, e.g. 31, 27, 35.",
    )
    observed_at = observed_at_field(LATER)

    class Meta:
        model = Census
        fields = ["method", "direct_count", "aliquot_ml", "total_ml", "total_mass_g", "sample_mass_g", "sample_count",
                  "observed_at", "note"]
        widgets = {"method": forms.Select(attrs={"data-census-method": ""})}
        labels = {"aliquot_ml": "Aliquot volume (mL)", "total_ml": "Total volume (mL)",
                  "total_mass_g": "Total wet mass (g)", "sample_mass_g": "Subsample mass (g)",
                  "sample_count": "Animals in subsample"}

    # Each method's own inputs, shown in a fieldset of their own (templates/colonies/_census_fields.html);
    # a small script shows only the chosen method's.
    METHOD_FIELDS = {Census.Method.DIRECT: ("direct_count",),
                     Census.Method.ALIQUOT: ("aliquot_counts_text", "aliquot_ml", "total_ml"),
                     Census.Method.MASS: ("total_mass_g", "sample_mass_g", "sample_count")}

    def method_fieldsets(self):
        return [(value, label, [self[name] for name in self.METHOD_FIELDS[value]])
                for value, label in Census.Method.choices]

    def clean_direct_count(self):
        return check_range("Direct count", self.cleaned_data.get("direct_count"), 0, MAX_COUNT, "animals")

    def clean_aliquot_ml(self):
        return check_range("Aliquot volume", self.cleaned_data.get("aliquot_ml"), 0.001, validators.CENSUS_MAX_ML, "mL")

    def clean_total_ml(self):
        return check_range("Total volume", self.cleaned_data.get("total_ml"), 0.001, validators.CENSUS_MAX_ML, "mL")

    def clean_total_mass_g(self):
        return check_range("Total wet mass", self.cleaned_data.get("total_mass_g"), 0.0001, validators.CENSUS_MAX_MASS_G,
                           "g")

    def clean_sample_mass_g(self):
        return check_range("Subsample mass", self.cleaned_data.get("sample_mass_g"), 0.0001,
                           validators.CENSUS_MAX_MASS_G, "g")

    def clean_sample_count(self):
        return check_range("Animals in subsample", self.cleaned_data.get("sample_count"), 1, MAX_COUNT, "animals")

    def clean_aliquot_counts_text(self):
        text = self.cleaned_data.get("aliquot_counts_text", "")
        counts = []
        for token in text.replace(",", " ").split():
            try:
                n = int(token)
            except ValueError:
                raise forms.ValidationError(f"Aliquot counts: '{token}' is not a whole number.") from None
            if not 0 <= n <= MAX_COUNT:
                raise forms.ValidationError(f"Aliquot counts: {n} is impossible; allowed range 0 to {MAX_COUNT:,}.")
            counts.append(n)
        if len(counts) > MAX_ALIQUOTS:
            raise forms.ValidationError(f"Aliquot counts: {len(counts)} aliquots is impossible; allowed range 1 to "
                                        f"{MAX_ALIQUOTS}.")
        return counts

    def clean(self):
        from .services import census_estimate

        cleaned = super().clean()
        if self.errors:
            return cleaned
        aliquot, total = cleaned.get("aliquot_ml"), cleaned.get("total_ml")
        if aliquot is not None and total is not None and aliquot > total:
            self.add_error("aliquot_ml", f"Aliquot volume: {aliquot:g} mL is impossible; allowed range 0.001 to "
                                         f"{total:g} mL (the total volume).")
        sample, whole = cleaned.get("sample_mass_g"), cleaned.get("total_mass_g")
        if sample is not None and whole is not None and sample > whole:
            self.add_error("sample_mass_g", f"Subsample mass: {sample:g} g is impossible; allowed range 0.0001 to "
                                            f"{whole:g} g (the total wet mass).")
        if self.errors:
            return cleaned
        self.instance.aliquot_counts = cleaned.get("aliquot_counts_text") or []
        for name in self.Meta.fields:
            if name in cleaned:
                setattr(self.instance, name, cleaned[name])
        try:
            census_estimate(self.instance)
        except ValueError as error:
            raise forms.ValidationError(f"Census: {error}") from None
        return cleaned


class SpeciesForm(NamedErrorsMixin, forms.ModelForm):
    class Meta:
        model = Species
        fields = ["common_name", "habitat", "check_interval_hours", "feeding_interval_days",
                  "water_change_interval_days", "water_change_fraction", "census_interval_days",
                  "max_density_per_l", "reserve_min_animals", *SPECIES_DEFAULT_FIELDS, "notes"]
        labels = {"max_density_per_l": "Maximum density (animals/L)", "reserve_min_animals": "Reserve (animals)"}


class CareTargetForm(NamedErrorsMixin, forms.ModelForm):
    class Meta:
        model = CareTarget
        fields = ["parameter", "low", "high", "source"]
        widgets = {"source": forms.TextInput()}

    def clean(self):
        cleaned = super().clean()
        low, high, key = cleaned.get("low"), cleaned.get("high"), cleaned.get("parameter")
        p = parameters.BY_KEY.get(key) or derived.BY_KEY.get(key)  # derived values carry their own bounds
        if p is not None:
            for name, value in (("low", low), ("high", high)):
                if value is not None and not (p.minimum <= value <= p.maximum):
                    self.add_error(name, f"{p.label} {name}: {value:g} is outside the physical range {p.bounds_text()}.")
        if low is not None and high is not None and low > high:
            self.add_error("high", f"High ({high:g}) must not be below low ({low:g}).")
        return cleaned


class TankTargetForm(CareTargetForm):
    reason = reason_field(widget=forms.TextInput(), help_text=TankTarget._meta.get_field("reason").help_text)

    class Meta:
        model = TankTarget
        fields = ["parameter", "low", "high", "reason"]
        widgets = {"reason": forms.TextInput()}


CareTargetFormSet = forms.inlineformset_factory(
    Species, CareTarget, form=CareTargetForm, extra=1, can_delete=False
)


class MeasurementPlanForm(NamedErrorsMixin, forms.ModelForm):
    """How often a parameter is measured. The number of days belongs to "every N days" and the weekday to
    "weekly": each is required there and cleared elsewhere, so a stored plan never carries a stray value."""

    class Meta:
        model = MeasurementPlan
        fields = ["parameter", "cadence", "every_days", "weekday", "after_water_change", "while_deviation_open"]

    def clean(self):
        cleaned = super().clean()
        cadence = cleaned.get("cadence")
        if cadence == MeasurementPlan.Cadence.EVERY_N_DAYS:
            if cleaned.get("every_days") is None:
                self.add_error("every_days", f"Every N days: give the number of days "
                                             f"({schedules.MIN_EVERY_DAYS} to {schedules.MAX_EVERY_DAYS}).")
        else:
            cleaned["every_days"] = None
        if cadence == MeasurementPlan.Cadence.WEEKLY:
            if cleaned.get("weekday") is None:
                self.add_error("weekday", "Weekday: choose the day of the week it is measured (Monday to Sunday).")
        else:
            cleaned["weekday"] = None
        return cleaned


class TankMeasurementPlanForm(MeasurementPlanForm):
    reason = reason_field(widget=forms.TextInput(), help_text=TankMeasurementPlan._meta.get_field("reason").help_text)

    class Meta(MeasurementPlanForm.Meta):
        model = TankMeasurementPlan
        fields = MeasurementPlanForm.Meta.fields + ["reason"]


MeasurementPlanFormSet = forms.inlineformset_factory(
    Species, MeasurementPlan, form=MeasurementPlanForm, extra=1, can_delete=False
)
