"""The back office for reference data.

Nothing can be deleted here (records, users or role groups), every change asks for a reason and is
saved through the same service as the app's own screens, and the history can be read but never
reverted: the history library's "revert to this version" form is refused for everyone, superusers
included, whatever SIMPLE_HISTORY_REVERT_DISABLED says.
"""
from django import forms
from django.contrib import admin
from django.contrib.auth.admin import GroupAdmin, UserAdmin
from django.contrib.auth.models import Group, User
from django.core.exceptions import PermissionDenied
from django.utils.html import conditional_escape
from simple_history.admin import SimpleHistoryAdmin
from simple_history.template_utils import HistoricalRecordContextHelper

from . import history_format, services
from .forms import CareTargetForm, MeasurementPlanForm, TankMeasurementPlanForm, TankTargetForm, reason_field
from .models import (CareTarget, Census, Check, DeadRemoval, Deviation, Feeding, MeasurementPlan, Room, Signature,
                     Species, Split, SplitPart, Tank, TankMeasurementPlan, TankTarget, WaterChange)

NO_REVERT = ("Past versions cannot be restored or edited: a correction is a new version with its own reason, "
             "made in the app or on the record's change page.")


class ReasonAdminForm(forms.ModelForm):
    change_reason = reason_field("Change reason", help_text="Required: why this change? Kept in the history.")


class NoDeleteMixin:
    def has_delete_permission(self, request, obj=None):
        return False

    def get_actions(self, request):
        actions = super().get_actions(request)
        actions.pop("delete_selected", None)
        return actions


class ReadableHistoryHelper(HistoricalRecordContextHelper):
    """The back office's list of changes between versions, written as the app's pages write them
    (colonies/history_format.py): labels and units, values the lab's way. `hidden`: fields left out."""

    def __init__(self, model, historical_record, *, hidden=frozenset()):
        super().__init__(model, historical_record)
        self.hidden = hidden

    def context_for_delta_changes(self, delta):
        # The library gives related rows as objects here (prefetched with the versions).
        # The library's own preparation turns many-to-many rows into the related objects.
        return [{"field": c.label, "old": conditional_escape(c.old), "new": conditional_escape(c.new)}
                for c in (history_format.change(self.model, ch.field, self.prepare_delta_change_value(ch, ch.old),
                                                self.prepare_delta_change_value(ch, ch.new))
                          for ch in delta.changes if ch.field not in self.hidden and ch.field != "flags")]


class HistoryAdmin(NoDeleteMixin, SimpleHistoryAdmin):
    """Base of every back-office page with a history: read the versions, never revert to one."""

    object_history_list_template = "admin/vermilog_history_list.html"

    def get_historical_record_context_helper(self, request, historical_record):
        return ReadableHistoryHelper(self.model, historical_record)

    def revert_disabled(self, request, obj=None):
        return True

    def history_form_view(self, request, object_id, version_id, extra_context=None):
        # The library's form saves a past version as the current one on POST, for anyone who may
        # view the model, with no reason and none of the app's checks; so it is refused for all.
        raise PermissionDenied(NO_REVERT)


class ReasonAdmin(HistoryAdmin):
    """Reference data edited here: a reason on every save, saved by services.save_reference."""

    form = ReasonAdminForm

    def save_model(self, request, obj, form, change):
        """Nothing yet: the row is saved with its inline rows in save_related, in one service call."""

    def save_related(self, request, form, formsets, change):
        rows = [row for formset in formsets for row in formset.save(commit=False)]
        services.save_reference(user=request.user, obj=form.instance, rows=rows,
                                reason=form.cleaned_data["change_reason"])
        form.save_m2m()
        for formset in formsets:
            formset.save_m2m()


class CareTargetInline(NoDeleteMixin, admin.TabularInline):
    model = CareTarget
    form = CareTargetForm  # the app's form: physical bounds and low <= high, errors naming the value
    extra = 0


class TankTargetInline(NoDeleteMixin, admin.TabularInline):
    model = TankTarget
    form = TankTargetForm
    extra = 0


class MeasurementPlanInline(NoDeleteMixin, admin.TabularInline):
    model = MeasurementPlan
    form = MeasurementPlanForm  # the app's form: the days / weekday each cadence needs, errors naming the field
    extra = 0


class TankMeasurementPlanInline(NoDeleteMixin, admin.TabularInline):
    model = TankMeasurementPlan
    form = TankMeasurementPlanForm
    extra = 0


@admin.register(Species)
class SpeciesAdmin(ReasonAdmin):
    list_display = ["scientific_name", "common_name", "habitat", "check_interval_hours", "max_density_per_l",
                    "default_food"]
    list_filter = ["habitat"]
    search_fields = ["scientific_name", "common_name"]
    inlines = [CareTargetInline, MeasurementPlanInline]


@admin.register(Room)
class RoomAdmin(ReasonAdmin):
    list_display = ["code", "name"]
    search_fields = ["code", "name"]


