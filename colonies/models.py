"""Husbandry records: species care profiles, rooms, tanks and what technicians log on them.

Every model keeps a full change history (django-simple-history: who, when, what, why). Records
are never deleted through the application; they are voided with a reason and stay in history.
"""
import re
from datetime import timedelta
from functools import lru_cache

from django.conf import settings
from django.contrib.contenttypes.fields import GenericRelation
from django.core.exceptions import PermissionDenied, ValidationError
from django.core.validators import MinValueValidator, MaxValueValidator, RegexValidator
from django.db import models, transaction
from django.db.models import Max, OuterRef, Q, Subquery, Value
from django.db.models.functions import Coalesce
from django.core.signals import setting_changed
from django.dispatch import receiver
from django.urls import get_script_prefix, get_urlconf, reverse
from django.utils import timezone
from simple_history.models import HistoricalRecords

from vermilog.lab_time import lab_date, lab_moment

from . import derived, parameters, schedules
from .flags import Target
from .validators import (MAX_TEXT, CENSUS_MAX_MASS_G, CENSUS_MAX_ML, FEEDING_MAX, MAX_ANIMALS, MAX_CHECK_INTERVAL_HOURS, MAX_COUNT,
                         MAX_DENSITY_PER_L, MAX_INTERVAL_DAYS, MAX_TANK_VOLUME_L, DateRange, Range, check_range)

DEFAULT_CHECK_INTERVAL_HOURS = 24
DEFAULT_FEEDING_INTERVAL_DAYS = 3
DEFAULT_WATER_CHANGE_INTERVAL_DAYS = 7
DEFAULT_WATER_CHANGE_FRACTION = 0.5
DEFAULT_CENSUS_INTERVAL_DAYS = 14
LATE_ENTRY_AFTER = timedelta(hours=6)  # entered this long after the observation: marked as a late entry
MEASURED_LOOKBACK = timedelta(days=schedules.MAX_EVERY_DAYS + 1)  # Tank.objects.with_last_measured()
# A task is overdue (and the scan opens a deviation) this long after it fell due:
OVERDUE_GRACE_FRACTION = 0.25  # common practice: a quarter of the interval...
MIN_OVERDUE_GRACE = timedelta(hours=2)  # ...and at least two hours


def overdue_grace(interval: timedelta) -> timedelta:
    return max(MIN_OVERDUE_GRACE, interval * OVERDUE_GRACE_FRACTION)


TANK_CODE_RE = r"^[A-Z0-9][A-Z0-9-]{0,11}$"
tank_code_validator = RegexValidator(
    TANK_CODE_RE,
    "Tank codes are 1-12 capital letters, digits or hyphens, as printed on the label (e.g. LV-01, SM-01, PD-01).",
)


class Habitat(models.TextChoices):
    FRESHWATER = parameters.FRESHWATER, "Freshwater"
    MARINE = parameters.MARINE, "Marine"


class FeedingUnit(models.TextChoices):
    """How a feeding is measured (Feeding.Unit; also the unit of a species' default feeding amount)."""

    G = "g", "g"
    MG = "mg", "mg"
    ML = "mL", "mL"
    PINCH = "pinch", "pinch"


def feeding_amount_q(amount: str, unit: str) -> Q:
    """Database condition: an amount within FEEDING_MAX for its unit (or no amount)."""
    condition = Q(**{f"{amount}__isnull": True})
    for name, most in FEEDING_MAX.items():
        condition |= Q(**{unit: name, f"{amount}__gte": 0, f"{amount}__lte": most})
    return condition


# ---------------------------------------------------------------------------------------------
# Voiding instead of deleting
# ---------------------------------------------------------------------------------------------
class VoidableQuerySet(models.QuerySet):
    def current(self):
        """Records that count: not voided."""
        return self.filter(voided_at__isnull=True)

    def voided(self):
        return self.filter(voided_at__isnull=False)


# The longest reason a person may give for a change, a void, a cancellation or an override (forms
# refuse longer ones with a message). The history keeps reasons in a text column
# (SIMPLE_HISTORY_HISTORY_CHANGE_REASON_USE_TEXT_FIELD) with a short prefix such as "Voided: ".
REASON_MAX_CHARS = 2000


class Voidable(models.Model):
    voided_at = models.DateTimeField(null=True, blank=True, editable=False)
    voided_by = models.ForeignKey(
        settings.AUTH_USER_MODEL, null=True, blank=True, editable=False, on_delete=models.PROTECT, related_name="+"
    )
    void_reason = models.TextField(blank=True, editable=False)

    objects = VoidableQuerySet.as_manager()

    class Meta:
        abstract = True

    @property
    def is_voided(self) -> bool:
        return self.voided_at is not None

    def void(self, *, user, reason: str) -> None:
        """Hide the record from lists and analyses; the history keeps it with who, when and why."""
        reason = (reason or "").strip()
        if not reason:
            raise ValueError("A reason is required to void a record.")
        if self.is_voided:
            raise ValueError(f"{self} is already voided.")
        self.voided_at = timezone.now()
        self.voided_by = user
        self.void_reason = reason
        self._change_reason = f"Voided: {reason}"
        self._history_user = user
        self.save()


class Recorded(Voidable):
    """A husbandry record: who logged it (set by the server), when it was observed and entered."""

    tank = models.ForeignKey("Tank", on_delete=models.PROTECT)
    observed_at = models.DateTimeField(
        default=timezone.now, help_text="When the work was done or the reading taken (may be earlier than entry)."
    )
    recorded_at = models.DateTimeField(default=timezone.now, editable=False,
                                       help_text="When the record was entered; set by the server, never by a form.")
    recorded_by = models.ForeignKey(settings.AUTH_USER_MODEL, on_delete=models.PROTECT, related_name="+")
    note = models.TextField(max_length=MAX_TEXT, blank=True)

    class Meta:
        abstract = True
        ordering = ["-observed_at"]
        get_latest_by = "observed_at"

    @property
    def is_late_entry(self) -> bool:
        return bool(self.recorded_at and self.recorded_at - self.observed_at > LATE_ENTRY_AFTER)


