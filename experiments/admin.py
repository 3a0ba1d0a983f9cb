"""Back office: read-only views of protocols and the records.

Protocols are entered, amended (as versions), approved and suspended in the app's own pages, where
approving and suspending are signed; bookings, cohorts, dishes, studies and trials are made in the
app's screens, which apply the protocol and welfare rules. Here they can only be read: a change here
would bypass the versions and the signatures. Nothing can be deleted.
"""

from django.contrib import admin
from django.db.models import BooleanField, Case, Value, When

from colonies.admin import HistoryAdmin, NoDeleteMixin, ReadableHistoryHelper

from . import blinding
from .models import (Allowance, Attachment, Booking, Cohort, Dish, ImageMeasurement, Override, PeriodReport, Protocol,
                     ProtocolVersion, SlotClaim, Study, Trial)

# What a row must not show to a viewer blinded to it: experiments/blinding.py decides, as on the app's pages.
BLINDED_TRIAL_FIELDS = blinding.HIDDEN_TRIAL_FIELDS
BLINDED_STUDY_FIELDS = blinding.HIDDEN_STUDY_FIELDS
BLINDED_OVERRIDE_FIELDS = blinding.HIDDEN_OVERRIDE_FIELDS
BLINDED_ATTACHMENT_FIELDS = blinding.HIDDEN_ATTACHMENT_FIELDS
BLINDED = blinding.BLINDED


class AllowanceInline(NoDeleteMixin, admin.StackedInline):
    model = Allowance
    extra = 0

    def has_add_permission(self, request, obj=None):
        return False

    def has_change_permission(self, request, obj=None):
        return False
    fieldsets = [
        (None, {"fields": ["kind"]}),
        ("Light and UV", {"fields": [("wavelength_min_nm", "wavelength_max_nm"), "max_irradiance_mw_cm2",
                                     "max_duration_s", "max_dose_mj_cm2"]}),
        ("Electrical", {"fields": ["max_voltage_v", "max_field_v_cm", "max_pulse_width_ms", "max_pulse_count"]}),
        ("Thermal", {"fields": ["max_temp_step_c", "max_temp_rate_c_min"]}),
        ("Chemical", {"fields": ["substance", "max_concentration_um"]}),
        ("Mechanical and notes", {"fields": ["notes"]}),
    ]


class ReadOnlyAdmin(HistoryAdmin):
    def has_change_permission(self, request, obj=None):
        return False

    def has_add_permission(self, request):
        return False


@admin.register(Protocol)
class ProtocolAdmin(ReadOnlyAdmin):
    """Read-only: a change here would rewrite terms without a version and signed terms without a signature."""

    list_display = ["reference", "title", "status", "approver", "starts_on", "expires_on", "max_exposures_per_group",
                    "max_animals_total"]
    list_filter = ["status"]
    search_fields = ["reference", "title", "approver"]
    inlines = [AllowanceInline]


@admin.register(ProtocolVersion)
class ProtocolVersionAdmin(NoDeleteMixin, admin.ModelAdmin):
    list_display = ["protocol", "number", "effective_from", "recorded_by", "approval_reference"]
    list_filter = ["protocol"]

    def has_add_permission(self, request):
        return False

    def has_change_permission(self, request, obj=None):
        return False


class BlindedAdmin(ReadOnlyAdmin):
    """Read-only pages that leave out `blinded_fields` while the row is blinded to the viewer.

    experiments/blinding.py decides, as for the app's own pages: managers and superusers are blinded
    like everyone else; a trial's operator sees that trial. The change page and the history drop
    those fields; the list shows "blinded" in their columns; no list lookup, filter or sort may use
    them (a count per condition would give the allocation away).
    """

    blinded_fields: frozenset = frozenset()

    def trial_of(self, obj):
        """The trial whose condition the row shows; None for a study (its allocation is hidden from everyone)."""
        raise NotImplementedError

    def hides(self, request, obj) -> bool:
        if obj is None:
            return False
        trial = self.trial_of(obj)
        return obj.is_blind if trial is None else not blinding.may_see_condition(request.user, trial)

    def get_fields(self, request, obj=None):
        fields = super().get_fields(request, obj)
        return [f for f in fields if f not in self.blinded_fields] if self.hides(request, obj) else fields

    def lookup_allowed(self, lookup, value, request=None):
        if lookup.split("__")[0] in self.blinded_fields:
            return False
        return super().lookup_allowed(lookup, value, request)

    def get_historical_record_context_helper(self, request, historical_record):
        # Decided on the row as it is now (a past version of a study may predate its unblinding).
        cache = request.__dict__.setdefault("_vermilog_blind_rows", {})
        pk = historical_record.instance.pk
        if pk not in cache:
            current = self.model._default_manager.filter(pk=pk).first()
            cache[pk] = current is None or self.hides(request, current)
        # The history's list of changes between versions, without the blinded fields.
        return ReadableHistoryHelper(self.model, historical_record,
                                     hidden=self.blinded_fields if cache[pk] else frozenset())


