"""The period report's choice of period and scope."""
from datetime import timedelta

from django import forms
from django.core.exceptions import ValidationError
from django.utils import timezone

from colonies.models import Room
from colonies.validators import NamedErrorsMixin, check_date

from ..models import PeriodReport, Protocol, Study
from .queries import Period

MAX_PERIOD_DAYS = 3 * 366  # three years: more is several reports (and several hundred thousand checks)


class PeriodReportForm(NamedErrorsMixin, forms.Form):
    period_from = forms.DateField(label="From", widget=forms.DateInput(attrs={"type": "date"}))
    period_to = forms.DateField(label="To (included)", widget=forms.DateInput(attrs={"type": "date"}))
    scope = forms.ChoiceField(label="Scope", choices=PeriodReport.Scope.choices, initial=PeriodReport.Scope.FACILITY)
    room = forms.ModelChoiceField(label="Room", queryset=Room.objects.order_by("name"), required=False)
    protocol = forms.ModelChoiceField(label="Protocol", queryset=Protocol.objects.order_by("reference"),
                                      to_field_name="reference", required=False)
    study = forms.ModelChoiceField(label="Study", queryset=Study.objects.order_by("code"), to_field_name="code",
                                   required=False)

    def clean_period_from(self):
        return check_date("From", self.cleaned_data["period_from"])

    def clean_period_to(self):
        return check_date("To", self.cleaned_data["period_to"])

    def clean(self):
        data = super().clean()
        first, last = data.get("period_from"), data.get("period_to")
        if first and last and not first <= last <= first + timedelta(days=MAX_PERIOD_DAYS):
            self.add_error("period_to", ValidationError(
                f"To: {last:%Y-%m-%d} is outside the allowed range {first:%Y-%m-%d} (the From date) to "
                f"{first + timedelta(days=MAX_PERIOD_DAYS):%Y-%m-%d} ({MAX_PERIOD_DAYS} days)."))
        scope = data.get("scope")
        if scope in ("room", "protocol", "study") and not data.get(scope):
            self.add_error(scope, f"{self.fields[scope].label}: choose one for a {scope} report.")
        return data

    def period(self) -> Period:
        return Period(self.cleaned_data["period_from"], self.cleaned_data["period_to"])

    def scope_key(self) -> str:
        scope = self.cleaned_data["scope"]
        chosen = self.cleaned_data.get(scope)
        return {"room": lambda r: str(r.pk), "protocol": lambda p: p.reference,
                "study": lambda s: s.code}.get(scope, lambda _: "")(chosen)


def default_initial() -> dict:
    """Last calendar month: the period most reports cover."""
    first_of_month = timezone.localdate().replace(day=1)
    last = first_of_month - timedelta(days=1)
    return {"period_from": last.replace(day=1), "period_to": last, "scope": PeriodReport.Scope.FACILITY}