# ---------------------------------------------------------------------------------------------
# Species care profiles
# ---------------------------------------------------------------------------------------------
class Species(models.Model):
    scientific_name = models.CharField(max_length=120, unique=True)
    common_name = models.CharField(max_length=120, blank=True)
    habitat = models.CharField(max_length=12, choices=Habitat.choices, default=Habitat.FRESHWATER)
    check_interval_hours = models.PositiveIntegerField(
        default=DEFAULT_CHECK_INTERVAL_HOURS,
        validators=[Range("Check interval", 1, MAX_CHECK_INTERVAL_HOURS, "h")],
        help_text="A daily check is due this many hours after the last one.",
    )
    feeding_interval_days = models.PositiveIntegerField(
        default=DEFAULT_FEEDING_INTERVAL_DAYS, validators=[Range("Feeding interval", 1, MAX_INTERVAL_DAYS, "days")])
    water_change_interval_days = models.PositiveIntegerField(
        default=DEFAULT_WATER_CHANGE_INTERVAL_DAYS,
        validators=[Range("Water change interval", 1, MAX_INTERVAL_DAYS, "days")],
    )
    water_change_fraction = models.FloatField(
        default=DEFAULT_WATER_CHANGE_FRACTION, validators=[Range("Water change fraction", 0.01, 1.0)],
        help_text="Fraction of the tank volume renewed at each water change (0.01-1).",
    )
    census_interval_days = models.PositiveIntegerField(
        default=DEFAULT_CENSUS_INTERVAL_DAYS, validators=[Range("Census interval", 1, MAX_INTERVAL_DAYS, "days")])
    max_density_per_l = models.PositiveIntegerField(
        null=True, blank=True, validators=[Range("Maximum density", 1, MAX_DENSITY_PER_L, "animals/L")],
        help_text="Maximum stocking density, animals per litre of tank volume.",
    )
    reserve_min_animals = models.PositiveIntegerField(
        default=0, validators=[Range("Reserve", 0, MAX_COUNT, "animals")],
        help_text="Animals that must stay in a culture and never be booked out.",
    )
    # What the feeding and water-change forms offer for a tank that has no earlier entry of that kind
    # (a tank's own last entry comes first). Lab settings: no published amounts exist for these cultures.
    default_food = models.CharField(
        max_length=80, blank=True,
        help_text="Pre-filled on feeding forms for a tank with no feeding yet, e.g. liver paste.")
    default_feeding_amount = models.FloatField(
        null=True, blank=True, validators=[Range("Default feeding amount", 0, max(FEEDING_MAX.values()))],
        help_text="Per tank and feeding, in the default unit; at most "
                  + ", ".join(f"{v:g} {u}" for u, v in FEEDING_MAX.items()) + ".")
    default_feeding_unit = models.CharField(max_length=8, choices=FeedingUnit.choices, default=FeedingUnit.G,
                                            help_text="Unit of the default feeding amount.")
    default_source_water = models.CharField(
        max_length=80, blank=True,
        help_text="Pre-filled on water-change forms for a tank with no water change yet, e.g. 1x planarian salts. "
                  "The amount pre-filled is the water change fraction above.")
    notes = models.TextField(max_length=MAX_TEXT, blank=True, help_text="Care notes; say here where no published value exists.")
    sources = models.JSONField(
        default=dict, blank=True,
        help_text="Where each default value comes from: field name → citation (document, year, table).",
    )
    history = HistoricalRecords()

    class Meta:
        ordering = ["scientific_name"]
        verbose_name_plural = "species"
        constraints = [
            models.CheckConstraint(
                condition=Q(check_interval_hours__gte=1, check_interval_hours__lte=MAX_CHECK_INTERVAL_HOURS)
                & Q(feeding_interval_days__gte=1, feeding_interval_days__lte=MAX_INTERVAL_DAYS)
                & Q(water_change_interval_days__gte=1, water_change_interval_days__lte=MAX_INTERVAL_DAYS)
                & Q(census_interval_days__gte=1, census_interval_days__lte=MAX_INTERVAL_DAYS)
                & Q(water_change_fraction__gte=0.01, water_change_fraction__lte=1.0)
                & Q(reserve_min_animals__lte=MAX_COUNT)
                & (Q(max_density_per_l__isnull=True) | Q(max_density_per_l__lte=MAX_DENSITY_PER_L)),
                name="species_schedule_plausible",
            ),
            models.CheckConstraint(
                condition=feeding_amount_q("default_feeding_amount", "default_feeding_unit"),
                name="species_default_feeding_plausible",
                violation_error_message="Default feeding amount: allowed per unit at most "
                                        + ", ".join(f"{v:g} {u}" for u, v in FEEDING_MAX.items()) + ".",
            ),
        ]

    def __str__(self):
        return f"{self.scientific_name} ({self.common_name})" if self.common_name else self.scientific_name

    def clean(self):
        super().clean()
        amount, unit = self.default_feeding_amount, self.default_feeding_unit
        if amount is not None and unit in FEEDING_MAX:
            try:
                check_range("Default feeding amount", amount, 0, FEEDING_MAX[unit], unit)
            except ValidationError as error:
                raise ValidationError({"default_feeding_amount": error.messages}) from None

    def get_absolute_url(self):
        return reverse("colonies:species-detail", args=[self.pk])

    def relevant_parameters(self) -> tuple[parameters.Parameter, ...]:
        return parameters.for_habitat(self.habitat)

    def plans(self) -> dict[str, schedules.Plan]:
        """Each relevant parameter's measurement plan: this species' row, else Vermilog's default.
        Uses prefetched `measurement_plans` when present."""
        rows = {row.parameter: row.as_plan("species") for row in self.measurement_plans.all()}
        return {p.key: rows.get(p.key) or schedules.default_plan(p.key) for p in self.relevant_parameters()}


def target_within_bounds_q() -> Q:
    """Database condition: a target's ends lie within its parameter's physical bounds (measured or derived)."""
    condition = Q()
    for p in (*parameters.PARAMETERS, *derived.DERIVED):
        inside = Q(parameter=p.key)
        for end in ("low", "high"):
            inside &= Q(**{f"{end}__isnull": True}) | Q(**{f"{end}__gte": p.minimum, f"{end}__lte": p.maximum})
        condition |= inside
    return condition


class CareTarget(models.Model):
    """A species' care-target range for one water parameter; either end may be open."""

    species = models.ForeignKey(Species, on_delete=models.PROTECT, related_name="targets")
    parameter = models.CharField(max_length=32, choices=derived.TARGET_CHOICES)
    low = models.FloatField(null=True, blank=True)
    high = models.FloatField(null=True, blank=True)
    source = models.TextField(max_length=MAX_TEXT, blank=True, help_text="Document, year and table the range comes from, or 'lab setting'.")
    history = HistoricalRecords()

    class Meta:
        ordering = ["species", "parameter"]
        constraints = [
            models.UniqueConstraint(fields=["species", "parameter"], name="care_target_one_per_parameter"),
            models.CheckConstraint(
                condition=Q(low__isnull=True) | Q(high__isnull=True) | Q(low__lte=models.F("high")),
                name="care_target_low_not_above_high",
            ),
            models.CheckConstraint(condition=target_within_bounds_q(), name="care_target_within_physical_bounds"),
        ]

    def __str__(self):
        return f"{self.species}: {self.parameter} {self.as_target().text()}"

    def get_absolute_url(self):
        return self.species.get_absolute_url()

    def as_target(self) -> Target:
        return Target(self.low, self.high, "species")


# ---------------------------------------------------------------------------------------------
# Rooms and tanks
# ---------------------------------------------------------------------------------------------
class Room(models.Model):
    code = models.SlugField(max_length=20, unique=True, help_text="Short name used in addresses, e.g. 'wet-lab-1'.")
    name = models.CharField(max_length=80)
    notes = models.TextField(max_length=MAX_TEXT, blank=True)
    history = HistoricalRecords()

    class Meta:
        ordering = ["code"]

    def __str__(self):
        return self.name

    def get_absolute_url(self):
        return reverse("colonies:round-room", args=[self.code])


