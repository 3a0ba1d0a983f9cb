"""Electronic signatures: sign a record with a re-entered password; list and verify its signatures.

    sign(*, user, password, meaning, obj) -> Signature
    signatures_for(obj) -> list[SignatureView]

A signable model has `signed_content() -> dict` (plain values, dates and times allowed) and a
`signatures = GenericRelation("colonies.Signature")`. Call `sign` inside the transaction that makes
the change the person takes responsibility for, after the change is saved: a wrong password raises
ValidationError({"password": ...}) and the whole transaction (the change too) rolls back.

Repeated wrong passwords are not counted here (django-axes counts failed sign-ins, not signing);
a lockout on signing is left to the lab's procedure, as the README says.
"""
import hashlib
import json
from dataclasses import dataclass
from datetime import date, datetime, timezone as dt_timezone
from decimal import Decimal

from django.contrib.contenttypes.models import ContentType
from django.core.exceptions import PermissionDenied, ValidationError

from .models import Signature

WRONG_PASSWORD = "Password: this is not the password of {name}; nothing was signed or saved."
NO_PASSWORD = "Password: re-enter your password to sign; nothing was signed or saved."


def _plain(value):
    if isinstance(value, datetime):
        return value.astimezone(dt_timezone.utc).isoformat()  # one zone, so the text does not depend on the server's
    if isinstance(value, date):
        return value.isoformat()
    if isinstance(value, Decimal):
        return str(value)
    if isinstance(value, dict):
        return {str(k): _plain(v) for k, v in value.items()}
    if isinstance(value, (list, tuple)):
        return [_plain(v) for v in value]
    return value


def canonical(content: dict) -> str:
    """The canonical text of a record's content: JSON with sorted keys, no spaces, times in UTC."""
    return json.dumps(_plain(content), sort_keys=True, separators=(",", ":"), ensure_ascii=False, allow_nan=False)


def digest(content: dict) -> str:
    return hashlib.sha256(canonical(content).encode("utf-8")).hexdigest()


def verify_password(user, password: str) -> None:
    """Raise ValidationError on the `password` field unless `password` is this user's (21 CFR 11.200)."""
    if not user.is_authenticated or not user.is_active:
        raise PermissionDenied("Only a signed-in, active account can sign.")
    if not password:
        raise ValidationError({"password": NO_PASSWORD})
    if not user.check_password(password):
        raise ValidationError({"password": WRONG_PASSWORD.format(name=user.get_username())})


def sign(*, user, password: str, meaning: str, obj) -> Signature:
    """`user` signs `obj` with `meaning` (a Signature.Meaning); the password is checked first."""
    verify_password(user, password)
    meaning = Signature.Meaning(meaning)
    text = canonical(obj.signed_content())
    signature = Signature(content_type=ContentType.objects.get_for_model(obj), object_id=obj.pk, signer=user,
                          signer_name=user.get_full_name().strip() or user.get_username(),
                          signer_username=user.get_username(), meaning=meaning, content=text,
                          content_sha256=hashlib.sha256(text.encode("utf-8")).hexdigest())
    signature.save()
    return signature


@dataclass(frozen=True)
class SignatureView:
    """A signature as a page shows it: `current` is False when the record changed after this signing."""
    signature: Signature
    current: bool

    def __str__(self):
        return str(self.signature)


def signatures_for(obj) -> list[SignatureView]:
    """The record's signatures, oldest first, each compared with the record as it is now.

    Uses `obj.signatures` (prefetch it on lists: one query for the page); the record's content is
    hashed once. A signature stays valid for what it signed: only the newest is expected to match the
    record now, older ones are history (their `current` says whether the record is back to that state).
    """
    sigs = list(obj.signatures.all())
    if not sigs:
        return []
    now = digest(obj.signed_content())
    return [SignatureView(s, s.content_sha256 == now) for s in sigs]


def is_signed(obj) -> bool:
    return bool(signatures_for(obj))
