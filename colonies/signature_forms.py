"""The signing fields every signed action shows: the meaning (fixed by the action, shown) and the password."""
from django import forms
from django.core.exceptions import ValidationError


class SigningForm(forms.Form):
    """Add to (or combine with) an action's form: `SigningForm(request.POST or None, meaning=...)`.

    The password is checked by colonies.signatures.sign inside the action's transaction; a refusal
    comes back as ValidationError({"password": ...}), which `refused()` puts on this form.
    """

    password = forms.CharField(
        label="Your password", strip=False,
        widget=forms.PasswordInput(attrs={"autocomplete": "current-password"}),
        help_text="Re-enter your password to sign. Your name, the time and the meaning are kept with the record.",
        error_messages={"required": "Password: re-enter your password to sign; nothing was signed or saved."},
    )

    def __init__(self, *args, meaning: str, **kwargs):
        super().__init__(*args, **kwargs)
        self.meaning = meaning  # a Signature.Meaning; shown, not chosen

    @property
    def meaning_label(self) -> str:
        from .models import Signature

        return Signature.Meaning(self.meaning).label

    def refused(self, error: ValidationError) -> None:
        """Show a refusal of colonies.signatures.sign on this form's fields."""
        for field, messages in error.message_dict.items():
            self.add_error("password" if field == "password" else None, messages)
