"""The split form of the tank page and its destination rows."""
import math

from django import forms

from . import services
from .models import Tank, tank_code_validator
from .validators import MAX_ANIMALS, MAX_TEXT, NamedErrorsMixin, check_moment


def _animals(label: str, value, minimum: float) -> float:
    if value is None:
        return value
    if not (math.isfinite(value) and minimum <= value <= MAX_ANIMALS):
        raise forms.ValidationError(f"{label}: {value:g} is impossible; allowed range {minimum:g} to {MAX_ANIMALS:,} animals.")
    return value


class SplitForm(NamedErrorsMixin, forms.Form):
    split_at = forms.DateTimeField(
        required=False, label="Split at", help_text="Leave empty for now.",
        widget=forms.DateTimeInput(attrs={"type": "datetime-local"}, format="%Y-%m-%dT%H:%M"),
    )
    source_before = forms.FloatField(label="Animals before the split (estimate)",
                                     help_text="Usually the latest census estimate.")
    stayed = forms.FloatField(label="Animals left in this tank (estimate)")
    note = forms.CharField(required=False, max_length=MAX_TEXT, widget=forms.TextInput(attrs={"placeholder": "Note"}))

    def __init__(self, *args, tank: Tank, **kwargs):
        super().__init__(*args, **kwargs)
        self.tank = tank

    def clean_split_at(self):
        return check_moment("Split at", self.cleaned_data.get("split_at"), started_on=self.tank.started_on,
                            what=f"when tank {self.tank.code} was started")

    def clean_source_before(self):
        return _animals("Animals before the split", self.cleaned_data.get("source_before"), 1)

    def clean_stayed(self):
        return _animals("Animals left in this tank", self.cleaned_data.get("stayed"), 0)

    def clean(self):
        cleaned = super().clean()
        before, stayed = cleaned.get("source_before"), cleaned.get("stayed")
        if before is not None and stayed is not None and stayed > before:
            self.add_error("stayed", f"Animals left in this tank: {stayed:g} is impossible; allowed range 0 to "
                                     f"{before:g} animals (the animals before the split).")
        return cleaned


DESTINATIONS_LIST_ID = "split-destinations"  # the tank page's one <datalist> of destination codes


class SplitPartForm(NamedErrorsMixin, forms.Form):
    """One destination: an existing tank of the same species, or a new tank set up now."""

    # A text box over one shared <datalist> of the species' tanks, not a <select> per destination row: at 200
    # tanks of a species the three selects rendered 600 options through the widget templates, 150 ms of the tank
    # page (benchmark, 400 tanks), and typing "LV-1" finds a tank faster than scrolling 200 options on a phone.
    destination = forms.CharField(
        required=False, max_length=12, label="To existing tank",
        widget=forms.TextInput(attrs={"list": DESTINATIONS_LIST_ID, "autocomplete": "off", "spellcheck": "false",
                                      "autocapitalize": "characters"}),
        help_text="A tank of the same species in use; type its code or pick it from the list.")
    new_code = forms.CharField(required=False, max_length=12, label="or new tank code",
                               help_text="As on its label: the species' prefix and the next number, e.g. LV-11.")
    new_position = forms.CharField(required=False, max_length=30, label="New tank position")
    new_volume_l = forms.FloatField(required=False, label="New tank volume (L)")
    animals = forms.FloatField(required=False, label="Animals moved (estimate)")

    def __init__(self, *args, destinations: list[Tank], **kwargs):
        super().__init__(*args, **kwargs)
        self.by_code = {t.code: t for t in destinations}

    def clean_destination(self):
        code = self.cleaned_data.get("destination", "").strip().upper()
        if code and code not in self.by_code:
            examples = ", ".join(list(self.by_code)[:3])
            allowed = (f"one of the {len(self.by_code)} tanks of this species in use (e.g. {examples})"
                       if self.by_code else "no other tank of this species is in use; enter a new tank code")
            raise forms.ValidationError(f"To existing tank: '{code}' is not a tank of this species in use; "
                                        f"allowed: {allowed}.")
        return code

    def clean_new_code(self):
        code = self.cleaned_data.get("new_code", "").strip().upper()
        if code:
            try:
                tank_code_validator(code)
            except forms.ValidationError:
                raise forms.ValidationError(f"New tank code: '{code}' is not a tank code; use 1-12 capital letters, "
                                            "digits or hyphens (e.g. LV-11).") from None
        return code

    def clean_new_volume_l(self):
        volume = self.cleaned_data.get("new_volume_l")
        if volume is not None and not (0.01 <= volume <= 10000):
            raise forms.ValidationError(f"New tank volume (L): {volume:g} is impossible; allowed range 0.01 to 10000 L.")
        return volume

    def clean_animals(self):
        return _animals("Animals moved", self.cleaned_data.get("animals"), 0)

    def clean(self):
        cleaned = super().clean()
        if self.errors or not self.has_entry():
            return cleaned
        code, new_code = cleaned.get("destination"), cleaned.get("new_code")
        if bool(code) == bool(new_code):
            self.add_error("destination", "Destination: choose an existing tank or enter a new tank code (one of them).")
        if new_code and cleaned.get("new_volume_l") is None:
            self.add_error("new_volume_l", f"New tank volume (L): enter the volume of {new_code} (0.01 to 10000 L).")
        if cleaned.get("animals") is None:
            self.add_error("animals", "Animals moved: enter the estimated number of animals moved.")
        return cleaned

    def has_entry(self) -> bool:
        c = self.cleaned_data
        return any(c.get(name) not in (None, "") for name in ("destination", "new_code", "new_volume_l", "animals"))

    def part(self):
        c = self.cleaned_data
        if c.get("new_code"):
            target = services.NewTank(code=c["new_code"], volume_l=c["new_volume_l"], position=c.get("new_position", ""))
        else:
            target = self.by_code[c["destination"]]
        return target, c["animals"]


SplitPartFormSet = forms.formset_factory(SplitPartForm, extra=3, max_num=6)


def split_forms(tank: Tank, data=None, latest: float | None = None):
    """The split form and its destination rows for the tank page (one query for the destinations)."""
    candidates = Tank.objects.in_use().filter(species_id=tank.species_id).exclude(pk=tank.pk).order_by("code")
    # Unbound (the tank page), the rows validate nothing: the codes alone fill the <datalist>. 200 Tank
    # instances for it took 4 ms (CPU) of the tank page at 400 tanks; a posted split loads them.
    destinations = list(candidates.only("code")) if data is not None else []
    codes = [t.code for t in destinations] if data is not None else list(candidates.values_list("code", flat=True))
    initial = {"source_before": round(latest)} if latest else {}
    form = SplitForm(data, tank=tank, prefix="split", initial=initial)
    parts = SplitPartFormSet(data, prefix="part", form_kwargs={"destinations": destinations})
    parts.destination_codes = codes  # the page's one <datalist>
    parts.forms  # noqa: B018 -- the rows are built here, with the page's other work, not lazily by its template
    return form, parts