class TankQuerySet(models.QuerySet):
    def active(self):
        return self.filter(status=Tank.Status.ACTIVE)

    def in_use(self):
        """Tanks on the daily round: active and in quarantine (quarantined animals still need care)."""
        return self.exclude(status=Tank.Status.RETIRED)

    def in_room(self, room):
        return self.filter(room=room) if room is not None else self

    def with_last_events(self):
        """Annotate last_check_at, last_feeding_at, last_water_change_at, last_census_at (one query, subqueries)."""
        def latest(model):
            return Subquery(
                model.objects.current().filter(tank=OuterRef("pk")).order_by("-observed_at").values("observed_at")[:1]
            )
        return self.annotate(
            last_check_at=latest(Check),
            last_feeding_at=latest(Feeding),
            last_water_change_at=latest(WaterChange),
            last_census_at=latest(Census),
        )

    def with_last_check(self):
        """Annotate last_check_at only (the tank list shows no other event)."""
        return self.annotate(last_check_at=Subquery(
            Check.objects.current().filter(tank=OuterRef("pk")).order_by("-observed_at").values("observed_at")[:1]))

    def with_last_readings(self, keys=None):
        """Annotate last_<key> with each parameter's (or each of `keys`) most recent non-empty value (one query)."""
        annotations = {}
        for p in parameters.PARAMETERS if keys is None else [parameters.BY_KEY[key] for key in keys]:
            annotations[f"last_{p.key}"] = Subquery(
                Check.objects.current()
                .filter(tank=OuterRef("pk"), **{f"{p.key}__isnull": False})
                .order_by("-observed_at")
                .values(p.key)[:1]
            )
        return self.annotate(**annotations)

    def with_last_measured(self, now=None):
        """Annotate last_<key>_at: when each parameter was last measured within the last MEASURED_LOOKBACK (one
        query; the plans need it, colonies/schedules.py). None beyond it: no plan waits longer than
        schedules.MAX_EVERY_DAYS, so a reading older than that is due whatever its exact time. The bound keeps a
        parameter a tank never measures (salinity in fresh water) from reading the tank's whole history."""
        since = (now or timezone.now()) - MEASURED_LOOKBACK
        return self.annotate(**{
            f"last_{p.key}_at": Subquery(
                Check.objects.current().filter(tank=OuterRef("pk"), observed_at__gte=since, **{f"{p.key}__isnull": False})
                .order_by("-observed_at").values("observed_at")[:1])
            for p in parameters.PARAMETERS})

    def for_round(self):
        return (
            self.in_use()
            .select_related("room", "species")
            .prefetch_related("species__targets", "target_overrides", "species__measurement_plans")
            .with_last_events()
            .with_last_readings()
            .with_last_measured()
            .order_by("room__code", "position", "code")
        )


class Tank(models.Model):
    class System(models.TextChoices):
        STATIC = "static", "Static renewal"
        FLOW = "flow", "Flow-through"
        RECIRCULATING = "recirc", "Recirculating"

    class Status(models.TextChoices):
        ACTIVE = "active", "Active"
        QUARANTINE = "quarantine", "Quarantine"
        RETIRED = "retired", "Retired"

    code = models.CharField(max_length=12, unique=True, validators=[tank_code_validator],
                            help_text="Printed on the tank label: the species' prefix and a number, e.g. LV-01.")
    room = models.ForeignKey(Room, on_delete=models.PROTECT, related_name="tanks")
    position = models.CharField(max_length=30, blank=True, help_text="Rack and shelf, e.g. 'rack 2, shelf B'.")
    species = models.ForeignKey(Species, on_delete=models.PROTECT, related_name="tanks")
    volume_l = models.FloatField(validators=[Range("Volume", 0.01, MAX_TANK_VOLUME_L, "L")],
                                 help_text="Water volume in litres.")
    system = models.CharField(max_length=12, choices=System.choices, default=System.STATIC)
    substrate = models.CharField(max_length=80, blank=True)
    status = models.CharField(max_length=12, choices=Status.choices, default=Status.ACTIVE)
    started_on = models.DateField(default=timezone.localdate, validators=[DateRange("Started on")])
    notes = models.TextField(max_length=MAX_TEXT, blank=True)
    founded_from = models.ManyToManyField(
        "self", symmetrical=False, blank=True, related_name="offspring",
        help_text="The tank(s) this culture was founded or split from.",
    )
    history = HistoricalRecords(m2m_fields=[founded_from])

    objects = TankQuerySet.as_manager()

    class Meta:
        ordering = ["code"]
        constraints = [
            models.CheckConstraint(condition=Q(volume_l__gt=0), name="tank_volume_positive"),
            models.CheckConstraint(condition=Q(volume_l__lte=MAX_TANK_VOLUME_L), name="tank_volume_plausible"),
        ]

    def __str__(self):
        return self.code

    def get_absolute_url(self):
        return tank_url(self.code)

    def care_targets(self) -> dict[str, Target]:
        """Species targets with this tank's overrides on top. Uses prefetched rows when present."""
        return {**self.species_targets(), **self.override_targets()}

    def species_targets(self) -> dict[str, Target]:
        return {t.parameter: t.as_target() for t in self.species.targets.all()}

    def override_targets(self) -> dict[str, Target]:
        return {o.parameter: o.as_target() for o in self.target_overrides.all()}

    def override_plans(self) -> dict[str, schedules.Plan]:
        return {o.parameter: o.as_plan("tank") for o in self.measurement_overrides.all()}

    def plans(self) -> dict[str, schedules.Plan]:
        """The species' plans with this tank's overrides on top (prefetched rows when present)."""
        return {**self.species.plans(), **{k: v for k, v in self.override_plans().items() if k in parameters.BY_KEY}}

    def relevant_parameters(self) -> tuple[parameters.Parameter, ...]:
        return self.species.relevant_parameters()

    @property
    def rack(self) -> str:
        """The rack: the position's text before its first comma ("rack 2" of "rack 2, shelf B"), or ""."""
        return self.position.split(",", 1)[0].strip()

    def last_readings(self, keys) -> dict[str, float | None]:
        """The most recent non-empty value of each parameter in `keys` (of those this tank measures) as
        {"last_<key>": value}, the names with_last_readings() gives them. One query; none when no key applies."""
        keys = [p.key for p in self.relevant_parameters() if p.key in keys]
        if not keys:
            return {}
        names = [f"last_{key}" for key in keys]
        return Tank.objects.filter(pk=self.pk).with_last_readings(keys).values(*names).first() or dict.fromkeys(names)

    def due(self, now=None) -> list[dict]:
        """What is due on this tank, from the with_last_events() annotations (no query if annotated)."""
        now = now or timezone.now()
        s = self.species
        plan = [
            ("check", "Daily check", getattr(self, "last_check_at", None), timedelta(hours=s.check_interval_hours)),
            ("feeding", "Feeding", getattr(self, "last_feeding_at", None), timedelta(days=s.feeding_interval_days)),
            ("water_change", "Water change", getattr(self, "last_water_change_at", None),
             timedelta(days=s.water_change_interval_days)),
            ("census", "Census", getattr(self, "last_census_at", None), timedelta(days=s.census_interval_days)),
        ]
        items = []
        for key, label, last, interval in plan:
            due_at = (last + interval) if last else None
            items.append({
                "key": key, "label": label, "last": last, "due_at": due_at,
                "is_due": due_at is None or due_at <= now,
                "is_overdue": due_at is None or now > due_at + overdue_grace(interval),
            })
        return items


