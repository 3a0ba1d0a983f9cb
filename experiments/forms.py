from django import forms
from django.utils import timezone

from colonies.forms import reason_field
from colonies.models import Species, Tank
from colonies.validators import FUTURE_LEEWAY, MAX_TEXT, NamedErrorsMixin, check_date, check_moment

from . import filetypes, uploads
from .allocation import BLOCK
from .models import LATE_OUTCOME_FIELDS, Attachment, Cohort, Dish, Protocol, Stimulus, Study, Trial
from .validators import BOUNDS, MAX_BOOKING_AHEAD_DAYS, MAX_CONDITIONS, outside_message

DATE = forms.DateInput(attrs={"type": "date"}, format="%Y-%m-%d")
DATETIME = forms.DateTimeInput(attrs={"type": "datetime-local"}, format="%Y-%m-%dT%H:%M")
MAX_CLUSTER_POINTS = 50


def _minute(dt) -> str:
    try:
        dt = timezone.localtime(dt)
    except (OverflowError, ValueError):  # year 1 or 9999 does not shift into another zone
        pass
    return f"{dt:%Y-%m-%d %H:%M}"


def errors_text(form) -> str:
    """Every error of a form as one line for a flash message; each names its field (see name_errors)."""
    parts = []
    for name, messages in form.errors.items():
        label = str(form.fields[name].label or name.replace("_", " ").capitalize()) if name in form.fields else ""
        for message in messages:
            parts.append(message if not label or message.startswith(label) else f"{label}: {message}")
    return " ".join(parts)


class ReasonForm(NamedErrorsMixin, forms.Form):
    reason = reason_field(help_text="Required; kept in the history.",
                          error_messages={"required": "Reason: give a reason; it is kept in the history."})

    def clean_reason(self):
        reason = self.cleaned_data["reason"].strip()
        if not reason:
            raise forms.ValidationError("Reason: give a reason; it is kept in the history.")
        return reason


class BookingForm(NamedErrorsMixin, forms.Form):
    protocol = forms.ModelChoiceField(queryset=Protocol.objects.none(),
                                      help_text="Only approved protocols in force are listed.")
    species = forms.ModelChoiceField(queryset=Species.objects.all())
    animals = forms.IntegerField(
        min_value=1, max_value=100000, help_text="How many animals to draw.",
        error_messages={"min_value": "Animals %(value)s is not possible: allowed range 1–100000.",
                        "max_value": "Animals %(value)s is not possible: allowed range 1–100000."})
    needed_on = forms.DateField(widget=DATE, help_text="The day you will draw them.")
    tank = forms.ModelChoiceField(queryset=Tank.objects.active().select_related("species"), required=False,
                                  help_text="Leave empty and press 'Suggest tanks' to see tanks with enough animals.")
    purpose = forms.CharField(max_length=200, required=False)

    def __init__(self, *args, today=None, **kwargs):
        super().__init__(*args, **kwargs)
        self.today = today or timezone.localdate()
        self.fields["protocol"].queryset = Protocol.objects.usable_on(self.today)
        self.fields["needed_on"].initial = self.today

    def clean_needed_on(self):
        day = self.cleaned_data["needed_on"]
        if day < self.today:
            raise forms.ValidationError(f"Date {day:%Y-%m-%d} is in the past; book for {self.today:%Y-%m-%d} or later.")
        return check_date("Needed on", day, earliest=self.today, ahead_days=MAX_BOOKING_AHEAD_DAYS, today=self.today,
                          why=" (at most a year ahead)")

    def clean(self):
        data = super().clean()
        tank, species = data.get("tank"), data.get("species")
        if tank and species and tank.species_id != species.pk:
            self.add_error("tank", f"Tank {tank.code} holds {tank.species}, not {species}.")
        return data


