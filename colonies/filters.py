import django_filters
from django import forms

from .models import Check, Deviation, Room, Species, Tank


class TankFilter(django_filters.FilterSet):
    code = django_filters.CharFilter(lookup_expr="icontains", label="Code contains")
    room = django_filters.ModelChoiceFilter(queryset=Room.objects.all())
    species = django_filters.ModelChoiceFilter(queryset=Species.objects.all())
    status = django_filters.ChoiceFilter(choices=Tank.Status.choices)
    ordering = django_filters.OrderingFilter(fields=(("code", "code"), ("room__code", "room"), ("started_on", "started")))

    class Meta:
        model = Tank
        fields = ["code", "room", "species", "status"]


class CheckFilter(django_filters.FilterSet):
    room = django_filters.ModelChoiceFilter(field_name="tank__room", queryset=Room.objects.all())
    tank = django_filters.CharFilter(field_name="tank__code", lookup_expr="iexact")
    start = django_filters.DateFilter(field_name="observed_at", lookup_expr="date__gte", label="From",
                                      widget=forms.DateInput(attrs={"type": "date"}))
    end = django_filters.DateFilter(field_name="observed_at", lookup_expr="date__lte", label="To",
                                    widget=forms.DateInput(attrs={"type": "date"}))
    include_voided = django_filters.BooleanFilter(method="filter_voided", label="Include voided",
                                                  widget=forms.CheckboxInput)

    class Meta:
        model = Check
        fields = ["room", "tank", "start", "end"]

    @property
    def qs(self):
        qs = super().qs
        if not self.form.cleaned_data.get("include_voided"):
            qs = qs.filter(voided_at__isnull=True)
        return qs

    def filter_voided(self, queryset, name, value):
        return queryset


class DeviationFilter(django_filters.FilterSet):
    room = django_filters.ModelChoiceFilter(field_name="tank__room", queryset=Room.objects.all())
    tank = django_filters.CharFilter(field_name="tank__code", lookup_expr="iexact")
    rule = django_filters.ChoiceFilter(choices=Deviation.Rule.choices)
    severity = django_filters.ChoiceFilter(choices=Deviation.Severity.choices)
    status = django_filters.ChoiceFilter(choices=Deviation.Status.choices, empty_label="Any status")
    unresolved = django_filters.BooleanFilter(method="filter_unresolved", label="Unresolved only",
                                              widget=forms.CheckboxInput)
    start = django_filters.DateFilter(field_name="opened_at", lookup_expr="date__gte", label="Opened from",
                                      widget=forms.DateInput(attrs={"type": "date"}))
    end = django_filters.DateFilter(field_name="opened_at", lookup_expr="date__lte", label="Opened to",
                                    widget=forms.DateInput(attrs={"type": "date"}))
    ordering = django_filters.OrderingFilter(
        fields=(("opened_at", "opened"), ("severity", "severity"), ("last_seen_at", "last_seen"), ("tank__code", "tank"))
    )

    class Meta:
        model = Deviation
        fields = ["room", "tank", "rule", "severity", "status", "start", "end"]

    def filter_unresolved(self, queryset, name, value):
        return queryset.unresolved() if value else queryset