_URL_SAFE_CODE = re.compile(TANK_CODE_RE)
_CODE_SLOT = "CODE0SLOT"  # a valid code, so the URL pattern accepts it


@lru_cache(maxsize=8)
def _tank_url_pattern(script_prefix: str, urlconf) -> str:
    return reverse("colonies:tank-detail", args=[_CODE_SLOT], urlconf=urlconf)


def tank_url(code: str) -> str:
    """The tank page's address: reverse() once per script prefix and URL configuration, then a substitution.

    Today and the tank list link to every tank, several times each (over 1,000 links at 400 tanks,
    where reverse() was a third of Today's time). A code the validator would refuse (a legacy row)
    takes reverse() itself, which quotes it.
    """
    if not _URL_SAFE_CODE.match(code or ""):
        return reverse("colonies:tank-detail", args=[code])
    return _tank_url_pattern(get_script_prefix(), get_urlconf()).replace(_CODE_SLOT, code)


def tank_url_writer():
    """tank_url for a list: the script prefix and URL configuration looked up once, not per tank (thread-local
    lookups, 3 ms at 400 tanks)."""
    pattern = _tank_url_pattern(get_script_prefix(), get_urlconf())
    safe = _URL_SAFE_CODE.match
    return lambda code: pattern.replace(_CODE_SLOT, code) if safe(code or "") else tank_url(code)


_PK_SLOT = 987654321012  # a pk no table reaches, replaced by the real one


def pk_url_writer(viewname: str):
    """pk -> the address of `viewname` for that pk, from one reverse(): for a page that links many records (the tank
    page's 30 checks took 2 ms of reverse() calls from its template)."""
    pattern = reverse(viewname, args=[_PK_SLOT])
    slot = str(_PK_SLOT)
    return lambda pk: pattern.replace(slot, str(int(pk)))


@receiver(setting_changed)
def _forget_tank_url(*, setting, **kwargs):
    if setting == "ROOT_URLCONF":
        _tank_url_pattern.cache_clear()


class TankTarget(models.Model):
    """A tank's own care target for one parameter, replacing the species target."""

    tank = models.ForeignKey(Tank, on_delete=models.PROTECT, related_name="target_overrides")
    parameter = models.CharField(max_length=32, choices=derived.TARGET_CHOICES)
    low = models.FloatField(null=True, blank=True)
    high = models.FloatField(null=True, blank=True)
    reason = models.TextField(help_text="Why this tank differs from its species profile.")
    history = HistoricalRecords()

    class Meta:
        ordering = ["tank", "parameter"]
        constraints = [
            models.UniqueConstraint(fields=["tank", "parameter"], name="tank_target_one_per_parameter"),
            models.CheckConstraint(
                condition=Q(low__isnull=True) | Q(high__isnull=True) | Q(low__lte=models.F("high")),
                name="tank_target_low_not_above_high",
            ),
            models.CheckConstraint(condition=target_within_bounds_q(), name="tank_target_within_physical_bounds"),
        ]

    def __str__(self):
        return f"{self.tank}: {self.parameter} {self.as_target().text()}"

    def get_absolute_url(self):
        return self.tank.get_absolute_url()

    def as_target(self) -> Target:
        return Target(self.low, self.high, "tank")


# ---------------------------------------------------------------------------------------------
# Measurement plans: how often each parameter is measured (colonies/schedules.py)
# ---------------------------------------------------------------------------------------------
class PlanFields(models.Model):
    class Cadence(models.TextChoices):
        DAILY = schedules.DAILY, "Daily"
        EVERY_N_DAYS = schedules.EVERY_N_DAYS, "Every N days"
        WEEKLY = schedules.WEEKLY, "Weekly, on a weekday"
        ON_REQUEST = schedules.ON_REQUEST, "No regular day"

    class Weekday(models.IntegerChoices):
        MONDAY = 0, "Monday"
        TUESDAY = 1, "Tuesday"
        WEDNESDAY = 2, "Wednesday"
        THURSDAY = 3, "Thursday"
        FRIDAY = 4, "Friday"
        SATURDAY = 5, "Saturday"
        SUNDAY = 6, "Sunday"

    parameter = models.CharField(max_length=32, choices=parameters.CHOICES)
    cadence = models.CharField(max_length=14, choices=Cadence.choices, default=Cadence.DAILY)
    every_days = models.PositiveSmallIntegerField(
        null=True, blank=True, validators=[Range("Every N days", schedules.MIN_EVERY_DAYS, schedules.MAX_EVERY_DAYS, "days")],
        help_text="For 'every N days': measured on day D, due again from day D + N.")
    weekday = models.PositiveSmallIntegerField(null=True, blank=True, choices=Weekday.choices,
                                               help_text="For 'weekly': due from this weekday until measured.")
    after_water_change = models.BooleanField(default=False, help_text="Also due at the first round after each water change.")
    while_deviation_open = models.BooleanField(
        default=False, help_text="Also due every day while a deviation on this parameter is unresolved.")

    class Meta:
        abstract = True

    @staticmethod
    def plan_constraints(prefix: str) -> list:
        return [
            models.CheckConstraint(
                # isnull=False: a CHECK passes when its condition is NULL, so a missing value must be refused explicitly.
                condition=(Q(cadence=schedules.EVERY_N_DAYS, every_days__isnull=False,
                             every_days__gte=schedules.MIN_EVERY_DAYS, every_days__lte=schedules.MAX_EVERY_DAYS)
                           | ~Q(cadence=schedules.EVERY_N_DAYS))
                & (Q(cadence=schedules.WEEKLY, weekday__isnull=False, weekday__gte=0, weekday__lte=6)
                   | ~Q(cadence=schedules.WEEKLY)),
                name=f"{prefix}_cadence_complete"),
        ]

    def as_plan(self, source: str) -> schedules.Plan:
        return schedules.Plan(self.cadence, self.every_days if self.cadence == schedules.EVERY_N_DAYS else None,
                              self.weekday if self.cadence == schedules.WEEKLY else None,
                              self.after_water_change, self.while_deviation_open, source)


class MeasurementPlan(PlanFields):
    """How often a species' tanks measure one parameter (without a row: Vermilog's default plan)."""

    species = models.ForeignKey(Species, on_delete=models.PROTECT, related_name="measurement_plans")
    history = HistoricalRecords()

    class Meta:
        ordering = ["species", "parameter"]
        constraints = [models.UniqueConstraint(fields=["species", "parameter"], name="measurement_plan_one_per_parameter"),
                       *PlanFields.plan_constraints("measurement_plan")]

    def __str__(self):
        return f"{self.species}: {self.parameter} {self.as_plan('species').text()}"

    def get_absolute_url(self):
        return self.species.get_absolute_url()


class TankMeasurementPlan(PlanFields):
    """A tank's own plan for one parameter, replacing its species' plan."""

    tank = models.ForeignKey(Tank, on_delete=models.PROTECT, related_name="measurement_overrides")
    reason = models.TextField(help_text="Why this tank is measured differently from its species.")
    history = HistoricalRecords()

    class Meta:
        ordering = ["tank", "parameter"]
        constraints = [models.UniqueConstraint(fields=["tank", "parameter"], name="tank_measurement_plan_one_per_parameter"),
                       *PlanFields.plan_constraints("tank_measurement_plan")]

    def __str__(self):
        return f"{self.tank}: {self.parameter} {self.as_plan('tank').text()}"

    def get_absolute_url(self):
        return self.tank.get_absolute_url()