class DrawForm(NamedErrorsMixin, forms.Form):
    count = forms.IntegerField(min_value=1, label="Animals drawn",
                               error_messages={"min_value": "Animals drawn %(value)s is not possible: at least 1."})
    drawn_at = forms.DateTimeField(widget=DATETIME, required=False, help_text="Empty: now.")

    def __init__(self, *args, booking, **kwargs):
        super().__init__(*args, **kwargs)
        self.booking = booking
        self.fields["count"].initial = booking.animals
        self.fields["count"].max_value = booking.animals
        self.fields["count"].widget.attrs["max"] = booking.animals

    def clean_drawn_at(self):
        drawn_at = self.cleaned_data.get("drawn_at")
        if drawn_at is None:
            return None
        # The field holds whole minutes: compare with the minute the booking was made.
        earliest = self.booking.booked_at.replace(second=0, microsecond=0)
        latest = timezone.now() + FUTURE_LEEWAY
        if not earliest <= drawn_at <= latest:
            raise forms.ValidationError(f"Drawn at {_minute(drawn_at)} is not possible: allowed range "
                                        f"{_minute(earliest)} (when it was booked) to {_minute(latest)} (now).")
        return drawn_at

    def clean_count(self):
        count = self.cleaned_data["count"]
        if count > self.booking.animals:
            raise forms.ValidationError(f"Animals drawn {count} is more than booked: allowed range 1–{self.booking.animals}.")
        return count


class EndFields(NamedErrorsMixin, forms.Form):
    """How a group of animals ended (a cohort's animals outside dishes, or a dish): shared fields and checks."""

    end = forms.ChoiceField(choices=Dish.End.choices)
    returned_to = forms.ModelChoiceField(queryset=Tank.objects.in_use(), required=False)
    returned_count = forms.IntegerField(min_value=0, required=False, label="Animals returned",
                                        error_messages={"min_value": "Animals returned %(value)s is not possible: "
                                                                     "at least 0."})
    method = forms.CharField(max_length=200, required=False, label="Retirement method")
    note = forms.CharField(widget=forms.Textarea(attrs={"rows": 2}), required=False, max_length=MAX_TEXT)

    def __init__(self, *args, cohort, **kwargs):
        super().__init__(*args, **kwargs)
        self.cohort = cohort
        self.fields["returned_to"].queryset = Tank.objects.in_use().filter(species_id=cohort.origin_tank.species_id)
        self.fields["returned_to"].initial = cohort.origin_tank_id

    def most_returned(self, data) -> tuple[int, str]:
        raise NotImplementedError

    def clean(self):
        data = super().clean()
        end = data.get("end")
        if end == Cohort.End.RETURNED:
            if not data.get("returned_to"):
                self.add_error("returned_to", "Choose the tank the animals went back to.")
            count = data.get("returned_count")
            if count is None:
                self.add_error("returned_count", "Give the number of animals returned.")
            elif self.most_returned(data) is not None:
                most, what = self.most_returned(data)
                if count > most:
                    self.add_error("returned_count", f"Animals returned {count} is not possible: allowed range "
                                                     f"0–{most} ({what}).")
        if end == Cohort.End.RETIRED and not data.get("method", "").strip():
            self.add_error("method", "Say which method was used.")
        return data


class CohortEndForm(EndFields):
    """The end of the cohort's animals never put in a dish (each dish records its own end)."""

    def __init__(self, *args, cohort, free: int, **kwargs):
        super().__init__(*args, cohort=cohort, **kwargs)
        self.free = free
        self.fields["returned_count"].help_text = f"At most {free}: the cohort's animals never put in a dish."
        if free == 0:  # every animal has its dish's end; services.end_cohort refuses any other
            self.fields["end"].choices = [(Cohort.End.IN_DISHES.value, Cohort.End.IN_DISHES.label)]
        else:
            self.fields["end"].choices = Dish.End.choices

    def most_returned(self, data):
        return self.free, "the cohort's animals never put in a dish"