class TankAdminForm(ReasonAdminForm):
    class Meta:
        model = Tank
        fields = "__all__"

    def clean_founded_from(self):
        """A culture line runs forward in time: a tank cannot be founded from itself or from its descendants."""
        parents = self.cleaned_data.get("founded_from")
        if not parents or self.instance.pk is None:
            return parents
        descendants, frontier = {self.instance.pk}, {self.instance.pk}
        while frontier:  # the lineage is small (tens of tanks): walk it level by level
            frontier = set(Tank.founded_from.through.objects.filter(to_tank_id__in=frontier)
                           .values_list("from_tank_id", flat=True)) - descendants
            descendants |= frontier
        loops = [t.code for t in parents if t.pk in descendants]
        if loops:
            raise forms.ValidationError(
                f"Founded from: {', '.join(loops)} is this tank or was founded from it; "
                "a tank can only be founded from other, earlier lines.")
        return parents


@admin.register(Tank)
class TankAdmin(ReasonAdmin):
    form = TankAdminForm
    list_display = ["code", "room", "position", "species", "status", "volume_l", "system", "started_on"]
    list_filter = ["status", "room", "species", "system"]
    search_fields = ["code", "position", "notes", "substrate"]
    filter_horizontal = ["founded_from"]
    inlines = [TankTargetInline, TankMeasurementPlanInline]


class RecordAdmin(HistoryAdmin):
    """Husbandry records are read here; they are entered and corrected in the app's own screens."""

    # A date filter, not date_hierarchy: the hierarchy's year links cost a DISTINCT over every row of the table
    # (1.7 s of the checks list's 1.8 s at 436,000 checks on SQLite); this filter runs no query of its own.
    list_filter = [("observed_at", admin.DateFieldListFilter), "tank__room", ("voided_at", admin.EmptyFieldListFilter)]
    search_fields = ["tank__code", "note"]
    show_full_result_count = False  # one COUNT(*) of the whole table per page is enough
    list_select_related = ["tank", "recorded_by"]

    def has_change_permission(self, request, obj=None):
        return False

    def has_add_permission(self, request):
        return False


@admin.register(Check)
class CheckAdmin(RecordAdmin):
    list_display = ["tank", "observed_at", "recorded_by", "temp_c", "ph", "do_mg_l", "dead_removed", "voided_at"]


@admin.register(Feeding)
class FeedingAdmin(RecordAdmin):
    list_display = ["tank", "observed_at", "food", "amount", "unit", "voided_at"]


@admin.register(WaterChange)
class WaterChangeAdmin(RecordAdmin):
    list_display = ["tank", "observed_at", "percent", "litres", "voided_at"]


@admin.register(Census)
class CensusAdmin(RecordAdmin):
    list_display = ["tank", "observed_at", "method", "estimate", "estimate_lower", "estimate_upper", "voided_at"]


@admin.register(DeadRemoval)
class DeadRemovalAdmin(RecordAdmin):
    list_display = ["tank", "observed_at", "count", "recorded_by", "voided_at"]


class SplitPartInline(NoDeleteMixin, admin.TabularInline):
    model = SplitPart
    extra = 0
    can_delete = False

    def has_change_permission(self, request, obj=None):
        return False

    def has_add_permission(self, request, obj=None):
        return False


@admin.register(Split)
class SplitAdmin(HistoryAdmin):
    list_display = ["source", "split_at", "source_before", "stayed", "recorded_by", "voided_at"]
    list_filter = ["source__room", ("voided_at", admin.EmptyFieldListFilter)]
    search_fields = ["source__code", "note"]
    date_hierarchy = "split_at"
    inlines = [SplitPartInline]

    def has_change_permission(self, request, obj=None):
        return False

    def has_add_permission(self, request):
        return False


@admin.register(Deviation)
class DeviationAdmin(HistoryAdmin):
    """Read-only here: deviations are opened by rules and closed in the app, with a corrective action."""

    list_display = ["tank", "rule", "parameter", "severity", "status", "opened_at", "closed_at"]
    list_filter = ["status", "rule", "severity", "tank__room"]
    search_fields = ["tank__code", "summary", "corrective_action"]
    date_hierarchy = "opened_at"

    def has_change_permission(self, request, obj=None):
        return False

    def has_add_permission(self, request):
        return False


# Users and role groups are deactivated or renamed, never deleted: a deleted user would blank the
# authorship of every history row they made, a deleted group would silently take the role from its
# members. colonies/integrity.py refuses the delete on every other route too.
admin.site.unregister(User)
admin.site.unregister(Group)


@admin.register(User)
class AccountAdmin(NoDeleteMixin, UserAdmin):
    pass


@admin.register(Group)
class RoleGroupAdmin(NoDeleteMixin, GroupAdmin):
    pass


@admin.register(Signature)
class SignatureAdmin(NoDeleteMixin, admin.ModelAdmin):
    """Signatures are read here, never added, changed or deleted (they are made by signing in the app)."""

    list_display = ["signed_at", "signer_name", "meaning", "content_type", "object_id", "content_sha256"]
    list_filter = ["meaning", "content_type"]
    search_fields = ["signer_name", "signer_username", "content_sha256"]
    date_hierarchy = "signed_at"

    def has_add_permission(self, request):
        return False

    def has_change_permission(self, request, obj=None):
        return False
