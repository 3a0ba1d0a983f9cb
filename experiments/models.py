"""Protocols, animal bookings, cohorts and aggregation trials.

Traceability runs one way: a trial names its dish and cohort, the dish its cohort, the cohort its
booking and origin tank, the booking its protocol. Nothing is deleted: bookings are cancelled or
expire, trials and dishes set up in error are voided or excluded with a reason, dishes and cohorts
end (returned, retired, died). Every model keeps a full change
history (django-simple-history); history_user comes from the request middleware or is set
explicitly in services.py.
"""
from django.conf import settings
from django.contrib.contenttypes.fields import GenericRelation
from django.core.exceptions import ValidationError
from django.db import models
from django.db.models import Q
from django.urls import reverse
from django.utils import timezone
from simple_history.models import HistoricalRecords

from colonies.models import Species, Tank, Voidable, VoidableQuerySet
from colonies.validators import MAX_TEXT, DateRange
from vermilog.lab_time import lab_date

from . import limits
from .validators import BOUNDS, PROTOCOL_AHEAD_DAYS, Within, within_q

DEFAULT_OBSERVATION_WINDOW_S = 600
DEFAULT_REPLICATES = 5

UV_BELOW_NM = 400  # light below 400 nm is ultraviolet (ISO 21348 puts the UV/visible edge at 400 nm; from memory)

CAUTION_UV = ("Ultraviolet light: wear eye and skin protection rated for the wavelength, shield the beam and "
              "never look into the source.")
CAUTION_ELECTRICAL = ("Electrical stimulus: use only an isolated, current-limited low-voltage supply checked by a "
                      "competent person; keep hands, water and electrodes apart while powered.")
CAUTION_DEFER = ("Your institution's rules and its animal-care oversight take precedence over anything shown "
                 "here.")


class Stimulus(models.TextChoices):
    NONE = "none", "None (sham or control handling)"
    LIGHT = "light", "Light (visible)"
    UV = "uv", "Ultraviolet light"
    ELECTRICAL = "electrical", "Electrical"
    THERMAL = "thermal", "Thermal"
    CHEMICAL = "chemical", "Chemical"
    MECHANICAL = "mechanical", "Mechanical"


LIGHT_KINDS = (Stimulus.LIGHT, Stimulus.UV)


def cautions_for(kind: str, wavelength_nm: float | None = None) -> list[str]:
    """Safety notes to show where a stimulus of this kind is configured."""
    notes = []
    if kind == Stimulus.UV or (kind == Stimulus.LIGHT and wavelength_nm is not None and wavelength_nm < UV_BELOW_NM):
        notes.append(CAUTION_UV)
    if kind == Stimulus.ELECTRICAL:
        notes.append(CAUTION_ELECTRICAL)
    return notes + [CAUTION_DEFER] if notes else []


def _user_fk(**kwargs):
    return models.ForeignKey(settings.AUTH_USER_MODEL, on_delete=models.PROTECT, related_name="+", **kwargs)


# ---------------------------------------------------------------------------------------------
# Protocols
# ---------------------------------------------------------------------------------------------
class ProtocolQuerySet(models.QuerySet):
    def usable_on(self, day):
        return self.filter(status=Protocol.Status.APPROVED, starts_on__lte=day, expires_on__gte=day)


class Protocol(models.Model):
    class Status(models.TextChoices):
        DRAFT = "draft", "Draft"
        APPROVED = "approved", "Approved"
        SUSPENDED = "suspended", "Suspended"
        CLOSED = "closed", "Closed"

    title = models.CharField(max_length=200)
    reference = models.CharField(max_length=40, unique=True, help_text="The lab's approval reference, e.g. 'AWB-2026-014'.")
    approver = models.CharField(max_length=120, help_text="Who approved it: person and body.")
    approved_on = models.DateField(null=True, blank=True, validators=[DateRange("Approved on")])
    starts_on = models.DateField(validators=[DateRange("Starts on", ahead_days=PROTOCOL_AHEAD_DAYS)])
    expires_on = models.DateField(validators=[DateRange("Expires on", ahead_days=PROTOCOL_AHEAD_DAYS)])
    status = models.CharField(max_length=10, choices=Status.choices, default=Status.DRAFT)
    max_animals_per_trial = models.PositiveIntegerField(validators=[Within("animals")],
                                                        help_text="Most animals in one trial arena.")
    max_exposures_per_group = models.PositiveIntegerField(
        validators=[Within("exposures")], help_text="Most trials (exposures, sham included) for one dish (group of animals).")
    min_rest_hours = models.FloatField(default=0, validators=[Within("min_rest_hours")],
                                       help_text="Least time between two exposures of the same dish, hours.")
    max_cumulative_dose_mj_cm2 = models.FloatField(
        null=True, blank=True, validators=[Within("dose_mj_cm2")],
        help_text="Most light/UV dose one dish of animals may receive in total, mJ/cm². Empty: no light stimulus "
                  "approved.")
    max_animals_total = models.PositiveIntegerField(
        null=True, blank=True, validators=[Within("animals")],
        help_text="Animals the approval allows over the protocol's whole life (drawn from tanks into cohorts). "
                  "Empty: not set; the period report says so.")
    notes = models.TextField(max_length=MAX_TEXT, blank=True)
    signatures = GenericRelation("colonies.Signature")
    history = HistoricalRecords()

    objects = ProtocolQuerySet.as_manager()

    class Meta:
        ordering = ["-starts_on", "reference"]
        constraints = [
            models.CheckConstraint(condition=Q(expires_on__gte=models.F("starts_on")), name="protocol_expires_after_start"),
            models.CheckConstraint(condition=Q(max_animals_per_trial__gte=1), name="protocol_max_animals_positive"),
            models.CheckConstraint(condition=Q(max_exposures_per_group__gte=1), name="protocol_max_exposures_positive"),
            models.CheckConstraint(condition=within_q("min_rest_hours"), name="protocol_min_rest_bounds"),
            models.CheckConstraint(condition=within_q("max_animals_per_trial", "animals")
                                   & within_q("max_exposures_per_group", "exposures"), name="protocol_maxima_bounds"),
            models.CheckConstraint(condition=within_q("max_animals_total", "animals"),
                                   name="protocol_max_animals_total_bounds"),
        ]

    def __str__(self):
        return f"{self.reference} · {self.title}"

    def get_absolute_url(self):
        return reverse("experiments:protocol-detail", args=[self.pk])

    def terms(self) -> limits.ProtocolTerms:
        """The limits as plain values; uses prefetched allowances when present."""
        return _protocol_terms(self, self.allowances.all(), self)

    def signed_content(self) -> dict:
        """What an approval, amendment or suspension signature vouches for: status and the terms in force
        (the newest version; colonies/signatures.py hashes it). Runs one query for the version."""
        version = self.versions.order_by("-number").first()
        return {"record": "protocol", "id": self.pk, "reference": self.reference, "status": self.status,
                "approved_on": self.approved_on, "version": version.number if version else None,
                "terms": version.content() if version else None}

    def problem(self, day) -> str:
        """Why this protocol cannot be booked or used on `day`; "" when it can."""
        return limits.protocol_problem(self.terms(), day)

    def cautions(self) -> list[str]:
        notes = []
        for a in self.allowances.all():
            notes += [n for n in cautions_for(a.kind, a.wavelength_min_nm) if n not in notes and n != CAUTION_DEFER]
        return notes + [CAUTION_DEFER] if notes else []


