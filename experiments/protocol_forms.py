"""Forms of the protocol pages: the terms, the allowances (one form each), amend, approve and suspend.

They validate only; experiments/protocols.py writes (each amendment as a new version).
"""
from django import forms

from colonies.forms import reason_field
from colonies.validators import NamedErrorsMixin

from .forms import DATE
from .models import ALLOWANCE_FIELDS, Allowance, Protocol, Stimulus

# max_animals_total (the number of animals approved over the protocol's life) is kept on the protocol row and
# its history, not in the versions: it limits no single trial; the period report compares use against it.
TERM_FIELDS = ["title", "approver", "starts_on", "expires_on", "max_animals_per_trial", "max_animals_total",
               "max_exposures_per_group", "min_rest_hours", "max_cumulative_dose_mj_cm2", "notes"]
NEW_ALLOWANCE_FORMS = 2  # empty allowance forms offered on the new and amend pages


class ProtocolForm(NamedErrorsMixin, forms.ModelForm):
    """The terms. The reference names the protocol and is typed once, when it is entered."""

    class Meta:
        model = Protocol
        fields = ["reference", *TERM_FIELDS]
        widgets = {"starts_on": DATE, "expires_on": DATE, "notes": forms.Textarea(attrs={"rows": 3})}
        labels = {"approver": "Approval body and approver", "max_animals_per_trial": "Most animals per trial",
                  "max_exposures_per_group": "Most exposures per dish",
                  "min_rest_hours": "Least rest between exposures, h",
                  "max_cumulative_dose_mj_cm2": "Most cumulative light dose per dish, mJ/cm²"}

    def __init__(self, *args, amending: bool = False, **kwargs):
        super().__init__(*args, **kwargs)
        if amending:
            del self.fields["reference"]


class AllowanceForm(NamedErrorsMixin, forms.ModelForm):
    class Meta:
        model = Allowance
        fields = ALLOWANCE_FIELDS
        widgets = {"notes": forms.Textarea(attrs={"rows": 2})}
        labels = {"kind": "Stimulus type", "wavelength_min_nm": "Shortest wavelength, nm",
                  "wavelength_max_nm": "Longest wavelength, nm", "max_irradiance_mw_cm2": "Most irradiance, mW/cm²",
                  "max_duration_s": "Longest exposure, s", "max_dose_mj_cm2": "Most dose per exposure, mJ/cm²",
                  "max_voltage_v": "Most voltage, V", "max_field_v_cm": "Most field strength, V/cm",
                  "max_pulse_width_ms": "Longest pulse, ms", "max_pulse_count": "Most pulses",
                  "max_temp_step_c": "Largest temperature step, °C", "max_temp_rate_c_min": "Fastest ramp, °C/min",
                  "max_concentration_um": "Highest concentration, µM", "substance": "Substance (chemical)",
                  "notes": "Notes (mechanical: what is approved)"}

    def __init__(self, *args, **kwargs):
        super().__init__(*args, **kwargs)
        self.fields["kind"].choices = [("", "—")] + [c for c in Stimulus.choices if c[0] != Stimulus.NONE]
        if self.instance.pk:  # an allowance's type and substance name it; amend its maxima instead
            for name in ("kind", "substance"):
                self.fields[name].disabled = True

    def values(self) -> dict | None:
        """The allowance as the service takes it, or None for an empty extra form."""
        if not self.instance.pk and not self.has_changed():
            return None
        return {name: self.cleaned_data.get(name) if name in self.cleaned_data else getattr(self.instance, name)
                for name in ALLOWANCE_FIELDS}


AllowanceFormSet = forms.modelformset_factory(Allowance, form=AllowanceForm, extra=NEW_ALLOWANCE_FORMS,
                                              can_delete=False)


def allowance_formset(data=None, protocol: Protocol | None = None):
    queryset = protocol.allowances.all() if protocol else Allowance.objects.none()
    return AllowanceFormSet(data, queryset=queryset, prefix="allowance")


def allowance_values(formset) -> list[dict]:
    return [v for v in (f.values() for f in formset.forms) if v is not None]


class AmendForm(NamedErrorsMixin, forms.Form):
    reason = reason_field("Reason", help_text="What the amendment changes and why; kept with the version.",
                          error_messages={"required": "Reason: say what the amendment changes and why."})
    approval_reference = forms.CharField(
        max_length=60, required=False, label="Approval body's reference for this amendment",
        help_text="e.g. the letter or minute that approved it; optional for a draft.")


class ApproveForm(NamedErrorsMixin, forms.Form):
    approved_on = forms.DateField(widget=DATE, label="Approved on",
                                  help_text="The date of the approval body's decision.")


class SuspendForm(NamedErrorsMixin, forms.Form):
    reason = reason_field("Reason", help_text="Why the protocol is suspended; kept in its history.",
                          error_messages={"required": "Reason: say why the protocol is suspended."})