class DishEndForm(EndFields):
    """One form for every open dish of a cohort (the page renders it once, whatever the number of dishes).

    `dishes` is the list of the cohort's open dishes the page has loaded already: no query of its own."""

    dish = forms.TypedChoiceField(coerce=int, label="Dish")

    def __init__(self, *args, cohort, dishes: list[Dish], **kwargs):
        super().__init__(*args, cohort=cohort, **kwargs)
        self.dishes = {d.pk: d for d in dishes}
        self.fields["dish"].choices = [(d.pk, f"{d.label} · {d.animals} animals") for d in dishes]
        self.order_fields(["dish", "end", "returned_to", "returned_count", "method", "note"])

    def clean_dish(self):
        return self.dishes[self.cleaned_data["dish"]]

    def most_returned(self, data):
        dish = data.get("dish")
        return None if dish is None else (dish.animals, f"the animals put in dish {dish.label}")


class DishForm(NamedErrorsMixin, forms.Form):
    """Put some of a cohort's animals in a new dish (before its first trial)."""

    animals = forms.IntegerField(min_value=1, label="Animals in the dish",
                                 error_messages={"min_value": "Animals in the dish %(value)s is not possible: "
                                                              "at least 1."})
    set_up_at = forms.DateTimeField(widget=DATETIME, required=False, label="Set up at", help_text="Empty: now.")

    def __init__(self, *args, free: int, **kwargs):
        super().__init__(*args, **kwargs)
        self.free = free
        self.fields["animals"].widget.attrs["max"] = max(free, 1)
        self.fields["animals"].help_text = f"At most {free}: the cohort's animals not in a dish yet."

    def clean_animals(self):
        animals = self.cleaned_data["animals"]
        if animals > self.free:
            raise forms.ValidationError(f"Animals in the dish {animals} is not possible: allowed range "
                                        f"1–{self.free} (the cohort's animals not in a dish yet).")
        return animals

    def clean_set_up_at(self):
        at = self.cleaned_data.get("set_up_at")
        return None if at is None else check_moment("Set up at", at)


class StudyForm(NamedErrorsMixin, forms.Form):
    code = forms.SlugField(max_length=40, help_text="Short name for addresses and exports, e.g. 'uv-dose-2026'.")
    title = forms.CharField(max_length=200)
    protocol = forms.ModelChoiceField(queryset=Protocol.objects.none())
    question = forms.CharField(widget=forms.Textarea(attrs={"rows": 2}), required=False, max_length=MAX_TEXT)
    conditions = forms.CharField(widget=forms.Textarea(attrs={"rows": 4}), max_length=MAX_TEXT,
                                 help_text="One condition per line.")
    reference_condition = forms.CharField(
        max_length=80, required=False, label="Reference condition",
        help_text="The condition every other one is compared with (usually the control or sham); write it exactly "
                  "as one of the lines above.")
    replicates = forms.IntegerField(
        min_value=1, max_value=200, initial=5, help_text="Trials (dishes) per condition.",
        error_messages={"min_value": "Replicates %(value)s is not possible: allowed range 1–200.",
                        "max_value": "Replicates %(value)s is not possible: allowed range 1–200."})
    method = forms.ChoiceField(choices=Study.Method.choices, initial=BLOCK)
    seed = forms.IntegerField(required=False, min_value=0, max_value=2**62,
                              help_text="Empty: drawn at random now and recorded.")
    observation_window_s = forms.IntegerField(min_value=1, max_value=86400, initial=600,
                                              error_messages={
                                                  "min_value": "Observation window %(value)s s is not possible: "
                                                               "allowed range 1–86400 s.",
                                                  "max_value": "Observation window %(value)s s is not possible: "
                                                               "allowed range 1–86400 s."},
                                              label="Observation window (s)",
                                              help_text="Still clumped at the end: censored at the window.")
    exclusion_criteria = forms.CharField(widget=forms.Textarea(attrs={"rows": 2}), required=False, max_length=MAX_TEXT)
    blinded = forms.BooleanField(required=False, initial=True,
                                 help_text="Until unblinding, only the operator of a trial sees its condition; you "
                                           "too see codes and pooled figures.")
    scorer_not_operator = forms.BooleanField(
        required=False, initial=False, label="Scorer must not be the operator",
        help_text="The person who ran a trial knows its condition; tick to have someone else score every trial.")

    def __init__(self, *args, **kwargs):
        super().__init__(*args, **kwargs)
        self.fields["protocol"].queryset = Protocol.objects.usable_on(timezone.localdate())

    def clean_code(self):
        code = self.cleaned_data["code"]
        if Study.objects.filter(code=code).exists():
            raise forms.ValidationError(f"A study called '{code}' exists already.")
        return code

    def clean_conditions(self):
        labels = [line.strip() for line in self.cleaned_data["conditions"].splitlines() if line.strip()]
        if len(labels) < 2:
            raise forms.ValidationError("Give at least two conditions, one per line.")
        if len(labels) > MAX_CONDITIONS:
            raise forms.ValidationError(f"Conditions: {len(labels)} is impossible; allowed range 2–{MAX_CONDITIONS}.")
        if len(set(labels)) != len(labels):
            raise forms.ValidationError("Each condition needs its own label.")
        if any(len(label) > 80 for label in labels):
            raise forms.ValidationError("Keep each condition label to 80 characters.")
        return labels

    def clean(self):
        data = super().clean()
        labels = data.get("conditions")
        if labels:
            problem = Study(conditions=labels, reference_condition=(data.get("reference_condition") or "").strip()
                            ).reference_problem()
            if problem:
                self.add_error("reference_condition", problem)
            else:
                data["reference_condition"] = (data.get("reference_condition") or "").strip()
        return data