# ---------------------------------------------------------------------------------------------
# Husbandry records
# ---------------------------------------------------------------------------------------------
def _reading_fields() -> dict:
    return {
        p.key: models.FloatField(
            null=True, blank=True, verbose_name=p.label_with_unit, help_text=p.help,
            validators=[MinValueValidator(p.minimum), MaxValueValidator(p.maximum)],
        )
        for p in parameters.PARAMETERS
    }


# The reading columns are generated from the registry, so adding a parameter is one entry there
# plus `makemigrations`.
Readings = type(
    "Readings",
    (models.Model,),
    {"__module__": __name__, "Meta": type("Meta", (), {"abstract": True}), **_reading_fields()},
)


class CheckQuerySet(VoidableQuerySet):
    def needing_action(self):
        """Current checks with a flagged value and no corrective action yet."""
        return self.current().filter(corrective_action="").exclude(flags={})


class Check(Readings, Recorded):
    class Activity(models.TextChoices):
        NORMAL = "normal", "Normal"
        REDUCED = "reduced", "Reduced"
        NONE = "none", "None seen"

    class Odour(models.TextChoices):
        NONE = "none", "None"
        SLIGHT = "slight", "Slight"
        FOUL = "foul", "Foul"

    class Clarity(models.TextChoices):
        CLEAR = "clear", "Clear"
        CLOUDY = "cloudy", "Cloudy"
        TURBID = "turbid", "Turbid"

    activity = models.CharField(max_length=10, choices=Activity.choices, blank=True)
    clumping = models.BooleanField(default=False, help_text="Worms clumped together (normal for some taxa).")
    dead_removed = models.PositiveIntegerField(default=0, help_text="Dead animals removed at this check.")
    surface_film = models.BooleanField(default=False, help_text="Surface film or mould seen.")
    odour = models.CharField(max_length=10, choices=Odour.choices, blank=True)
    clarity = models.CharField(max_length=10, choices=Clarity.choices, blank=True)
    flags = models.JSONField(
        default=dict, blank=True, editable=False,
        help_text="Readings outside the care targets in force when the check was saved.",
    )
    corrective_action = models.TextField(max_length=MAX_TEXT, blank=True, help_text="What was done about a flagged value.")
    history = HistoricalRecords()

    objects = CheckQuerySet.as_manager()
    # What the round records when the technician leaves an observation as it is: "looks normal".
    OBSERVATION_DEFAULTS = {"activity": Activity.NORMAL.value, "clarity": Clarity.CLEAR.value, "odour": Odour.NONE.value}

    class Meta(Recorded.Meta):
        constraints = [
            models.CheckConstraint(
                condition=Q(**{f"{p.key}__isnull": True}) | Q(**{f"{p.key}__gte": p.minimum, f"{p.key}__lte": p.maximum}),
                name=f"check_{p.key}_physical_bounds",
            )
            for p in parameters.PARAMETERS
        ] + [models.CheckConstraint(condition=Q(dead_removed__lte=MAX_COUNT), name="check_dead_removed_plausible")]
        indexes = [
            # The round's "last value" subqueries and the tank page's recent checks.
            models.Index(fields=["tank", "-observed_at"], name="check_tank_recent"),
            # The checks CSV/XLSX export: ORDER BY observed_at, id reads this index instead of sorting every row.
            models.Index(fields=["observed_at", "id"], name="check_export_order"),
        ]

    def __str__(self):
        return f"Check of {self.tank} at {lab_moment(self.observed_at)}"

    def get_absolute_url(self):
        return reverse("colonies:check-detail", args=[self.pk])

    def readings(self) -> dict[str, float | None]:
        return {p.key: getattr(self, p.key) for p in parameters.PARAMETERS}

    def derived(self) -> dict[str, float | None]:
        """Derived values (un-ionized ammonia, DO saturation, ...); needs tank.species loaded."""
        return derived.derive(self.readings(), self.tank.species.habitat)

    def values(self) -> dict[str, float | None]:
        """Raw readings and derived values together, as flags and deviation rules see them."""
        return {**self.readings(), **self.derived()}

    @property
    def needs_corrective_action(self) -> bool:
        return bool(self.flags) and not self.corrective_action.strip()


class Feeding(Recorded):
    Unit = FeedingUnit

    food = models.CharField(max_length=80, help_text="e.g. sinking fish-food pellets, liver paste, spirulina.")
    amount = models.FloatField(validators=[Range("Amount", 0, max(FEEDING_MAX.values()))],
                               help_text="Per unit at most: " + ", ".join(f"{v:g} {u}" for u, v in FEEDING_MAX.items()))
    unit = models.CharField(max_length=8, choices=Unit.choices, default=Unit.G)
    history = HistoricalRecords()

    class Meta(Recorded.Meta):
        indexes = [
            # The "latest per tank" subquery of Tank.objects.with_last_events() (Today, tank list, round) and the
            # tank page's recent feedings. SQLite plan before: SEARCH USING INDEX ..._tank_id (tank_id=?) + USE TEMP
            # B-TREE FOR ORDER BY (sorts every row of the tank); after: SEARCH USING INDEX feeding_tank_recent (tank_id=?), no sort.
            models.Index(fields=["tank", "-observed_at"], name="feeding_tank_recent"),
        ]
        constraints = [
            models.CheckConstraint(condition=Q(amount__gte=0), name="feeding_amount_not_negative"),
            models.CheckConstraint(condition=Q(amount__lte=max(FEEDING_MAX.values())), name="feeding_amount_plausible"),
        ]

    def __str__(self):
        return f"Feeding of {self.tank}: {self.amount:g} {self.unit} {self.food}"

    def get_absolute_url(self):
        return self.tank.get_absolute_url()


class WaterChange(Recorded):
    percent = models.FloatField(null=True, blank=True, validators=[MinValueValidator(0), MaxValueValidator(100)])
    litres = models.FloatField(null=True, blank=True, validators=[Range("Litres", 0, MAX_TANK_VOLUME_L, "L")],
                               help_text="At most the tank's volume.")
    source_water = models.CharField(max_length=80, blank=True,
                                    help_text="e.g. aged dechlorinated tap water, reconstituted salts, artificial seawater.")
    history = HistoricalRecords()

    class Meta(Recorded.Meta):
        indexes = [
            # The "latest per tank" subquery of Tank.objects.with_last_events() (Today, tank list, round) and the
            # tank page's recent water changes. SQLite plan before: SEARCH USING INDEX ..._tank_id (tank_id=?) + USE TEMP
            # B-TREE FOR ORDER BY (sorts every row of the tank); after: SEARCH USING INDEX waterchange_tank_recent (tank_id=?), no sort.
            models.Index(fields=["tank", "-observed_at"], name="waterchange_tank_recent"),
        ]
        constraints = [
            models.CheckConstraint(condition=Q(percent__isnull=False) | Q(litres__isnull=False),
                                   name="water_change_has_amount"),
            models.CheckConstraint(condition=Q(percent__isnull=True) | Q(percent__gte=0, percent__lte=100),
                                   name="water_change_percent_0_100"),
            models.CheckConstraint(condition=Q(litres__isnull=True) | Q(litres__gte=0),
                                   name="water_change_litres_not_negative"),
            models.CheckConstraint(condition=Q(litres__isnull=True) | Q(litres__lte=MAX_TANK_VOLUME_L),
                                   name="water_change_litres_plausible"),
        ]

    def __str__(self):
        amount = (f"{self.percent:g} %" if self.percent is not None
                  else f"{self.litres:g} L" if self.litres is not None else "amount not given")
        return f"Water change of {self.tank}: {amount}"

    def get_absolute_url(self):
        return self.tank.get_absolute_url()

    def fraction(self) -> float | None:
        if self.percent is not None:
            return self.percent / 100
        if self.litres is not None and self.tank.volume_l:
            return min(1.0, self.litres / self.tank.volume_l)
        return None