# Per-exposure maxima an allowance may set: allowance field -> (trial setting key, label, unit)
ALLOWANCE_MAXIMA = {
    "max_irradiance_mw_cm2": ("irradiance_mw_cm2", "Irradiance", "mW/cm²"),
    "max_duration_s": ("duration_s", "Duration", "s"),
    "max_dose_mj_cm2": ("dose_mj_cm2", "Dose per exposure", "mJ/cm²"),
    "max_voltage_v": ("voltage_v", "Voltage", "V"),
    "max_field_v_cm": ("field_v_cm", "Field strength", "V/cm"),
    "max_pulse_width_ms": ("pulse_width_ms", "Pulse width", "ms"),
    "max_pulse_count": ("pulse_count", "Pulse count", "pulses"),
    "max_temp_step_c": ("temp_step_abs_c", "Temperature step (size)", "°C"),
    "max_temp_rate_c_min": ("temp_rate_c_min", "Temperature ramp rate", "°C/min"),
}


class Allowance(models.Model):
    """One stimulus type a protocol allows, with its maximum settings (empty = not limited here)."""

    protocol = models.ForeignKey(Protocol, on_delete=models.PROTECT, related_name="allowances")
    kind = models.CharField(max_length=12, choices=Stimulus.choices)
    wavelength_min_nm = models.FloatField(null=True, blank=True, validators=[Within("wavelength_nm")])
    wavelength_max_nm = models.FloatField(null=True, blank=True, validators=[Within("wavelength_nm")])
    max_irradiance_mw_cm2 = models.FloatField(null=True, blank=True, validators=[Within("irradiance_mw_cm2")])
    max_duration_s = models.FloatField(null=True, blank=True, validators=[Within("duration_s")])
    max_dose_mj_cm2 = models.FloatField(null=True, blank=True, validators=[Within("dose_mj_cm2")],
                                        help_text="Most light dose in one exposure, mJ/cm².")
    max_voltage_v = models.FloatField(null=True, blank=True, validators=[Within("voltage_v")])
    max_field_v_cm = models.FloatField(null=True, blank=True, validators=[Within("field_v_cm")])
    max_pulse_width_ms = models.FloatField(null=True, blank=True, validators=[Within("pulse_width_ms")])
    max_pulse_count = models.PositiveIntegerField(null=True, blank=True, validators=[Within("pulse_count")])
    max_temp_step_c = models.FloatField(null=True, blank=True, validators=[Within("temp_step_abs_c")],
                                        help_text="Largest temperature step either way, °C.")
    max_temp_rate_c_min = models.FloatField(null=True, blank=True, validators=[Within("temp_rate_c_min")])
    substance = models.CharField(max_length=80, blank=True, help_text="Chemical stimulus: the approved substance.")
    max_concentration_um = models.FloatField(null=True, blank=True, validators=[Within("concentration_um")])
    notes = models.TextField(max_length=MAX_TEXT, blank=True, help_text="Mechanical stimulus: what is approved (e.g. 'pipette jet, 1 mL').")
    history = HistoricalRecords()

    class Meta:
        ordering = ["protocol", "kind", "substance"]
        constraints = [
            models.UniqueConstraint(fields=["protocol", "kind", "substance"], name="allowance_one_per_kind"),
            models.CheckConstraint(
                condition=Q(wavelength_min_nm__isnull=True) | Q(wavelength_max_nm__isnull=True)
                | Q(wavelength_min_nm__lte=models.F("wavelength_max_nm")), name="allowance_band_ordered"),
            models.CheckConstraint(condition=within_q("max_pulse_count", "pulse_count")
                                   & within_q("max_temp_step_c", "temp_step_abs_c"), name="allowance_maxima_bounds"),
        ]

    def __str__(self):
        return f"{self.protocol.reference}: {self.get_kind_display()}{' ' + self.substance if self.substance else ''}"

    def get_absolute_url(self):
        return self.protocol.get_absolute_url()

    def limit_rows(self) -> list[tuple[str, str]]:
        """(label, "≤ value unit") for the protocol page."""
        rows = []
        if self.wavelength_min_nm is not None or self.wavelength_max_nm is not None:
            low = f"{self.wavelength_min_nm:g}" if self.wavelength_min_nm is not None else "…"
            high = f"{self.wavelength_max_nm:g}" if self.wavelength_max_nm is not None else "…"
            rows.append(("Wavelength band", f"{low}–{high} nm"))
        for name, (_key, label, unit) in ALLOWANCE_MAXIMA.items():
            value = getattr(self, name)
            if value is not None:
                rows.append((label, f"≤ {value:g} {unit}"))
        if self.substance:
            conc = f" ≤ {self.max_concentration_um:g} µM" if self.max_concentration_um is not None else ""
            rows.append(("Substance", f"{self.substance}{conc}"))
        return rows

    def terms(self) -> limits.AllowanceTerms:
        maxima = {}
        for name, (key, label, unit) in ALLOWANCE_MAXIMA.items():
            value = getattr(self, name)
            if value is not None:
                maxima[key] = (label, unit, value)
        substances = {self.substance.strip().lower(): self.max_concentration_um} if self.substance else {}
        return limits.AllowanceTerms(self.get_kind_display(), maxima,
                                     (self.wavelength_min_nm, self.wavelength_max_nm), substances)


# Allowance fields a protocol version copies (everything but the row's own keys)
ALLOWANCE_FIELDS = ["kind", "wavelength_min_nm", "wavelength_max_nm", *ALLOWANCE_MAXIMA, "max_concentration_um",
                    "substance", "notes"]
# Protocol fields a version copies; the reference (the protocol's identity), status and approval date are not terms
VERSION_FIELDS = ["title", "approver", "starts_on", "expires_on", "max_animals_per_trial", "max_exposures_per_group",
                  "min_rest_hours", "max_cumulative_dose_mj_cm2", "notes"]


def _protocol_terms(source, allowances, protocol: Protocol) -> limits.ProtocolTerms:
    """Plain limits from `source` (a protocol or one of its versions) and its allowances; status from `protocol`."""
    merged = {}
    for a in allowances:
        terms = a.terms()
        if a.kind in merged and a.kind == Stimulus.CHEMICAL:
            substances = {**merged[a.kind].substances, **terms.substances}
            terms = limits.AllowanceTerms(terms.kind_label, terms.maxima, terms.wavelength_band, substances)
        merged[a.kind] = terms
    return limits.ProtocolTerms(
        reference=protocol.reference, status_ok=protocol.status == Protocol.Status.APPROVED,
        status_label=protocol.get_status_display(), starts_on=source.starts_on, expires_on=source.expires_on,
        max_animals_per_trial=source.max_animals_per_trial, max_exposures_per_group=source.max_exposures_per_group,
        min_rest_hours=source.min_rest_hours, max_cumulative_dose_mj_cm2=source.max_cumulative_dose_mj_cm2,
        allowances=merged,
    )