def parse_clusters(text: str, animals: int | None) -> list[dict]:
    """Lines of 'time_s clusters largest_fraction' → [{"t_s", "clusters", "largest_fraction"}]."""
    points = []
    for number, line in enumerate(text.splitlines(), start=1):
        if not line.strip():
            continue
        parts = line.replace(",", " ").split()
        if len(parts) != 3:
            raise forms.ValidationError(f"Cluster line {number} '{line.strip()}': write time (s), cluster count and "
                                        "largest-cluster fraction, e.g. '60 3 0.55'.")
        try:
            t_s, clusters, fraction = float(parts[0]), int(parts[1]), float(parts[2])
        except ValueError:
            raise forms.ValidationError(f"Cluster line {number} '{line.strip()}' is not three numbers.") from None
        b = BOUNDS["disperse_s"]
        if not b.low <= t_s <= b.high:
            raise forms.ValidationError(f"Cluster line {number}: time {t_s:g} s is not possible: allowed range {b.text()}.")
        upper = animals or 100000
        if not 0 <= clusters <= upper:
            raise forms.ValidationError(f"Cluster line {number}: cluster count {clusters} is not possible: allowed "
                                        f"range 0–{upper} (the animals in the arena).")
        if not 0 <= fraction <= 1:
            raise forms.ValidationError(f"Cluster line {number}: " + outside_message("largest_fraction", fraction))
        points.append({"t_s": t_s, "clusters": clusters, "largest_fraction": fraction})
    if len(points) > MAX_CLUSTER_POINTS:
        raise forms.ValidationError(f"At most {MAX_CLUSTER_POINTS} cluster time points.")
    return sorted(points, key=lambda p: p["t_s"])


def clusters_text(points: list[dict]) -> str:
    return "\n".join(f"{p['t_s']:g} {p['clusters']} {p['largest_fraction']:g}" for p in points or [])


class OutcomeFields(NamedErrorsMixin, forms.ModelForm):
    clusters_text = forms.CharField(
        widget=forms.Textarea(attrs={"rows": 3, "placeholder": "60 3 0.55\n120 6 0.30"}), required=False,
        max_length=MAX_TEXT,
        label="Clusters over time", help_text="One line per time point: time (s), cluster count, largest-cluster fraction.")

    def window(self) -> int:
        raise NotImplementedError

    def animals(self) -> int | None:
        raise NotImplementedError

    def clean(self):
        data = super().clean()
        window = self.window()
        if "clusters_text" in data:
            try:
                data["clusters"] = parse_clusters(data.get("clusters_text") or "", self.animals())
            except forms.ValidationError as error:
                self.add_error("clusters_text", error)
        disperse, censored = data.get("disperse_s"), data.get("censored")
        if censored:
            data["disperse_s"] = float(window)
        elif disperse is not None and window and disperse > window:
            self.add_error("disperse_s", f"Time to disperse {disperse:g} s is after the observation window "
                                         f"(0–{window} s). Tick 'still clumped' to record it as censored.")
        mortality, animals = data.get("mortality_24h"), self.animals()
        if mortality is not None and animals and mortality > animals:
            self.add_error("mortality_24h", f"Mortality at 24 h {mortality} is not possible: allowed range 0–{animals} "
                                            "(the animals in the arena).")
        return data