def _marked_blind(request, queryset, prefix: str = ""):
    """Each row marked for the list columns (which Django calls with the row only), by the rule of
    experiments/blinding.py as a filter."""
    return queryset.annotate(blind_to_viewer=Case(When(blinding.visible_q(request.user, prefix), then=Value(False)),
                                                  default=Value(True), output_field=BooleanField()))


def _blindable(field: str, description: str):
    """A list column that shows the field unless the row is blinded to the viewer."""
    def column(self, obj):
        if obj.blind_to_viewer:
            return BLINDED
        value = getattr(obj, f"get_{field}_display", None)
        return value() if value else getattr(obj, field)
    column.short_description = description
    return column


@admin.register(Booking)
class BookingAdmin(ReadOnlyAdmin):
    list_display = ["pk", "tank", "animals", "needed_on", "status", "booked_by", "protocol"]
    list_filter = ["status", "tank__room", "protocol"]
    search_fields = ["tank__code", "purpose"]
    date_hierarchy = "needed_on"


@admin.register(Cohort)
class CohortAdmin(ReadOnlyAdmin):
    list_display = ["label", "origin_tank", "size", "drawn_at", "end", "protocol"]
    list_filter = ["end", "protocol"]


@admin.register(Dish)
class DishAdmin(ReadOnlyAdmin):
    """Groups of animals taken from cohorts. A dish carries no condition or stimulus, and its page lists
    no trials and no dose (a dish's cumulative dose would give a blinded trial's dose away)."""

    list_display = ["label", "cohort", "animals", "set_up_at", "set_up_by", "end", "ended_at", "returned_to",
                    "returned_count", "voided_at"]
    list_filter = ["end"]
    list_select_related = ["set_up_by", "returned_to"]
    search_fields = ["cohort__id"]
    date_hierarchy = "set_up_at"

    @admin.display(description="dish", ordering="cohort_id")
    def label(self, obj):
        return obj.label


@admin.register(PeriodReport)
class PeriodReportAdmin(ReadOnlyAdmin):
    """Issued period reports: issued (and later signed) in the app, read here."""

    list_display = ["pk", "period_from", "period_to", "scope_label", "issued_by", "issued_at", "manifest_sha256"]
    list_filter = ["scope"]
    date_hierarchy = "issued_at"


@admin.register(Study)
class StudyAdmin(BlindedAdmin):
    list_display = ["code", "title", "owner", "protocol", "blinded", "unblinded_at"]
    search_fields = ["code", "title"]
    blinded_fields = BLINDED_STUDY_FIELDS

    def trial_of(self, obj):
        return None


@admin.register(Trial)
class TrialAdmin(BlindedAdmin):
    list_display = ["study", "slot", "code", "cohort", "dish", "condition_shown", "kind_shown", "dose_shown",
                    "disperse_s", "censored", "voided_at"]
    list_filter = ["study", "censored"]
    date_hierarchy = "run_at"
    blinded_fields = BLINDED_TRIAL_FIELDS
    condition_shown = _blindable("condition", "condition")
    kind_shown = _blindable("kind", "stimulus type")
    dose_shown = _blindable("dose_mj_cm2", "dose (mJ/cm²)")

    def trial_of(self, obj):
        return obj

    def get_queryset(self, request):
        return _marked_blind(request, super().get_queryset(request).select_related("study", "cohort", "dish"))


@admin.register(Override)
class OverrideAdmin(BlindedAdmin):
    list_display = ["trial", "cohort", "recorded_by", "recorded_at", "deviation"]
    blinded_fields = BLINDED_OVERRIDE_FIELDS

    def trial_of(self, obj):
        return obj.trial


@admin.register(Attachment)
class AttachmentAdmin(BlindedAdmin):
    list_display = ["name_shown", "trial", "kind", "sha256", "size_bytes", "uploaded_at"]
    blinded_fields = BLINDED_ATTACHMENT_FIELDS

    def trial_of(self, obj):
        return obj.trial

    def get_queryset(self, request):
        return _marked_blind(request, super().get_queryset(request).select_related("trial__study"), "trial__")

    @admin.display(description="name")
    def name_shown(self, obj):
        return blinding.masked_name(obj) if obj.blind_to_viewer else obj.name


@admin.register(SlotClaim)
class SlotClaimAdmin(ReadOnlyAdmin):
    """Who claimed which slot, when, and releases with their reasons (no condition: the allocation holds it)."""
    list_display = ["study", "slot", "claimed_by", "claimed_at", "released_at", "released_by"]
    list_filter = ["study"]


@admin.register(ImageMeasurement)
class ImageMeasurementAdmin(ReadOnlyAdmin):
    """Read-only: measurements are made from the trial page. They carry the trial's code, never its condition."""

    list_display = ["pk", "trial", "source", "status", "frames_total", "dispersal_time_s", "censored", "decision",
                    "requested_at", "voided_at"]
    list_filter = ["status", "decision"]
    exclude = ["worker", "files"]  # files: the uploaded names, which may name the condition (see blinding.masked_name)
