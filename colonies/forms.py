from datetime import timedelta

from django import forms
from django.utils import timezone

from . import derived, parameters
from .flags import limit_text, out_of_target
from .models import REASON_MAX_CHARS, Census, CareTarget, Check, Feeding, Species, Tank, TankTarget, WaterChange


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


MAX_COUNT = 1_000_000  # more animals than any culture tank holds: a typo, not a count


def _impossible(tank, p: parameters.Parameter, raw) -> str:
    where = f"Tank {tank.code}, " if tank is not None else ""
    return f"{where}{p.label_with_unit}: {raw} is impossible; allowed range {p.bounds_text()}."


class CheckEntryForm(forms.Form):
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
    note = forms.CharField(required=False, widget=forms.TextInput(attrs={"placeholder": "Note"}))
    corrective_action = forms.CharField(
        required=False, label="Corrective action",
        widget=forms.TextInput(attrs={"placeholder": "What did you do about the flagged value?"}),
    )

    def __init__(self, *args, tank: Tank, **kwargs):
        super().__init__(*args, **kwargs)
        self.tank = tank
        self.params = tank.relevant_parameters()
        targets = tank.care_targets()
        # A derived target (DO % saturation, NH3) becomes a live hint on the raw input, computed from
        # the tank's latest readings when the page has them (the round's annotated tanks).
        last = {p.key: getattr(tank, f"last_{p.key}", None) for p in self.params}
        equivalents = derived.raw_equivalents(targets, last, tank.species.habitat)
        reading_fields = {}
        for p in self.params:
            target = targets.get(p.key) or equivalents.get(p.key)
            attrs = {"inputmode": "decimal", "step": "any", "data-param": p.key, "class": "reading",
                     "aria-label": f"{tank.code} {p.label_with_unit}", "autocomplete": "off",
                     "data-min": f"{p.minimum:g}", "data-max": f"{p.maximum:g}"}
            if target is not None:
                if target.low is not None:
                    attrs["data-low"] = f"{target.low:g}"
                if target.high is not None:
                    attrs["data-high"] = f"{target.high:g}"
                attrs["data-target"] = target.text if isinstance(target, derived.RawEquivalent) else limit_text(target, p.unit)
            reading_fields[p.key] = forms.CharField(
                required=False, label=p.label_with_unit, widget=forms.TextInput(attrs=attrs)
            )
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
        return (
            any(c.get(p.key) is not None for p in self.params)
            or bool(c.get("activity") or c.get("dead_removed") or c.get("clumping") or c.get("surface_film")
                    or c.get("odour") or c.get("clarity") or c.get("note") or c.get("corrective_action"))
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


class ObservedAtForm(forms.Form):
    observed_at = forms.DateTimeField(
        required=False, label="Observed at",
        widget=forms.DateTimeInput(attrs={"type": "datetime-local"}, format="%Y-%m-%dT%H:%M"),
        help_text="Leave empty for now. Set it when entering readings taken earlier.",
    )

    def clean_observed_at(self):
        value = self.cleaned_data.get("observed_at")
        if value and value > timezone.now() + timedelta(minutes=5):
            raise forms.ValidationError(f"Observed at: {value:%Y-%m-%d %H:%M} is in the future.")
        return value


class ReasonForm(forms.Form):
    reason = reason_field(help_text="Required: why is this record being changed or voided? It is kept in the history.")

    def clean_reason(self):
        reason = self.cleaned_data["reason"].strip()
        if not reason:
            raise forms.ValidationError("Reason: please say why.")
        return reason


class FeedingForm(forms.ModelForm):
    class Meta:
        model = Feeding
        fields = ["food", "amount", "unit", "note"]

    def clean_amount(self):
        amount = self.cleaned_data["amount"]
        if amount is not None and amount < 0:
            raise forms.ValidationError(f"Amount: {amount:g} is impossible; allowed range 0 or more.")
        return amount


class WaterChangeForm(forms.ModelForm):
    class Meta:
        model = WaterChange
        fields = ["percent", "litres", "source_water", "note"]
        labels = {"percent": "Percent of volume", "litres": "Litres"}

    def clean(self):
        cleaned = super().clean()
        if cleaned.get("percent") is None and cleaned.get("litres") is None and not self.errors:
            raise forms.ValidationError("Water change: enter the percent of volume or the litres changed.")
        return cleaned


class CensusForm(forms.ModelForm):
    aliquot_counts_text = forms.CharField(
        required=False, label="Aliquot counts",
        help_text="Animals in each aliquot, separated by commas or spaces, e.g. 31, 27, 35.",
    )

    class Meta:
        model = Census
        fields = ["method", "direct_count", "aliquot_ml", "total_ml", "total_mass_g", "sample_mass_g", "sample_count",
                  "note"]
        labels = {"aliquot_ml": "Aliquot volume (mL)", "total_ml": "Total volume (mL)",
                  "total_mass_g": "Total wet mass (g)", "sample_mass_g": "Subsample mass (g)",
                  "sample_count": "Animals in subsample"}

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
        return counts

    def clean(self):
        from .services import census_estimate

        cleaned = super().clean()
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


class SpeciesForm(forms.ModelForm):
    class Meta:
        model = Species
        fields = ["common_name", "habitat", "check_interval_hours", "feeding_interval_days",
                  "water_change_interval_days", "water_change_fraction", "census_interval_days",
                  "max_density_per_l", "reserve_min_animals", "notes"]


class CareTargetForm(forms.ModelForm):
    class Meta:
        model = CareTarget
        fields = ["parameter", "low", "high", "source"]
        widgets = {"source": forms.TextInput()}

    def clean(self):
        cleaned = super().clean()
        low, high, key = cleaned.get("low"), cleaned.get("high"), cleaned.get("parameter")
        p = parameters.BY_KEY.get(key)  # derived values (e.g. DO % saturation) have no physical bounds here
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