ARENA_FIELDS = ["vessel", "arena_diameter_mm", "water_volume_ml", "water_temp_c", "light_lux", "acclimation_min",
                "animals"]
STIMULUS_FIELDS = ["kind", "wavelength_nm", "irradiance_mw_cm2", "duration_s", "voltage_v", "electrode_gap_cm",
                   "pulse_width_ms", "pulse_count", "pulse_frequency_hz", "temp_step_c", "temp_rate_c_min",
                   "substance", "concentration_um", "mechanical_note"]
OUTCOME_FORM_FIELDS = ["aggregate_s", "disperse_s", "censored", "mortality_24h"]

# Which stimulus fields each kind needs; the form asks for them and the page shows only those.
REQUIRED_FOR_KIND = {
    Stimulus.LIGHT: ("wavelength_nm", "irradiance_mw_cm2", "duration_s"),
    Stimulus.UV: ("wavelength_nm", "irradiance_mw_cm2", "duration_s"),
    Stimulus.ELECTRICAL: ("voltage_v", "electrode_gap_cm", "pulse_width_ms", "pulse_count"),
    Stimulus.THERMAL: ("temp_step_c",),
    Stimulus.CHEMICAL: ("substance", "concentration_um"),
    Stimulus.MECHANICAL: ("mechanical_note",),
    Stimulus.NONE: (),
}