class Census(Recorded):
    """A population count. Raw data are stored so the estimate can always be recomputed."""

    class Method(models.TextChoices):
        DIRECT = "direct", "Direct count"
        ALIQUOT = "aliquot", "Aliquot counts"
        MASS = "mass", "Wet mass and counted subsample"

    method = models.CharField(max_length=10, choices=Method.choices, default=Method.DIRECT)
    direct_count = models.PositiveIntegerField(null=True, blank=True)
    aliquot_counts = models.JSONField(default=list, blank=True, help_text="Animals counted in each aliquot.")
    aliquot_ml = models.FloatField(null=True, blank=True, help_text="Volume of each aliquot, mL.")
    total_ml = models.FloatField(null=True, blank=True, help_text="Well-mixed volume the aliquots were drawn from, mL.")
    total_mass_g = models.FloatField(null=True, blank=True, help_text="Wet mass of all animals, g.")
    sample_mass_g = models.FloatField(null=True, blank=True, help_text="Wet mass of the counted subsample, g.")
    sample_count = models.PositiveIntegerField(null=True, blank=True, help_text="Animals in the weighed subsample.")
    estimate = models.FloatField(null=True, blank=True, editable=False)
    estimate_lower = models.FloatField(null=True, blank=True, editable=False)
    estimate_upper = models.FloatField(null=True, blank=True, editable=False)
    estimate_method = models.CharField(max_length=200, blank=True, editable=False)
    history = HistoricalRecords()

    class Meta(Recorded.Meta):
        verbose_name_plural = "censuses"
        indexes = [
            # The "latest per tank" subquery of Tank.objects.with_last_events() (Today, tank list, round) and the
            # tank page's recent censuses. SQLite plan before: SEARCH USING INDEX ..._tank_id (tank_id=?) + USE TEMP
            # B-TREE FOR ORDER BY (sorts every row of the tank); after: SEARCH USING INDEX census_tank_recent (tank_id=?), no sort.
            models.Index(fields=["tank", "-observed_at"], name="census_tank_recent"),
        ]
        constraints = [
            models.CheckConstraint(condition=Q(estimate__isnull=True) | Q(estimate__gte=0), name="census_estimate_not_negative"),
            models.CheckConstraint(
                condition=(Q(direct_count__isnull=True) | Q(direct_count__lte=MAX_COUNT))
                & (Q(sample_count__isnull=True) | Q(sample_count__lte=MAX_COUNT))
                & (Q(aliquot_ml__isnull=True) | Q(aliquot_ml__gt=0, aliquot_ml__lte=CENSUS_MAX_ML))
                & (Q(total_ml__isnull=True) | Q(total_ml__gt=0, total_ml__lte=CENSUS_MAX_ML))
                & (Q(total_mass_g__isnull=True) | Q(total_mass_g__gt=0, total_mass_g__lte=CENSUS_MAX_MASS_G))
                & (Q(sample_mass_g__isnull=True) | Q(sample_mass_g__gt=0, sample_mass_g__lte=CENSUS_MAX_MASS_G)),
                name="census_raw_data_plausible",
            ),
        ]

    def __str__(self):
        value = f"{self.estimate:.0f}" if self.estimate is not None else "?"
        return f"Census of {self.tank}: {value} animals"

    def get_absolute_url(self):
        return self.tank.get_absolute_url()


class DeadRemoval(Recorded):
    """Dead animals taken out of a tank outside the daily round (the round's own count is Check.dead_removed).

    A record of its own, not a check: a removal is not a check done (round progress, missed checks and
    the share of flagged checks count checks only). Mortality reads both kinds, each death once: per
    1,000 animal-days (colonies.health_series.check_counts) and the mortality rule (colonies.deviations).
    """

    count = models.PositiveIntegerField(validators=[Range("Dead removed", 1, MAX_COUNT, "animals")],
                                        help_text="Dead animals removed.")
    history = HistoricalRecords()

    class Meta(Recorded.Meta):
        verbose_name = "dead-animal removal"
        indexes = [
            # The tank page's recent removals, the mortality rule's window and the deaths in a mortality period.
            models.Index(fields=["tank", "-observed_at"], name="removal_tank_recent"),
        ]
        constraints = [
            models.CheckConstraint(condition=Q(count__gte=1, count__lte=MAX_COUNT), name="removal_count_plausible"),
        ]

    def __str__(self):
        return f"{self.count} dead removed from {self.tank}"

    def get_absolute_url(self):
        return self.tank.get_absolute_url()


# ---------------------------------------------------------------------------------------------
# Deviations
# ---------------------------------------------------------------------------------------------
EVIDENCE_KEEP = 60  # newest evidence items kept on a deviation; evidence_count keeps the total


class DeviationQuerySet(models.QuerySet):
    def unresolved(self):
        return self.exclude(status=Deviation.Status.CLOSED)

    def for_tanks(self, tank_ids):
        return self.filter(tank_id__in=tank_ids)