class ProtocolVersion(models.Model):
    """A protocol's terms from `effective_from` on: version 1 when it was entered, one more per amendment.

    Written once by experiments/protocols.py and never changed: each trial records the version in force
    when it ran (`Trial.protocol_version`), and its limit checks and ledger line use that version, so an
    amendment never rewrites what earlier trials were allowed. The protocol row holds a copy of the
    newest version's terms (what bookings and new trials are checked against).
    """

    protocol = models.ForeignKey(Protocol, on_delete=models.PROTECT, related_name="versions")
    number = models.PositiveIntegerField()
    effective_from = models.DateTimeField(help_text="Trials run from this time on are held to these terms.")
    recorded_at = models.DateTimeField(default=timezone.now)
    recorded_by = _user_fk(null=True, blank=True)
    reason = models.TextField(max_length=MAX_TEXT, blank=True, help_text="What the amendment changes and why.")
    approval_reference = models.CharField(max_length=60, blank=True,
                                          help_text="The approval body's reference for this version or amendment.")
    title = models.CharField(max_length=200)
    approver = models.CharField(max_length=120)
    starts_on = models.DateField()
    expires_on = models.DateField()
    max_animals_per_trial = models.PositiveIntegerField()
    max_exposures_per_group = models.PositiveIntegerField()
    min_rest_hours = models.FloatField()
    max_cumulative_dose_mj_cm2 = models.FloatField(null=True, blank=True)
    notes = models.TextField(max_length=MAX_TEXT, blank=True)
    allowances = models.JSONField(default=list, blank=True, help_text="The allowances' fields as they were.")

    class Meta:
        ordering = ["protocol", "number"]
        get_latest_by = "number"
        constraints = [
            models.UniqueConstraint(fields=["protocol", "number"], name="protocol_version_number_once"),
        ]
        indexes = [
            # protocols.version_at(): the version in force at a trial's time
            models.Index(fields=["protocol", "effective_from"], name="protocol_version_in_force"),
        ]

    def __str__(self):
        return f"{self.protocol.reference} version {self.number}"

    def get_absolute_url(self):
        return reverse("experiments:protocol-detail", args=[self.protocol_id]) + f"#version-{self.number}"

    def allowance_rows(self) -> list["Allowance"]:
        """The allowances as unsaved Allowance objects (for their limit rows and terms); no query."""
        return [Allowance(**values) for values in self.allowances]

    def terms(self, protocol: Protocol | None = None) -> limits.ProtocolTerms:
        """The limits of this version; status (approved, suspended) from the protocol as it is now."""
        return _protocol_terms(self, self.allowance_rows(), protocol or self.protocol)

    def content(self) -> dict:
        return {"number": self.number, "effective_from": self.effective_from,
                "approval_reference": self.approval_reference, "allowances": self.allowances,
                **{name: getattr(self, name) for name in VERSION_FIELDS}}


def allowance_values(allowance: "Allowance") -> dict:
    return {name: getattr(allowance, name) for name in ALLOWANCE_FIELDS}


# ---------------------------------------------------------------------------------------------
# Bookings and cohorts
# ---------------------------------------------------------------------------------------------
class BookingQuerySet(models.QuerySet):
    def active(self):
        return self.filter(status=Booking.Status.ACTIVE)

    def holding(self, today):
        """Active bookings that still hold animals: their day is today or later (past ones await expiry)."""
        return self.active().filter(needed_on__gte=today)

    def between(self, first, last):
        return self.filter(needed_on__gte=first, needed_on__lte=last)

    def in_room(self, room):
        return self.filter(tank__room=room) if room is not None else self


class Booking(models.Model):
    class Status(models.TextChoices):
        ACTIVE = "booked", "Booked"
        DRAWN = "drawn", "Drawn"
        CANCELLED = "cancelled", "Cancelled"
        EXPIRED = "expired", "Expired (not drawn)"

    protocol = models.ForeignKey(Protocol, on_delete=models.PROTECT, related_name="bookings")
    tank = models.ForeignKey(Tank, on_delete=models.PROTECT, related_name="bookings")
    species = models.ForeignKey(Species, on_delete=models.PROTECT, related_name="+")
    animals = models.PositiveIntegerField(validators=[Within("animals")], help_text="How many animals to draw.")
    needed_on = models.DateField(help_text="The day the animals will be drawn. Not drawn by the end of it: expires.")
    purpose = models.CharField(max_length=200, blank=True)
    status = models.CharField(max_length=10, choices=Status.choices, default=Status.ACTIVE)
    booked_by = _user_fk()
    booked_at = models.DateTimeField(default=timezone.now)
    cancelled_at = models.DateTimeField(null=True, blank=True)
    cancelled_by = _user_fk(null=True, blank=True)
    cancel_reason = models.TextField(blank=True)
    history = HistoricalRecords()

    objects = BookingQuerySet.as_manager()

    class Meta:
        ordering = ["needed_on", "tank__code"]
        constraints = [
            models.CheckConstraint(condition=Q(animals__gte=1), name="booking_animals_positive"),
            models.CheckConstraint(condition=within_q("animals"), name="booking_animals_bounds"),
            models.CheckConstraint(condition=~Q(status="cancelled") | ~Q(cancel_reason=""),
                                   name="booking_cancel_has_reason"),
        ]
        indexes = [
            # Availability (services.tanks_with_availability): active bookings per tank.
            models.Index(fields=["tank", "status"], name="booking_tank_status"),
            # The bookings calendar and expire_bookings: bookings by day.
            models.Index(fields=["needed_on", "status"], name="booking_day_status"),
        ]

    def __str__(self):
        return f"Booking {self.pk}: {self.animals} from {self.tank.code} on {lab_date(self.needed_on)}"

    def get_absolute_url(self):
        return reverse("experiments:booking-detail", args=[self.pk])

    @property
    def is_active(self) -> bool:
        return self.status == self.Status.ACTIVE

    def status_on(self, today) -> "Booking.Status":
        """The status as pages show it: an active booking past its day is expired, whether or not the
        expire_bookings command has written that yet (pages never write)."""
        if self.status == self.Status.ACTIVE and self.needed_on < today:
            return self.Status.EXPIRED
        return self.Status(self.status)