class TrialForm(OutcomeFields):
    slot = forms.TypedChoiceField(coerce=int, help_text="Open slots in the randomised run order; the first is next.")
    dish = forms.ModelChoiceField(queryset=Dish.objects.none(), required=False, label="Dish",
                                  empty_label="New dish from a cohort",
                                  help_text="The group of animals this trial exposes: an open dish, whose earlier "
                                            "exposures, rest and dose count, or a new dish.")
    cohort = forms.ModelChoiceField(queryset=Cohort.objects.none(), required=False,
                                    help_text="For a new dish: active cohorts under the study's protocol.")
    dish_animals = forms.IntegerField(min_value=1, required=False, label="Animals in the new dish",
                                      help_text="Empty: the animals in the arena.",
                                      error_messages={"min_value": "Animals in the new dish %(value)s is not "
                                                                   "possible: at least 1."})
    run_at = forms.DateTimeField(widget=DATETIME, label="Stimulus applied at")
    override_reason = reason_field(
        required=False, label="Manager's override: reason",
        help_text="Only when a protocol limit is broken; recorded with your name and opens a deviation.")

    class Meta:
        model = Trial
        fields = ARENA_FIELDS + STIMULUS_FIELDS + OUTCOME_FORM_FIELDS + ["note"]
        widgets = {"note": forms.Textarea(attrs={"rows": 2})}
        labels = {"censored": "Still clumped at the end of the window (censored)", "mortality_24h": "Dead at 24 h"}

    def __init__(self, *args, study: Study, slots: list[dict], cohorts, dishes, can_override: bool, **kwargs):
        super().__init__(*args, **kwargs)
        self.study = study
        # Only the slots this operator claimed (views._open_slots): theirs to see and to record.
        self.fields["slot"].choices = [(s["slot"], f"#{s['slot']} · {s['code']} · {s['condition']} "
                                                   f"(replicate {s['replicate']})") for s in slots]
        self.fields["slot"].help_text = "The slots you claimed; claim another open slot above to run it."
        self.fields["cohort"].queryset = cohorts
        self.fields["dish"].queryset = dishes
        self.fields["dish"].label_from_instance = lambda d: f"{d.label} · {d.animals} animals"
        self.fields["run_at"].initial = timezone.localtime().replace(second=0, microsecond=0)
        self.fields["kind"].widget.attrs["data-stimulus-kind"] = "1"
        self.fields["animals"].widget.attrs["min"] = 1
        if not can_override:
            del self.fields["override_reason"]

    def window(self) -> int:
        return self.study.observation_window_s

    def clean_run_at(self):
        return check_moment("Stimulus applied at", self.cleaned_data.get("run_at"))

    def animals(self):
        return self.cleaned_data.get("animals")

    def group(self, names) -> list:
        return [self[name] for name in names if name in self.fields]

    def groups(self) -> dict[str, list]:
        """Bound fields by section of the page, so the template lists no field names."""
        return {
            "arena": self.group(ARENA_FIELDS),
            "light": self.group(["wavelength_nm", "irradiance_mw_cm2", "duration_s"]),
            "electrical": self.group(["voltage_v", "electrode_gap_cm", "pulse_width_ms", "pulse_count",
                                      "pulse_frequency_hz"]),
            "thermal": self.group(["temp_step_c", "temp_rate_c_min"]),
            "chemical": self.group(["substance", "concentration_um"]),
            "outcome": self.group(OUTCOME_FORM_FIELDS),
        }

    def clean(self):
        data = super().clean()
        kind = data.get("kind")
        for name in REQUIRED_FOR_KIND.get(kind, ()):
            if data.get(name) in (None, ""):
                self.add_error(name, f"Required for a {Stimulus(kind).label.lower()} stimulus.")
        dish, cohort = data.get("dish"), data.get("cohort")
        if dish is not None and cohort is not None and dish.cohort_id != cohort.pk:
            self.add_error("dish", f"Dish {dish.label} is from cohort {dish.cohort.label}, not {cohort.label}: "
                                   "choose the dish, or the cohort for a new dish.")
        elif dish is None and cohort is None and "dish" not in self.errors and "cohort" not in self.errors:
            self.add_error("cohort", "Choose an open dish, or the cohort to set up a new dish from.")
        if dish is not None and data.get("dish_animals") is not None:
            self.add_error("dish_animals", f"Dish {dish.label} is set up already ({dish.animals} animals); leave "
                                           "'Animals in the new dish' empty.")
        return data

    def group_values(self) -> dict:
        """The keywords of services.record_trial that say which animals: a dish, or a cohort for a new one."""
        data = self.cleaned_data
        if data.get("dish") is not None:
            return {"dish": data["dish"]}
        return {"cohort": data["cohort"], "dish_animals": data.get("dish_animals")}

    def _post_clean(self):
        # Model validation runs in services.record_trial, where the slot, cohort and derived
        # values are known; here only the fields themselves are checked.
        for name, value in list(self.cleaned_data.items()):
            field = Trial._meta.get_field(name) if name in self._meta.fields else None
            if field is not None and value not in (None, ""):
                for validator in field.validators:
                    try:
                        validator(value)
                    except forms.ValidationError as error:
                        self.add_error(name, error)

    def trial_values(self) -> dict:
        data = self.cleaned_data
        values = {name: data.get(name) for name in ARENA_FIELDS + STIMULUS_FIELDS + ["note"]}
        values["substance"] = values["substance"] or ""
        values["mechanical_note"] = values["mechanical_note"] or ""
        values["note"] = values["note"] or ""
        values["run_at"] = data["run_at"]
        for name in ("aggregate_s", "disperse_s", "censored", "mortality_24h", "clusters"):
            values[name] = data.get(name)
        values["censored"] = bool(values["censored"])
        values["clusters"] = values["clusters"] or []
        return values


