"""Back office: protocols (reference data, entered and approved here) and read-only views of the records.

Bookings, cohorts, studies and trials are made in the app's own screens, which apply the protocol
and welfare rules; here they can only be read. Nothing can be deleted.
"""
from django.contrib import admin
from simple_history.admin import SimpleHistoryAdmin

from colonies.admin import NoDeleteMixin, ReasonAdmin

from .models import Allowance, Attachment, Booking, Cohort, Override, Protocol, Study, Trial


class AllowanceInline(NoDeleteMixin, admin.StackedInline):
    model = Allowance
    extra = 0
    fieldsets = [
        (None, {"fields": ["kind"]}),
        ("Light and UV", {"fields": [("wavelength_min_nm", "wavelength_max_nm"), "max_irradiance_mw_cm2",
                                     "max_duration_s", "max_dose_mj_cm2"]}),
        ("Electrical", {"fields": ["max_voltage_v", "max_field_v_cm", "max_pulse_width_ms", "max_pulse_count"]}),
        ("Thermal", {"fields": ["max_temp_step_c", "max_temp_rate_c_min"]}),
        ("Chemical", {"fields": ["substance", "max_concentration_um"]}),
        ("Mechanical and notes", {"fields": ["notes"]}),
    ]


@admin.register(Protocol)
class ProtocolAdmin(ReasonAdmin):
    list_display = ["reference", "title", "status", "approver", "starts_on", "expires_on", "max_exposures_per_group"]
    list_filter = ["status"]
    search_fields = ["reference", "title", "approver"]
    inlines = [AllowanceInline]


class ReadOnlyAdmin(NoDeleteMixin, SimpleHistoryAdmin):
    def has_change_permission(self, request, obj=None):
        return False

    def has_add_permission(self, request):
        return False


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


@admin.register(Study)
class StudyAdmin(ReadOnlyAdmin):
    list_display = ["code", "title", "owner", "protocol", "blinded", "unblinded_at"]
    search_fields = ["code", "title"]


@admin.register(Trial)
class TrialAdmin(ReadOnlyAdmin):
    list_display = ["study", "slot", "code", "cohort", "kind", "dose_mj_cm2", "disperse_s", "censored", "voided_at"]
    list_filter = ["study", "kind", "censored"]
    date_hierarchy = "run_at"


@admin.register(Override)
class OverrideAdmin(ReadOnlyAdmin):
    list_display = ["trial", "cohort", "recorded_by", "recorded_at", "deviation"]


@admin.register(Attachment)
class AttachmentAdmin(ReadOnlyAdmin):
    list_display = ["name", "trial", "kind", "sha256", "size_bytes", "uploaded_at"]