class Cohort(models.Model):
    """Animals drawn from one tank for trials, from the draw to their end."""

    class End(models.TextChoices):
        RETURNED = "returned", "Returned to a tank"
        RETIRED = "retired", "Retired"
        DIED = "died", "Died"
        # Every animal went into a dish, and each dish records its own end (so the cohort has none to tell).
        IN_DISHES = "dishes", "All animals went into dishes"

    booking = models.OneToOneField(Booking, on_delete=models.PROTECT, related_name="cohort")
    protocol = models.ForeignKey(Protocol, on_delete=models.PROTECT, related_name="cohorts")
    origin_tank = models.ForeignKey(Tank, on_delete=models.PROTECT, related_name="cohorts_drawn")
    size = models.PositiveIntegerField(validators=[Within("animals")], help_text="Animals drawn.")
    drawn_at = models.DateTimeField(default=timezone.now)
    drawn_by = _user_fk()
    end = models.CharField(max_length=10, choices=End.choices, blank=True)
    ended_at = models.DateTimeField(null=True, blank=True)
    ended_by = _user_fk(null=True, blank=True)
    returned_to = models.ForeignKey(Tank, null=True, blank=True, on_delete=models.PROTECT,
                                    related_name="cohorts_returned")
    returned_count = models.PositiveIntegerField(null=True, blank=True, help_text="Animals put back (alive).")
    end_method = models.CharField(max_length=200, blank=True, help_text="Retired: the method used.")
    end_note = models.TextField(max_length=MAX_TEXT, blank=True)
    history = HistoricalRecords()

    class Meta:
        ordering = ["-drawn_at"]
        get_latest_by = "drawn_at"
        constraints = [
            models.CheckConstraint(condition=Q(size__gte=1), name="cohort_size_positive"),
            models.CheckConstraint(condition=within_q("size", "animals"), name="cohort_size_bounds"),
            models.CheckConstraint(condition=Q(returned_count__isnull=True) | Q(returned_count__lte=models.F("size")),
                                   name="cohort_returned_not_above_size"),
            models.CheckConstraint(
                condition=~Q(end="returned") | Q(returned_to__isnull=False, returned_count__isnull=False),
                name="cohort_returned_has_tank_and_count"),
            models.CheckConstraint(condition=Q(end="") | Q(ended_at__isnull=False), name="cohort_end_has_time"),
        ]
        indexes = [
            # services.current_population: animals drawn from a tank since its last census.
            models.Index(fields=["origin_tank", "drawn_at"], name="cohort_origin_drawn"),
            # ... and animals returned to it.
            models.Index(fields=["returned_to", "ended_at"], name="cohort_returned_ended"),
        ]

    def __str__(self):
        return self.label

    @property
    def label(self) -> str:
        return f"C-{self.pk:04d}" if self.pk else "new cohort"

    @property
    def subject(self) -> str:
        """How protocol-limit deviations named a cohort before dishes (they now name the dish: Dish.subject)."""
        return f"cohort:{self.pk}"

    def get_absolute_url(self):
        return reverse("experiments:cohort-detail", args=[self.pk])

    @property
    def is_active(self) -> bool:
        return not self.end

    @property
    def ended_in_dishes(self) -> bool:
        """Every animal went into a dish: the cohort's end tells nothing of its own."""
        return self.end == self.End.IN_DISHES


class DishQuerySet(VoidableQuerySet):
    def open(self):
        """Dishes that still hold their animals: not ended, not voided."""
        return self.current().filter(end="")


class Dish(Voidable):
    """A group of animals taken from a cohort into one dish, from its set-up to its end.

    The dish is the group the protocol's welfare limits count: every trial run on it is an exposure
    of its animals (exposures, rest and cumulative dose are per dish). A cohort feeds several dishes
    at once, never more animals than it holds. A dish set up in error (no trials) is voided, never
    deleted; the others end like a cohort: returned to a tank, retired or died.
    """

    class End(models.TextChoices):
        RETURNED = "returned", "Returned to a tank"
        RETIRED = "retired", "Retired"
        DIED = "died", "Died"

    cohort = models.ForeignKey(Cohort, on_delete=models.PROTECT, related_name="dishes")
    number = models.PositiveIntegerField(help_text="The dish's number within its cohort (1, 2, ...).")
    animals = models.PositiveIntegerField(validators=[Within("animals")], help_text="Animals put in the dish.")
    set_up_at = models.DateTimeField(default=timezone.now, help_text="When the animals were put in the dish.")
    set_up_by = _user_fk()
    end = models.CharField(max_length=10, choices=End.choices, blank=True)
    ended_at = models.DateTimeField(null=True, blank=True)
    ended_by = _user_fk(null=True, blank=True)
    returned_to = models.ForeignKey(Tank, null=True, blank=True, on_delete=models.PROTECT,
                                    related_name="dishes_returned")
    returned_count = models.PositiveIntegerField(null=True, blank=True, help_text="Animals put back (alive).")
    end_method = models.CharField(max_length=200, blank=True, help_text="Retired: the method used.")
    end_note = models.TextField(max_length=MAX_TEXT, blank=True)
    history = HistoricalRecords()

    objects = DishQuerySet.as_manager()

    class Meta:
        ordering = ["cohort_id", "number"]
        get_latest_by = "set_up_at"
        verbose_name_plural = "dishes"
        constraints = [
            models.UniqueConstraint(fields=["cohort", "number"], name="dish_number_unique_in_cohort"),
            models.CheckConstraint(condition=Q(animals__gte=1), name="dish_animals_positive"),
            models.CheckConstraint(condition=within_q("animals"), name="dish_animals_bounds"),
            models.CheckConstraint(condition=Q(returned_count__isnull=True)
                                   | Q(returned_count__lte=models.F("animals")), name="dish_returned_not_above_animals"),
            models.CheckConstraint(
                condition=~Q(end="returned") | Q(returned_to__isnull=False, returned_count__isnull=False),
                name="dish_returned_has_tank_and_count"),
            models.CheckConstraint(condition=Q(end="") | Q(ended_at__isnull=False), name="dish_end_has_time"),
        ]
        indexes = [
            # services.current_population: animals returned to a tank from dishes since its last census.
            models.Index(fields=["returned_to", "ended_at"], name="dish_returned_ended"),
        ]

    def __str__(self):
        return self.label

    @property
    def label(self) -> str:
        """C-0012-D2: cohort and dish number (no query: uses cohort_id)."""
        return f"C-{self.cohort_id:04d}-D{self.number}" if self.cohort_id and self.number else "new dish"

    @property
    def subject(self) -> str:
        """How a protocol-limit deviation names this group of animals."""
        return f"dish:{self.pk}"

    def get_absolute_url(self):
        return reverse("experiments:cohort-detail", args=[self.cohort_id]) + f"#dish-{self.number}"

    @property
    def is_open(self) -> bool:
        return not self.end and not self.is_voided