class ScoreForm(OutcomeFields):
    """The outcomes of one trial; `late_only`: just the late ones (LATE_OUTCOME_FIELDS), as after unblinding.

    A reason is required when a value already recorded changes (services.is_correction); entering a
    value for the first time (the 24 h count the day after scoring) needs none.
    """
    reason = reason_field(required=False, label="Reason for the correction",
                          help_text="Required when you change a value already recorded; kept in the history.",
                          error_messages={"required": "Give a reason for correcting the score."})

    class Meta:
        model = Trial
        fields = OUTCOME_FORM_FIELDS
        labels = {"censored": "Still clumped at the end of the window (censored)", "mortality_24h": "Dead at 24 h"}

    def __init__(self, *args, late_only: bool = False, **kwargs):
        super().__init__(*args, **kwargs)
        self.late_only = late_only
        if late_only:
            for name in [n for n in self.fields if n not in LATE_OUTCOME_FIELDS and n != "reason"]:
                del self.fields[name]
        else:
            self.fields["clusters_text"].initial = clusters_text(self.instance.clusters)
        recorded = self.instance.is_scored and not late_only or any(
            getattr(self.instance, name) is not None for name in LATE_OUTCOME_FIELDS)
        if not recorded:
            del self.fields["reason"]  # a first score needs no reason

    def clean_reason(self):
        return self.cleaned_data["reason"].strip()

    def clean(self):
        data = super().clean()
        if "reason" in self.fields and not self.errors and not data.get("reason"):
            from .services import is_correction, outcome_changes  # services import no forms
            if is_correction(self.instance, outcome_changes(self.instance, self.outcome_values())):
                self.add_error("reason", "Give a reason for correcting the score.")
        return data

    def window(self) -> int:
        return self.instance.observation_window_s

    def animals(self):
        return self.instance.animals

    def _post_clean(self):
        pass  # services.score_trial runs the model validation with the order checks

    def outcome_values(self) -> dict:
        data = self.cleaned_data
        if self.late_only:
            return {name: data.get(name) for name in LATE_OUTCOME_FIELDS}
        return {"aggregate_s": data.get("aggregate_s"), "disperse_s": data.get("disperse_s"),
                "censored": bool(data.get("censored")), "mortality_24h": data.get("mortality_24h"),
                "clusters": data.get("clusters") or []}


class AttachmentForm(NamedErrorsMixin, forms.ModelForm):
    """A file is taken for what its first bytes say it is (experiments/filetypes.py), not for its name."""

    class Meta:
        model = Attachment
        fields = ["file", "kind", "caption"]
        error_messages = {"file": {"required": "File: choose a file to attach.",
                                   "empty": "File: the file is empty; nothing was stored."}}

    def clean_file(self):
        upload = self.cleaned_data["file"]
        if upload.size > uploads.limit_bytes():
            raise forms.ValidationError(f"File '{upload.name}' is {upload.size / 1e6:.1f} MB, above the limit of "
                                        f"{uploads.limit_text()}.")
        head = upload.read(filetypes.SNIFF_BYTES)
        upload.seek(0)
        self.file_type = filetypes.sniff(head)
        if self.file_type is None:
            raise forms.ValidationError(f"File '{upload.name}' is not an allowed type: allowed are "
                                        f"{filetypes.allowed_text('photo')}, {filetypes.allowed_text('video')}, "
                                        "PDF and plain text or CSV (told by the file's content).")
        return upload

    def clean(self):
        data = super().clean()
        kind, file_type = data.get("kind"), getattr(self, "file_type", None)
        if kind and file_type and file_type not in filetypes.ALLOWED_BY_KIND[kind]:
            self.add_error("kind", f"Kind '{Attachment.Kind(kind).label}' does not fit a "
                                   f"{filetypes.TYPES[file_type][0]}: a {Attachment.Kind(kind).label.lower()} is "
                                   f"{filetypes.allowed_text(kind)}.")
        return data


class CalendarForm(NamedErrorsMixin, forms.Form):
    room = forms.ModelChoiceField(queryset=None, required=False, empty_label="All rooms", to_field_name="code")
    view = forms.ChoiceField(choices=[("week", "Week"), ("month", "Month")], required=False)
    start = forms.DateField(widget=DATE, required=False)

    def __init__(self, *args, **kwargs):
        from colonies.models import Room
        super().__init__(*args, **kwargs)
        self.fields["room"].queryset = Room.objects.all()

    def clean_start(self):
        day = self.cleaned_data.get("start")
        return None if day is None else check_date("Start", day, ahead_days=10 * 366)

