"""The back office for reference data. Nothing can be deleted here; every change asks for a reason."""
from django import forms
from django.contrib import admin
from simple_history.admin import SimpleHistoryAdmin

from .forms import CareTargetForm, TankTargetForm
from .models import CareTarget, Census, Check, Deviation, Feeding, Room, Species, Split, SplitPart, Tank, TankTarget, WaterChange


class ReasonAdminForm(forms.ModelForm):
    change_reason = forms.CharField(
        widget=forms.Textarea(attrs={"rows": 2}), help_text="Required: why this change? Kept in the history."
    )


class NoDeleteMixin:
    def has_delete_permission(self, request, obj=None):
        return False

    def get_actions(self, request):
        actions = super().get_actions(request)
        actions.pop("delete_selected", None)
        return actions


class ReasonAdmin(NoDeleteMixin, SimpleHistoryAdmin):
    form = ReasonAdminForm

    def save_model(self, request, obj, form, change):
        obj._change_reason = form.cleaned_data["change_reason"]
        super().save_model(request, obj, form, change)

    def save_formset(self, request, form, formset, change):
        for instance in formset.save(commit=False):
            instance._change_reason = form.cleaned_data["change_reason"]
            instance.save()
        formset.save_m2m()


class CareTargetInline(NoDeleteMixin, admin.TabularInline):
    model = CareTarget
    form = CareTargetForm  # physical bounds of the parameter, low <= high, with messages naming the field
    extra = 0


class TankTargetInline(NoDeleteMixin, admin.TabularInline):
    model = TankTarget
    form = TankTargetForm
    extra = 0


@admin.register(Species)
class SpeciesAdmin(ReasonAdmin):
    list_display = ["scientific_name", "common_name", "habitat", "check_interval_hours", "max_density_per_l"]
    list_filter = ["habitat"]
    search_fields = ["scientific_name", "common_name"]
    inlines = [CareTargetInline]


@admin.register(Room)
class RoomAdmin(ReasonAdmin):
    list_display = ["code", "name"]
    search_fields = ["code", "name"]


@admin.register(Tank)
class TankAdmin(ReasonAdmin):
    list_display = ["code", "room", "position", "species", "status", "volume_l", "system", "started_on"]
    list_filter = ["status", "room", "species", "system"]
    search_fields = ["code", "position", "notes", "substrate"]
    filter_horizontal = ["founded_from"]
    inlines = [TankTargetInline]


class RecordAdmin(NoDeleteMixin, SimpleHistoryAdmin):
    """Husbandry records are read here; they are entered and corrected in the app's own screens."""

    list_filter = ["tank__room", ("voided_at", admin.EmptyFieldListFilter)]
    search_fields = ["tank__code", "note"]
    date_hierarchy = "observed_at"

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


class SplitPartInline(NoDeleteMixin, admin.TabularInline):
    model = SplitPart
    extra = 0
    can_delete = False

    def has_change_permission(self, request, obj=None):
        return False

    def has_add_permission(self, request, obj=None):
        return False


@admin.register(Split)
class SplitAdmin(NoDeleteMixin, SimpleHistoryAdmin):
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
class DeviationAdmin(NoDeleteMixin, SimpleHistoryAdmin):
    """Read-only here: deviations are opened by rules and closed in the app, with a corrective action."""

    list_display = ["tank", "rule", "parameter", "severity", "status", "opened_at", "closed_at"]
    list_filter = ["status", "rule", "severity", "tank__room"]
    search_fields = ["tank__code", "summary", "corrective_action"]
    date_hierarchy = "opened_at"

    def has_change_permission(self, request, obj=None):
        return False

    def has_add_permission(self, request):
        return False