# ---------------------------------------------------------------------------------------------
# Studies and trials
# ---------------------------------------------------------------------------------------------
class Study(models.Model):
    """A named set of trials: conditions, replicates, randomised run order and blinding."""

    class Method(models.TextChoices):
        SIMPLE = "simple", "Simple randomisation of the run order"
        BLOCK = "block", "Permuted blocks (each condition once per block)"

    code = models.SlugField(max_length=40, unique=True, help_text="Short name used in addresses and exports.")
    title = models.CharField(max_length=200)
    owner = _user_fk(help_text="Plans the study and unblinds it; blinded like everyone else until then.")
    protocol = models.ForeignKey(Protocol, on_delete=models.PROTECT, related_name="studies")
    question = models.TextField(max_length=MAX_TEXT, blank=True, help_text="What the study asks; written before allocation.")
    conditions = models.JSONField(default=list, help_text="Condition labels in order.")
    reference_condition = models.CharField(
        max_length=80, blank=True,
        help_text="The condition every other one is compared with (log-rank); one of the conditions. Required "
                  "with two or more conditions.")
    replicates = models.PositiveIntegerField(default=DEFAULT_REPLICATES, validators=[Within("replicates")],
                                             help_text="Trials (dishes) per condition; the dish is the unit.")
    primary_outcome = models.CharField(max_length=200, default="Time to disperse (s), right-censored at the window")
    observation_window_s = models.PositiveIntegerField(default=DEFAULT_OBSERVATION_WINDOW_S,
                                                       validators=[Within("observation_window_s")])
    exclusion_criteria = models.TextField(max_length=MAX_TEXT, blank=True)
    method = models.CharField(max_length=10, choices=Method.choices, default=Method.BLOCK)
    seed = models.BigIntegerField(help_text="Seed of the random generator used for the allocation.")
    generator = models.CharField(max_length=120, blank=True)
    allocated_at = models.DateTimeField(null=True, blank=True)
    allocation = models.JSONField(default=list, blank=True,
                                  help_text="The realised allocation: slot, code, condition, replicate.")
    blinded = models.BooleanField(default=True, help_text="Until unblinding, everyone but a trial's operator sees a code, "
                                                          "not its condition; the owner too.")
    scorer_not_operator = models.BooleanField(
        default=False, verbose_name="Scorer must not be the operator",
        help_text="The person who ran a trial (and so knows its condition) may not score it; another person does.")
    validity_criteria = models.JSONField(
        default=list, blank=True,
        help_text="Validity criteria the study declares (experiments/validity.py), fixed once it is unblinded.")
    outcomes_locked_at = models.DateTimeField(null=True, blank=True)
    unblinded_at = models.DateTimeField(null=True, blank=True)
    unblinded_by = _user_fk(null=True, blank=True)
    unblind_reason = models.TextField(blank=True)
    created_at = models.DateTimeField(default=timezone.now)
    signatures = GenericRelation("colonies.Signature")
    history = HistoricalRecords()

    class Meta:
        ordering = ["-created_at"]
        verbose_name_plural = "studies"
        constraints = [
            models.CheckConstraint(condition=Q(unblinded_at__isnull=True) | Q(outcomes_locked_at__isnull=False),
                                   name="study_unblinded_after_lock"),
        ]

    def __str__(self):
        return f"{self.code} · {self.title}"

    def get_absolute_url(self):
        return reverse("experiments:study-detail", args=[self.code])

    def clean(self):
        reference_problem = self.reference_problem()
        if reference_problem:
            raise ValidationError({"reference_condition": reference_problem})

    def reference_problem(self) -> str:
        """Why the reference condition is not valid for these conditions; "" when it is."""
        labels = list(self.conditions or [])
        if len(labels) < 2:
            return ""
        allowed = ", ".join(f"'{c}'" for c in labels)
        if not self.reference_condition:
            return f"Reference condition: required with {len(labels)} conditions; allowed values: {allowed}."
        if self.reference_condition not in labels:
            return (f"Reference condition '{self.reference_condition}' is not one of the study's conditions; "
                    f"allowed values: {allowed}.")
        return ""

    @property
    def is_blind(self) -> bool:
        """True while the allocation is hidden (experiments/blinding.py says from whom: everyone but each trial's
        operator, who sees only the trials they ran)."""
        return self.blinded and self.unblinded_at is None

    def hides_conditions_from(self, user) -> bool:
        """Study-level: the allocation, the labels and analyses by condition; the same for every user, the
        owner included. For one trial ask experiments.blinding.may_see_condition(user, trial)."""
        return self.is_blind

    @property
    def is_locked(self) -> bool:
        return self.outcomes_locked_at is not None

    def signed_content(self) -> dict:
        """What an unblinding (and locking) signature vouches for: the allocation, the unblinding and every
        trial's locked outcomes (late outcomes, LATE_OUTCOME_FIELDS, stay open and are left out). One query."""
        trials = [{"slot": t.slot, "code": t.code, "condition": t.condition, "run_at": t.run_at,
                   "aggregate_s": t.aggregate_s, "disperse_s": t.disperse_s, "censored": t.censored,
                   "voided": t.voided_at is not None}
                  for t in self.trials.order_by("slot", "pk")]
        return {"record": "study", "id": self.pk, "code": self.code, "protocol": self.protocol_id,
                "allocation": self.allocation, "seed": self.seed, "blinded": self.blinded,
                "outcomes_locked_at": self.outcomes_locked_at, "unblinded_at": self.unblinded_at,
                "unblinded_by": self.unblinded_by_id, "unblind_reason": self.unblind_reason, "trials": trials}

    def slot(self, number: int) -> dict | None:
        for entry in self.allocation:
            if entry["slot"] == number:
                return entry
        return None


class TrialQuerySet(models.QuerySet):
    def counting(self):
        """Trials that count as exposures and in analyses: not voided (excluded ones still exposed animals)."""
        return self.filter(voided_at__isnull=True)

    def analysable(self):
        return self.counting().filter(excluded_at__isnull=True, disperse_s__isnull=False)


# Outcomes known only some time after the trial (the count of dead animals at 24 h). They stay recordable
# once the study is unblinded and its other outcomes are locked; each has <name>_entered_at and
# <name>_after_unblinding beside it, so that a value entered by someone who could know the condition is marked.
LATE_OUTCOME_FIELDS = {"mortality_24h": "Dead at 24 h"}  # field -> label

# Stimulus settings recorded on a trial: field -> the stimulus kinds it belongs to.
SETTING_FIELDS = {
    "wavelength_nm": LIGHT_KINDS, "irradiance_mw_cm2": LIGHT_KINDS, "duration_s": LIGHT_KINDS,
    "voltage_v": (Stimulus.ELECTRICAL,), "electrode_gap_cm": (Stimulus.ELECTRICAL,),
    "pulse_width_ms": (Stimulus.ELECTRICAL,), "pulse_count": (Stimulus.ELECTRICAL,),
    "pulse_frequency_hz": (Stimulus.ELECTRICAL,),
    "temp_step_c": (Stimulus.THERMAL,), "temp_rate_c_min": (Stimulus.THERMAL,),
    "concentration_um": (Stimulus.CHEMICAL,),
}
BOUNDED_TRIAL_FIELDS = ("wavelength_nm", "irradiance_mw_cm2", "duration_s", "voltage_v", "electrode_gap_cm",
                        "pulse_width_ms", "pulse_frequency_hz", "temp_step_c", "temp_rate_c_min", "concentration_um",
                        "arena_diameter_mm", "water_volume_ml", "water_temp_c", "light_lux", "acclimation_min",
                        "aggregate_s", "disperse_s", "observation_window_s", "dose_mj_cm2", "field_v_cm")


def _bounded(key, **kwargs):
    b = BOUNDS[key]
    return models.FloatField(null=True, blank=True, validators=[Within(key)],
                             verbose_name=f"{b.label} ({b.unit})" if b.unit else b.label, **kwargs)