class Deviation(models.Model):
    """Something about a culture that needs a person's attention, from open to closed.

    Opened by the rules in colonies/deviations.py; one unresolved deviation per tank, rule,
    parameter and subject at a time, updated with new evidence while the problem lasts. Closing
    needs a corrective action. Nothing closes a deviation by itself.
    """

    class Rule(models.TextChoices):
        OUT_OF_TARGET = "out-of-target", "Reading outside care target"
        MISSED_CHECK = "missed-check", "Daily check missed"
        FEEDING_OVERDUE = "feeding-overdue", "Feeding overdue"
        WATER_CHANGE_OVERDUE = "water-change-overdue", "Water change overdue"
        CENSUS_OVERDUE = "census-overdue", "Census overdue"
        MORTALITY = "mortality", "Deaths above baseline"
        DRIFT = "drift", "Drift toward a target limit"
        STOCKING_DENSITY = "stocking-density", "Stocking density above maximum"
        PROTOCOL_LIMIT = "protocol-limit", "Protocol limit overridden"

    class Severity(models.IntegerChoices):
        MINOR = 1, "Minor"
        MODERATE = 2, "Moderate"
        MAJOR = 3, "Major"

    class Status(models.TextChoices):
        OPEN = "open", "Open"
        ACKNOWLEDGED = "acknowledged", "Acknowledged"
        CLOSED = "closed", "Closed"

    tank = models.ForeignKey(Tank, null=True, blank=True, on_delete=models.PROTECT, related_name="deviations")
    rule = models.CharField(max_length=24, choices=Rule.choices)
    parameter = models.CharField(max_length=32, blank=True, help_text="The parameter concerned, if any.")
    subject = models.CharField(max_length=60, blank=True,
                               help_text="What else the deviation is about (e.g. a cohort), when not a tank alone.")
    severity = models.PositiveSmallIntegerField(choices=Severity.choices, default=Severity.MINOR)
    status = models.CharField(max_length=14, choices=Status.choices, default=Status.OPEN)
    opened_at = models.DateTimeField(default=timezone.now, help_text="When the first evidence was seen.")
    last_seen_at = models.DateTimeField(default=timezone.now, help_text="When the latest evidence was seen.")
    summary = models.CharField(max_length=300)
    evidence = models.JSONField(default=list, blank=True,
                                help_text="Values, targets and times that triggered the rule, newest last.")
    evidence_count = models.PositiveIntegerField(default=0)
    acknowledged_at = models.DateTimeField(null=True, blank=True)
    acknowledged_by = models.ForeignKey(settings.AUTH_USER_MODEL, null=True, blank=True, on_delete=models.PROTECT,
                                        related_name="+")
    closed_at = models.DateTimeField(null=True, blank=True)
    closed_by = models.ForeignKey(settings.AUTH_USER_MODEL, null=True, blank=True, on_delete=models.PROTECT,
                                  related_name="+")
    corrective_action = models.TextField(blank=True, help_text="What was done; required to close.")
    signatures = GenericRelation("colonies.Signature")
    history = HistoricalRecords()

    objects = DeviationQuerySet.as_manager()

    class Meta:
        ordering = ["-opened_at"]
        get_latest_by = "opened_at"
        constraints = [
            # Coalesce: a unique index treats NULLs as distinct, so without it deviations about no
            # tank (a subject alone) could be opened twice by two writers at once.
            models.UniqueConstraint(
                Coalesce("tank", Value(0), output_field=models.BigIntegerField()), "rule", "parameter", "subject",
                condition=~Q(status="closed"), name="deviation_one_unresolved_per_subject",
            ),
            models.CheckConstraint(
                condition=~Q(status="closed") | (Q(closed_at__isnull=False) & ~Q(corrective_action="")),
                name="deviation_closed_has_action",
            ),
        ]
        indexes = [
            # The register's default view and the Today page: unresolved deviations by tank.
            models.Index(fields=["status", "tank"], name="deviation_status_tank"),
        ]

    def __str__(self):
        where = self.tank.code if self.tank_id else self.subject
        return f"{self.get_rule_display()} · {where}"

    def get_absolute_url(self):
        return reverse("colonies:deviation-detail", args=[self.pk])

    @property
    def time_to_close(self):
        return (self.closed_at - self.opened_at) if self.closed_at else None

    def _lock_and_refresh(self) -> None:
        """Take the lock the deviation engine takes (the tank's row, or this row when there is no
        tank) and re-read this row: evidence added since the page was loaded is kept, not
        overwritten by the stale copy. Call inside a transaction; runs two queries."""
        if self.tank_id:
            list(Tank.objects.select_for_update(no_key=True).filter(pk=self.tank_id).values_list("pk"))
        else:
            list(Deviation.objects.select_for_update(no_key=True).filter(pk=self.pk).values_list("pk"))
        self.refresh_from_db()

    def acknowledge(self, *, user) -> None:
        with transaction.atomic():
            self._lock_and_refresh()
            if self.status != self.Status.OPEN:
                raise ValueError(f"Only an open deviation can be acknowledged; this one is "
                                 f"{self.get_status_display().lower()}.")
            self.status = self.Status.ACKNOWLEDGED
            self.acknowledged_at = timezone.now()
            self.acknowledged_by = user
            self._history_user = user
            self._change_reason = "Acknowledged"
            self.save()

    MANAGER_CLOSES = (Rule.PROTOCOL_LIMIT,)  # a manager's override is closed by a manager

    def close_refusal(self, user) -> str | None:
        """Why this user may not close the deviation, or None (the role check of the views comes first)."""
        from .roles import MANAGER, has_role  # roles imports no models; kept local to keep models first

        if self.rule in self.MANAGER_CLOSES and not has_role(user, MANAGER):
            return (f"Rule: a {self.get_rule_display().lower()} deviation records a manager's override; "
                    "only a manager may close it.")
        return None

    def signed_content(self) -> dict:
        """What a closing signature vouches for (colonies/signatures.py hashes it)."""
        return {"record": "deviation", "id": self.pk, "tank": self.tank.code if self.tank_id else None,
                "subject": self.subject, "rule": self.rule, "parameter": self.parameter, "severity": self.severity,
                "status": self.status, "summary": self.summary, "opened_at": self.opened_at,
                "closed_at": self.closed_at, "closed_by": self.closed_by_id, "corrective_action": self.corrective_action}

    def close(self, *, user, corrective_action: str, password: str) -> None:
        """Close with a corrective action, signed by `user` (their password re-entered): one transaction,
        so a wrong password closes nothing. Raises ValidationError({"password": ...}) then."""
        from .signatures import sign  # signatures imports this module

        refusal = self.close_refusal(user)
        if refusal:
            raise PermissionDenied(refusal)
        action = (corrective_action or "").strip()
        if not action:
            raise ValueError("Corrective action: describe what was done before closing the deviation.")
        try:
            with transaction.atomic():
                self._lock_and_refresh()
                if self.status == self.Status.CLOSED:
                    raise ValueError("This deviation is already closed.")
                now = timezone.now()
                if self.acknowledged_at is None:
                    self.acknowledged_at, self.acknowledged_by = now, user
                self.status = self.Status.CLOSED
                self.closed_at = now
                self.closed_by = user
                self.corrective_action = action
                self._history_user = user
                self._change_reason = "Closed with corrective action"
                self.save()
                sign(user=user, password=password, meaning=Signature.Meaning.CLOSED, obj=self)
        except ValidationError:
            self.refresh_from_db()  # the transaction was rolled back; so is this copy
            raise


class ArchivedEvidence(models.Model):
    """Evidence beyond a deviation's newest EVIDENCE_KEEP items, moved here instead of being dropped.

    Written only by the deviation engine (colonies.deviations.apply_findings), never edited. It lets a
    rerun of the rules (`scan_deviations --records`) recognise evidence the deviation no longer shows,
    so a long-running deviation gains no duplicates and a closed one is not opened again.
    """

    deviation = models.ForeignKey(Deviation, on_delete=models.PROTECT, related_name="archived_evidence")
    ref = models.TextField(help_text="The evidence's ref: the record or event it is about.")
    item = models.JSONField(help_text="The evidence as the deviation showed it.")

    class Meta:
        ordering = ["deviation", "pk"]
        constraints = [models.UniqueConstraint(fields=["deviation", "ref"], name="archived_evidence_once")]

    def __str__(self):
        return f"{self.deviation}: {self.ref}"

    def get_absolute_url(self):
        return self.deviation.get_absolute_url()


