import django_filters
from django import forms

from colonies.models import Tank
from colonies.widgets import QuickSelect

from . import blinding
from .models import Protocol, Stimulus, Trial


class LedgerFilter(django_filters.FilterSet):
    """The exposure ledger: every exposure (trial) by protocol, cohort, tank, stimulus and date."""

    protocol = django_filters.ModelChoiceFilter(queryset=Protocol.objects.all())
    cohort = django_filters.NumberFilter(field_name="cohort_id", label="Cohort number",
                                         widget=forms.NumberInput(attrs={"min": 1}))
    # Every tank of the facility (400+): options written by QuickSelect from plain (pk, code) rows read with
    # the filter's other work (see `form`), not 400 Tank instances and option templates during the page's
    # template (ledger CPU 63 -> see commit). Choosing a tank still validates against this queryset.
    tank = django_filters.ModelChoiceFilter(field_name="cohort__origin_tank", queryset=Tank.objects.all(),
                                            label="Origin tank", widget=QuickSelect)
    kind = django_filters.ChoiceFilter(choices=Stimulus.choices, label="Stimulus", method="filter_kind")
    start = django_filters.DateFilter(field_name="run_at", lookup_expr="date__gte", label="From",
                                      widget=forms.DateInput(attrs={"type": "date"}))
    end = django_filters.DateFilter(field_name="run_at", lookup_expr="date__lte", label="To",
                                    widget=forms.DateInput(attrs={"type": "date"}))
    overridden = django_filters.BooleanFilter(method="filter_overridden", label="Overrides only",
                                              widget=forms.CheckboxInput)
    active_cohorts = django_filters.BooleanFilter(method="filter_active", label="Active cohorts only",
                                                  widget=forms.CheckboxInput)

    class Meta:
        model = Trial
        fields = ["protocol", "cohort", "tank", "kind", "start", "end"]

    @property
    def form(self):
        if not hasattr(self, "_form"):
            form = super().form
            field = form.fields["tank"]
            # What the widget lists (str(tank) is its code); choosing still validates against the field's queryset.
            field.widget.choices = [("", field.empty_label), *field.queryset.values_list("pk", "code")]
        return self._form

    def filter_kind(self, queryset, name, value):
        """By stimulus, but never matching trials whose condition is hidden from this user: a filter
        that picked them out would reveal the condition of a blinded study."""
        if not value:
            return queryset
        return queryset.filter(blinding.visible_q(getattr(self.request, "user", None)), kind=value)

    def filter_overridden(self, queryset, name, value):
        return queryset.filter(override__isnull=False) if value else queryset

    def filter_active(self, queryset, name, value):
        return queryset.filter(cohort__end="") if value else queryset