class Trial(Voidable):
    """One aggregation trial: a clump of worms, a stimulus, and when (if) it dispersed.

    Each trial is also one exposure of its dish (a group of animals from its cohort), counted
    against the protocol's limits.
    """

    study = models.ForeignKey(Study, on_delete=models.PROTECT, related_name="trials")
    slot = models.PositiveIntegerField(help_text="Position in the randomised run order.")
    code = models.CharField(max_length=8, help_text="Blind code shown to scorers.")
    condition = models.CharField(max_length=80)
    replicate = models.PositiveIntegerField()
    cohort = models.ForeignKey(Cohort, on_delete=models.PROTECT, related_name="trials")
    dish = models.ForeignKey(Dish, on_delete=models.PROTECT, related_name="trials",
                             help_text="The group of animals exposed; always a dish of the trial's cohort.")
    protocol = models.ForeignKey(Protocol, on_delete=models.PROTECT, related_name="trials")
    protocol_version = models.ForeignKey(
        ProtocolVersion, null=True, blank=True, on_delete=models.PROTECT, related_name="trials",
        help_text="The protocol's terms in force when the trial ran: its limits are checked and shown against these. "
                  "Empty only on a trial saved outside the services (every trial recorded in the app has one).")
    run_at = models.DateTimeField(default=timezone.now, help_text="When the stimulus was applied.")
    run_by = _user_fk()
    recorded_at = models.DateTimeField(auto_now_add=True)
    # arena
    vessel = models.CharField(max_length=80, default="glass Petri dish")
    arena_diameter_mm = _bounded("arena_diameter_mm")
    water_volume_ml = _bounded("water_volume_ml")
    water_temp_c = _bounded("water_temp_c")
    light_lux = _bounded("light_lux", help_text="Ambient light level at the arena.")
    acclimation_min = _bounded("acclimation_min")
    animals = models.PositiveIntegerField(validators=[Within("animals")], help_text="Animals in the arena.")
    # stimulus
    kind = models.CharField(max_length=12, choices=Stimulus.choices, verbose_name="Stimulus type")
    wavelength_nm = _bounded("wavelength_nm")
    irradiance_mw_cm2 = _bounded("irradiance_mw_cm2")
    duration_s = _bounded("duration_s", help_text="Light exposure time.")
    voltage_v = _bounded("voltage_v")
    electrode_gap_cm = _bounded("electrode_gap_cm")
    pulse_width_ms = _bounded("pulse_width_ms")
    pulse_count = models.PositiveIntegerField(null=True, blank=True, validators=[Within("pulse_count")])
    pulse_frequency_hz = _bounded("pulse_frequency_hz")
    temp_step_c = _bounded("temp_step_c", help_text="Change of water temperature; negative for cooling.")
    temp_rate_c_min = _bounded("temp_rate_c_min")
    substance = models.CharField(max_length=80, blank=True)
    concentration_um = _bounded("concentration_um")
    mechanical_note = models.CharField(max_length=200, blank=True, help_text="Mechanical stimulus as applied.")
    # derived (stored with their inputs; stimulus.py says how)
    dose_mj_cm2 = _bounded("dose_mj_cm2", editable=False)
    field_v_cm = _bounded("field_v_cm", editable=False)
    pulse_on_s = models.FloatField(null=True, blank=True, editable=False)
    train_s = models.FloatField(null=True, blank=True, editable=False)
    # outcomes
    aggregate_s = _bounded("aggregate_s", help_text="Time for the animals to form one clump before the stimulus.")
    observation_window_s = models.PositiveIntegerField(validators=[Within("observation_window_s")])
    disperse_s = _bounded("disperse_s", help_text="Time from stimulus to dispersal; the window when not dispersed.")
    censored = models.BooleanField(default=False, help_text="Still clumped when the observation window ended.")
    clusters = models.JSONField(default=list, blank=True,
                                help_text="Cluster count and largest-cluster fraction at recorded times.")
    mortality_24h = models.PositiveIntegerField(null=True, blank=True, validators=[Within("mortality_24h")],
                                                help_text="Dead animals 24 h after the trial.")
    mortality_24h_entered_at = models.DateTimeField(null=True, blank=True, editable=False,
                                                    help_text="When the 24 h count was entered.")
    mortality_24h_after_unblinding = models.BooleanField(
        default=False, editable=False,
        help_text="The 24 h count was entered after the study was unblinded, by someone who could know the condition.")
    scored_at = models.DateTimeField(null=True, blank=True)
    scored_by = _user_fk(null=True, blank=True)
    excluded_at = models.DateTimeField(null=True, blank=True)
    excluded_by = _user_fk(null=True, blank=True)
    exclusion_reason = models.TextField(blank=True)
    note = models.TextField(max_length=MAX_TEXT, blank=True)
    history = HistoricalRecords()

    objects = TrialQuerySet.as_manager()

    class Meta:
        ordering = ["study_id", "slot"]
        get_latest_by = "run_at"
        constraints = [
            models.UniqueConstraint(fields=["study", "slot"], condition=Q(voided_at__isnull=True),
                                    name="trial_one_per_slot"),
            models.CheckConstraint(condition=Q(animals__gte=1), name="trial_animals_positive"),
            models.CheckConstraint(condition=within_q("animals"), name="trial_animals_bounds"),
            models.CheckConstraint(condition=Q(disperse_s__isnull=True) | Q(disperse_s__lte=models.F("observation_window_s")),
                                   name="trial_disperse_within_window"),
            models.CheckConstraint(condition=Q(censored=False) | Q(disperse_s=models.F("observation_window_s")),
                                   name="trial_censored_at_window"),
            models.CheckConstraint(condition=Q(mortality_24h__isnull=True) | Q(mortality_24h__lte=models.F("animals")),
                                   name="trial_mortality_not_above_animals"),
            models.CheckConstraint(condition=Q(excluded_at__isnull=True) | ~Q(exclusion_reason=""),
                                   name="trial_exclusion_has_reason"),
            models.CheckConstraint(condition=Q(mortality_24h_after_unblinding=False)
                                   | Q(mortality_24h_entered_at__isnull=False), name="trial_late_entry_has_time"),
            *[models.CheckConstraint(condition=within_q(f), name=f"trial_{f}_bounds") for f in BOUNDED_TRIAL_FIELDS],
        ]
        indexes = [
            # The exposure ledger and the cohort page: a cohort's exposures in order.
            models.Index(fields=["cohort", "run_at"], name="trial_cohort_run"),
            # services.dish_state and the ledger's running totals: a dish's exposures in order.
            models.Index(fields=["dish", "run_at"], name="trial_dish_run"),
        ]

    def __str__(self):
        return f"Trial {self.study.code} #{self.slot} ({self.code})"

    def get_absolute_url(self):
        return reverse("experiments:trial-detail", args=[self.pk])

    @property
    def is_scored(self) -> bool:
        return self.disperse_s is not None

    @property
    def is_excluded(self) -> bool:
        return self.excluded_at is not None

    @property
    def dispersed(self) -> bool | None:
        return None if self.disperse_s is None else not self.censored

    def settings(self) -> dict[str, float | None]:
        """Stimulus settings and derived values as the limit checker sees them."""
        values = {f: getattr(self, f) for f in SETTING_FIELDS}
        values.update(dose_mj_cm2=self.dose_mj_cm2, field_v_cm=self.field_v_cm,
                      temp_step_abs_c=abs(self.temp_step_c) if self.temp_step_c is not None else None)
        return values

    def cautions(self) -> list[str]:
        return cautions_for(self.kind, self.wavelength_nm)

    def stimulus_text(self) -> str:
        k = Stimulus
        if self.kind in LIGHT_KINDS:
            parts = [f"{self.wavelength_nm:g} nm" if self.wavelength_nm else "",
                     f"{self.irradiance_mw_cm2:g} mW/cm² × {self.duration_s:g} s" if self.irradiance_mw_cm2 is not None
                     and self.duration_s is not None else "",
                     f"= {self.dose_mj_cm2:.4g} mJ/cm²" if self.dose_mj_cm2 is not None else ""]
        elif self.kind == k.ELECTRICAL:
            parts = [f"{self.voltage_v:g} V" if self.voltage_v is not None else "",
                     f"over {self.electrode_gap_cm:g} cm = {self.field_v_cm:.3g} V/cm" if self.field_v_cm is not None else "",
                     f"{self.pulse_count} × {self.pulse_width_ms:g} ms" if self.pulse_count and self.pulse_width_ms else "",
                     f"at {self.pulse_frequency_hz:g} Hz" if self.pulse_frequency_hz else ""]
        elif self.kind == k.THERMAL:
            parts = [f"step {self.temp_step_c:+g} °C" if self.temp_step_c is not None else "",
                     f"at {self.temp_rate_c_min:g} °C/min" if self.temp_rate_c_min is not None else ""]
        elif self.kind == k.CHEMICAL:
            parts = [self.substance, f"{self.concentration_um:g} µM" if self.concentration_um is not None else ""]
        elif self.kind == k.MECHANICAL:
            parts = [self.mechanical_note]
        else:
            parts = []
        return f"{self.get_kind_display()}: " + " ".join(p for p in parts if p) if parts else self.get_kind_display()