# ---------------------------------------------------------------------------------------------
# Splits: part of a culture moved to other tanks (lineage and the animal books)
# ---------------------------------------------------------------------------------------------
class Split(Voidable):
    """A culture divided: some animals stay in the source, the rest go to one or more tanks.

    The numbers are estimates (worms are rarely counted one by one), so the books need not
    balance exactly; the tank page shows the difference. Recorded by services.record_split().
    """

    source = models.ForeignKey(Tank, on_delete=models.PROTECT, related_name="splits_out")
    split_at = models.DateTimeField(default=timezone.now, help_text="When the animals were divided.")
    recorded_at = models.DateTimeField(auto_now_add=True)
    recorded_by = models.ForeignKey(settings.AUTH_USER_MODEL, on_delete=models.PROTECT, related_name="+")
    source_before = models.FloatField(
        validators=[MinValueValidator(1)],
        help_text="Estimated animals in the source tank just before the split.",
    )
    stayed = models.FloatField(validators=[MinValueValidator(0)],
                               help_text="Estimated animals left in the source tank.")
    note = models.TextField(max_length=MAX_TEXT, blank=True)
    history = HistoricalRecords()

    class Meta:
        ordering = ["-split_at"]
        get_latest_by = "split_at"
        constraints = [
            models.CheckConstraint(condition=Q(source_before__gt=0), name="split_source_before_positive"),
            models.CheckConstraint(condition=Q(stayed__gte=0), name="split_stayed_not_negative"),
            models.CheckConstraint(condition=Q(stayed__lte=models.F("source_before"), source_before__lte=MAX_ANIMALS),
                                   name="split_stayed_not_above_before"),
        ]
        indexes = [
            # The tank page's and the overview's population series (latest split per tank).
            models.Index(fields=["source", "-split_at"], name="split_source_recent"),
        ]

    def __str__(self):
        return f"Split of {self.source} on {lab_date(timezone.localtime(self.split_at))}"

    def get_absolute_url(self):
        return self.source.get_absolute_url()

    @property
    def tank(self):
        """The tank the split is filed under (the source), so generic record pages can link back."""
        return self.source


class SplitPart(models.Model):
    """One destination of a split and how many animals (estimated) went there."""

    split = models.ForeignKey(Split, on_delete=models.PROTECT, related_name="parts")
    destination = models.ForeignKey(Tank, on_delete=models.PROTECT, related_name="split_parts_in")
    animals = models.FloatField(validators=[MinValueValidator(0)], help_text="Estimated animals moved to this tank.")
    created_tank = models.BooleanField(default=False, editable=False,
                                       help_text="The destination tank was set up by this split.")
    added_lineage = models.BooleanField(default=False, editable=False,
                                        help_text="This split added the source to the destination's lineage.")
    history = HistoricalRecords()

    class Meta:
        ordering = ["split", "destination__code"]
        constraints = [
            models.CheckConstraint(condition=Q(animals__gte=0), name="split_part_animals_not_negative"),
            models.CheckConstraint(condition=Q(animals__lte=MAX_ANIMALS), name="split_part_animals_plausible"),
            models.UniqueConstraint(fields=["split", "destination"], name="split_part_one_per_destination"),
        ]

    def __str__(self):
        return f"{self.animals:.0f} animals to {self.destination}"

    def get_absolute_url(self):
        return self.destination.get_absolute_url()


# ---------------------------------------------------------------------------------------------
# Submissions: one-time keys that make a form's POST idempotent (colonies/idempotency.py)
# ---------------------------------------------------------------------------------------------
class Submission(models.Model):
    """A form submission that was saved, so that a resubmit of the same key does nothing.

    Every form that creates records carries a one-time key (`{% submission_key %}`); the
    `@once_per_submission` view decorator claims the key before the view runs and remembers where
    the saved form led. Not a lab record: it has no history and is not shown in the admin.
    """

    key = models.UUIDField(help_text="The one-time key the form was rendered with.")
    user = models.ForeignKey(settings.AUTH_USER_MODEL, on_delete=models.PROTECT, related_name="+")
    path = models.CharField(max_length=300, help_text="The URL the form was posted to.")
    created_at = models.DateTimeField(auto_now_add=True)
    result_url = models.CharField(max_length=500, blank=True,
                                  help_text="Where the saved submission redirected; a resubmit is sent there.")

    class Meta:
        ordering = ["-created_at"]
        get_latest_by = "created_at"
        constraints = [
            # Serialises two identical submits: the second insert waits for the first transaction and fails.
            models.UniqueConstraint(fields=["user", "key"], name="submission_one_per_user_key"),
        ]

    def __str__(self):
        return f"Submission {self.key} to {self.path}"

    def get_absolute_url(self):
        return self.result_url


# ---------------------------------------------------------------------------------------------
# Electronic signatures (21 CFR 11.50, 11.70, 11.200); the service is colonies/signatures.py
# ---------------------------------------------------------------------------------------------
class Signature(models.Model):
    """A person's signature on a record: who, when (server time), what it means, and a SHA-256 of
    the record's signed content, so a later change of the record is detectable.

    Linked by content type and object id, not by one foreign key per signed model: deviations live
    here, protocols and studies in experiments (which colonies must not import) and period reports
    elsewhere; one table and one service serve all. Never edited or deleted (save and delete refuse).
    """

    class Meaning(models.TextChoices):
        CLOSED = "closed-with-action", "closed with corrective action"
        APPROVED = "approved", "approved"
        AMENDED = "amended", "amendment approved"
        SUSPENDED = "suspended", "suspended"
        REVIEWED = "reviewed", "reviewed"
        UNBLINDED = "unblinded", "unblinded (outcomes locked)"
        LOCKED = "locked", "outcomes locked"

    content_type = models.ForeignKey("contenttypes.ContentType", on_delete=models.PROTECT)
    object_id = models.PositiveBigIntegerField()
    signer = models.ForeignKey(settings.AUTH_USER_MODEL, on_delete=models.PROTECT, related_name="signatures")
    signer_name = models.CharField(max_length=300, help_text="The signer's full name as printed at signing.")
    signer_username = models.CharField(max_length=150)
    signed_at = models.DateTimeField(default=timezone.now, editable=False, help_text="Server time of signing.")
    meaning = models.CharField(max_length=24, choices=Meaning.choices)
    content = models.TextField(help_text="The canonical serialisation of the record as signed (JSON).")
    content_sha256 = models.CharField(max_length=64, help_text="SHA-256 of `content`, hex.")

    class Meta:
        ordering = ["signed_at", "pk"]
        get_latest_by = "signed_at"
        indexes = [
            # signatures_for(obj) and the signature blocks of the deviation, protocol and study pages
            models.Index(fields=["content_type", "object_id", "signed_at"], name="signature_of_record"),
        ]
        constraints = [
            models.CheckConstraint(condition=Q(content_sha256__regex=r"^[0-9a-f]{64}$"), name="signature_sha256_hex"),
        ]

    def __str__(self):
        return f"Signed by {self.signer_name}, {lab_moment(self.signed_at)}, meaning: {self.get_meaning_display()}"

    def get_absolute_url(self):
        target = self.content_type.get_object_for_this_type(pk=self.object_id)
        return target.get_absolute_url()

    def save(self, *args, **kwargs):
        if self.pk is not None:
            raise PermissionDenied("A signature is never changed; sign again instead.")
        super().save(*args, **kwargs)

    def delete(self, *args, **kwargs):
        raise PermissionDenied("A signature is never deleted.")