class SlotClaimQuerySet(models.QuerySet):
    def active(self):
        return self.filter(released_at__isnull=True)


class SlotClaim(models.Model):
    """An operator's "I will run slot N": only the claimant sees the slot's condition (to apply it) and
    records its trial. A manager (or the claimant) releases a claim with a reason; the slot is open again."""

    study = models.ForeignKey(Study, on_delete=models.PROTECT, related_name="claims")
    slot = models.PositiveIntegerField(help_text="Position in the randomised run order.")
    claimed_by = _user_fk()
    claimed_at = models.DateTimeField(default=timezone.now)
    released_at = models.DateTimeField(null=True, blank=True)
    released_by = _user_fk(null=True, blank=True)
    release_reason = models.TextField(max_length=MAX_TEXT, blank=True)
    history = HistoricalRecords()

    objects = SlotClaimQuerySet.as_manager()

    class Meta:
        ordering = ["study_id", "slot", "claimed_at"]
        constraints = [
            # Two operators claiming the same slot at once: the second insert fails here (services.claim_slot).
            models.UniqueConstraint(fields=["study", "slot"], condition=Q(released_at__isnull=True),
                                    name="claim_one_active_per_slot"),
            models.CheckConstraint(condition=Q(slot__gte=1), name="claim_slot_positive"),
            models.CheckConstraint(condition=Q(released_at__isnull=True) | ~Q(release_reason=""),
                                   name="claim_release_has_reason"),
        ]

    def __str__(self):
        return f"Slot {self.slot} of {self.study.code} claimed by {self.claimed_by.get_username()}"

    def get_absolute_url(self):
        return reverse("experiments:trial-new", args=[self.study.code])

    @property
    def is_active(self) -> bool:
        return self.released_at is None


class Override(models.Model):
    """A manager's decision to let a trial go beyond a protocol limit, with the reason; opens a deviation."""

    trial = models.OneToOneField(Trial, on_delete=models.PROTECT, related_name="override")
    cohort = models.ForeignKey(Cohort, on_delete=models.PROTECT, related_name="overrides")
    protocol = models.ForeignKey(Protocol, on_delete=models.PROTECT, related_name="overrides")
    breaches = models.JSONField(default=list, help_text="The limits broken, as shown to the manager.")
    reason = models.TextField()
    recorded_by = _user_fk()
    recorded_at = models.DateTimeField(default=timezone.now)
    deviation = models.ForeignKey("colonies.Deviation", null=True, blank=True, on_delete=models.PROTECT,
                                  related_name="+")
    history = HistoricalRecords()

    class Meta:
        ordering = ["-recorded_at"]
        constraints = [models.CheckConstraint(condition=~Q(reason=""), name="override_has_reason")]

    def __str__(self):
        return f"Override for {self.trial}"

    def get_absolute_url(self):
        return self.trial.get_absolute_url()


class Attachment(Voidable):
    class Kind(models.TextChoices):
        PHOTO = "photo", "Photo"
        VIDEO = "video", "Video"
        OTHER = "other", "Other"

    trial = models.ForeignKey(Trial, on_delete=models.PROTECT, related_name="attachments")
    file = models.FileField(upload_to="trials/%Y/%m/")
    name = models.CharField(max_length=200, help_text="The file name as uploaded.")
    kind = models.CharField(max_length=8, choices=Kind.choices, default=Kind.PHOTO)
    sha256 = models.CharField(max_length=64, editable=False, help_text="SHA-256 of the file as received.")
    size_bytes = models.PositiveBigIntegerField(editable=False)
    caption = models.CharField(max_length=200, blank=True)
    uploaded_by = _user_fk()
    uploaded_at = models.DateTimeField(default=timezone.now)
    history = HistoricalRecords()

    class Meta:
        ordering = ["uploaded_at"]

    def __str__(self):
        # Not the file's name: the operator's name may name the condition, and titles and histories show this.
        return f"File {self.pk} ({self.sha256[:12]}…)"

    def get_absolute_url(self):
        return reverse("experiments:attachment", args=[self.pk])


class ImageMeasurementQuerySet(VoidableQuerySet):
    def done(self):
        return self.current().filter(status=ImageMeasurement.Status.DONE)


class ImageMeasurement(Voidable):
    """Cluster count and largest-cluster fraction measured from a trial's photos or video (experiments/imaging.py).

    Stored with every setting used and the SHA-256 of each file, so that it can be measured again
    and give the same numbers. Progress (frames_done, heartbeat_at) is written by the worker with
    plain UPDATEs, outside the history; the history keeps the request, the start and the result.
    A row left queued or running by a stopped process (no heartbeat for STALE_AFTER_S) is shown
    as interrupted and can be measured again.
    """

    class Status(models.TextChoices):
        QUEUED = "queued", "Queued"
        RUNNING = "running", "Measuring"
        DONE = "done", "Done"
        FAILED = "failed", "Failed"
        INTERRUPTED = "interrupted", "Interrupted"

    class Source(models.TextChoices):
        PHOTOS = "photos", "Photo series"
        VIDEO = "video", "Video"

    class Decision(models.TextChoices):
        NONE = "", "Not used for a score yet"
        ACCEPTED = "accepted", "Accepted by the scorer"
        OVERRIDDEN = "overridden", "Overridden by the scorer"

    STALE_AFTER_S = 300

    trial = models.ForeignKey(Trial, on_delete=models.PROTECT, related_name="measurements")
    source = models.CharField(max_length=8, choices=Source.choices)
    files = models.JSONField(default=list, help_text="The files measured, in frame order: attachment, name, SHA-256.")
    sha256 = models.CharField(max_length=64, help_text="SHA-256 of the video; for a photo series, of the photos' "
                                                       "SHA-256 hex digests joined in frame order.")
    settings = models.JSONField(default=dict, help_text="Every setting used: segmentation, frame times, threshold, "
                                                        "window, scale, library versions.")
    threshold = models.FloatField(help_text="Dispersed when the largest-cluster fraction stays below this.")
    window_s = models.PositiveIntegerField(help_text="The trial's observation window, s.")
    frames_total = models.PositiveIntegerField()
    frames_done = models.PositiveIntegerField(default=0)
    frames = models.JSONField(default=list, blank=True, help_text="Per frame: time, clusters, largest-cluster "
                                                                  "fraction, worm area.")
    dispersal_time_s = models.FloatField(null=True, blank=True)
    censored = models.BooleanField(null=True, blank=True, help_text="No dispersal within the window.")
    observed_until_s = models.FloatField(null=True, blank=True, help_text="Last frame at or before the window's end.")
    status = models.CharField(max_length=12, choices=Status.choices, default=Status.QUEUED)
    error = models.TextField(blank=True)
    worker = models.CharField(max_length=64, blank=True, editable=False)
    heartbeat_at = models.DateTimeField(null=True, blank=True, editable=False)
    requested_by = _user_fk()
    requested_at = models.DateTimeField(default=timezone.now)
    started_at = models.DateTimeField(null=True, blank=True)
    finished_at = models.DateTimeField(null=True, blank=True)
    decision = models.CharField(max_length=10, choices=Decision.choices, default=Decision.NONE, blank=True)
    decided_by = _user_fk(null=True, blank=True)
    decided_at = models.DateTimeField(null=True, blank=True)
    scored_disperse_s = models.FloatField(null=True, blank=True, help_text="The score saved with this proposal shown.")
    scored_censored = models.BooleanField(null=True, blank=True)
    history = HistoricalRecords(excluded_fields=["frames_done", "heartbeat_at", "worker"])

    objects = ImageMeasurementQuerySet.as_manager()

    class Meta:
        ordering = ["trial_id", "requested_at", "pk"]
        get_latest_by = "requested_at"
        constraints = [
            models.CheckConstraint(condition=Q(frames_done__lte=models.F("frames_total")),
                                   name="measurement_progress_within_total"),
            models.CheckConstraint(condition=Q(threshold__gt=0) & Q(threshold__lt=1), name="measurement_threshold_0_1"),
            models.CheckConstraint(condition=Q(dispersal_time_s__isnull=True)
                                   | Q(dispersal_time_s__lte=models.F("window_s")),
                                   name="measurement_dispersal_within_window"),
            models.CheckConstraint(condition=~Q(status="done") | Q(censored__isnull=False),
                                   name="measurement_done_has_result"),
        ]
        indexes = [
            # The trial page lists a trial's measurements; the study page reads those of its trials.
            models.Index(fields=["trial", "status"], name="measurement_trial_status"),
        ]

    def __str__(self):
        return f"Image measurement #{self.pk} of {self.trial.code}"

    def get_absolute_url(self):
        return reverse("experiments:trial-detail", args=[self.trial_id]) + f"#measurement-{self.pk}"

    def is_stale(self, now=None) -> bool:
        """Queued or running, but its worker has not reported for STALE_AFTER_S (the process stopped)."""
        if self.status not in (self.Status.QUEUED, self.Status.RUNNING):
            return False
        beat = self.heartbeat_at or self.requested_at
        return ((now or timezone.now()) - beat).total_seconds() > self.STALE_AFTER_S

    @property
    def shown_status(self) -> str:
        return self.Status.INTERRUPTED.label if self.is_stale() else self.get_status_display()

    @property
    def in_progress(self) -> bool:
        return self.status in (self.Status.QUEUED, self.Status.RUNNING) and not self.is_stale()

    @property
    def may_rerun(self) -> bool:
        return self.status in (self.Status.FAILED, self.Status.INTERRUPTED) or self.is_stale()

    @property
    def percent(self) -> int:
        return int(100 * self.frames_done / self.frames_total) if self.frames_total else 0

    @property
    def dispersed(self) -> bool | None:
        return None if self.censored is None else not self.censored

    @property
    def override_difference_s(self) -> float | None:
        """The saved score minus the measured time, when both say dispersed (how far the scorer moved it)."""
        if self.scored_disperse_s is None or self.scored_censored or self.censored or self.dispersal_time_s is None:
            return None
        return self.scored_disperse_s - self.dispersal_time_s

    def proposed_disperse_s(self) -> float | None:
        """The time to propose for the trial: the dispersal frame's time, or the window when censored."""
        if self.status != self.Status.DONE:
            return None
        return float(self.window_s) if self.censored else self.dispersal_time_s


class PeriodReport(models.Model):
    """A period report as issued: the period, the scope and the SHA-256 of its ZIP's manifest.

    The manifest lists the SHA-256 of every section's CSV, so this one sum fixes what was issued: the
    same period and scope on unchanged records gives the same sum again (experiments/period_report/).
    A manager signs it ("reviewed", colonies/signatures.py) only while today's records still give the
    issued files, so what is signed is what the signer read.
    """

    class Scope(models.TextChoices):
        FACILITY = "facility", "Whole facility"
        ROOM = "room", "Room"
        PROTOCOL = "protocol", "Protocol"
        STUDY = "study", "Study"

    period_from = models.DateField(help_text="First day of the period (lab's local date).")
    period_to = models.DateField(help_text="Last day of the period, included.")
    scope = models.CharField(max_length=10, choices=Scope.choices, default=Scope.FACILITY)
    scope_key = models.CharField(max_length=60, blank=True,
                                 help_text="The room's id, the protocol's reference or the study's code; empty for the facility.")
    scope_label = models.CharField(max_length=200, help_text="The scope in words, as printed on the report.")
    issued_by = _user_fk()
    issued_at = models.DateTimeField(default=timezone.now)
    manifest = models.TextField(help_text="The ZIP's MANIFEST: one line per CSV, its SHA-256 and name.")
    manifest_sha256 = models.CharField(max_length=64, help_text="SHA-256 of the manifest.")
    signatures = GenericRelation("colonies.Signature")
    history = HistoricalRecords()

    class Meta:
        ordering = ["-issued_at"]
        constraints = [models.CheckConstraint(condition=Q(period_to__gte=models.F("period_from")),
                                              name="period_report_to_after_from")]

    def __str__(self):
        return f"Period report {self.period_from:%Y-%m-%d} to {self.period_to:%Y-%m-%d} · {self.scope_label}"

    def get_absolute_url(self):
        return reverse("experiments:period-report-issued", args=[self.pk])

    def signed_content(self) -> dict:
        """What a manager's "reviewed" signature vouches for: the period, the scope and the manifest (the
        SHA-256 of every section's CSV), so the signature fixes the files, not only the page."""
        return {"record": "period report", "id": self.pk, "period_from": self.period_from,
                "period_to": self.period_to, "scope": self.scope, "scope_key": self.scope_key,
                "scope_label": self.scope_label, "issued_by": self.issued_by_id, "issued_at": self.issued_at,
                "manifest": self.manifest, "manifest_sha256": self.manifest_sha256}
