"""Protocols managed in the app: create, amend (a new version each time), approve and suspend.

Only managers write here. Every amendment is a new `ProtocolVersion` (number one more than the
newest, taken under a row lock on the protocol, so two managers amending at once get distinct
numbers: the second waits for the first and then numbers after it); the protocol row keeps a copy
of the newest terms. Trials record the version in force when they ran (`version_at`), so limits
checked and shown for a trial never change with a later amendment.

Approving and suspending are signed (colonies/signatures.py); so is an amendment of a protocol that
carries a signature: a signed record is not changed without a new signature.
"""
from datetime import datetime, time, timedelta

from django.core.exceptions import PermissionDenied, ValidationError
from django.db import transaction
from django.db.models import Max
from django.utils import timezone

from colonies.models import Signature
from colonies.roles import MANAGER, has_role
from colonies.signatures import sign
from vermilog.lab_time import lab_date

from .models import ALLOWANCE_FIELDS, VERSION_FIELDS, Allowance, Protocol, ProtocolVersion, allowance_values

EXPIRY_NOTICE_DAYS = 30  # Today lists approved protocols that expire within this many days


class Refused(Exception):
    """The change is not possible in the protocol's present state; the message says why."""


def _require_manager(user, what: str) -> None:
    if not has_role(user, MANAGER):
        raise PermissionDenied(f"Only a manager may {what} a protocol.")


def _save(obj, user, reason: str):
    obj._history_user = user
    obj._change_reason = reason
    obj.save()
    return obj


def _snapshot(protocol: Protocol, *, user, at: datetime, reason: str, approval_reference: str = "") -> ProtocolVersion:
    """A new version from the protocol row and its allowances as saved; call with the protocol row locked."""
    newest = protocol.versions.aggregate(n=Max("number"))["n"] or 0
    allowances = [allowance_values(a) for a in protocol.allowances.order_by("kind", "substance", "pk")]
    return ProtocolVersion.objects.create(
        protocol=protocol, number=newest + 1, effective_from=at, recorded_by=user, recorded_at=timezone.now(),
        reason=reason, approval_reference=approval_reference, allowances=allowances,
        **{name: getattr(protocol, name) for name in VERSION_FIELDS})


def _apply(protocol: Protocol, values: dict, allowances: list[dict], user, reason: str) -> None:
    """Write the protocol's fields and its allowances (matched by kind and substance; new ones added)."""
    for name, value in values.items():
        setattr(protocol, name, value)
    protocol.full_clean()
    _save(protocol, user, reason)
    existing = {(a.kind, a.substance.strip().lower()): a for a in protocol.allowances.all()}
    for entry in allowances:
        key = (entry["kind"], (entry.get("substance") or "").strip().lower())
        row = existing.get(key) or Allowance(protocol=protocol)
        for name in ALLOWANCE_FIELDS:
            if name in entry:
                setattr(row, name, entry[name])
        row.full_clean()
        _save(row, user, reason)


def create(*, user, values: dict, allowances: list[dict], reason: str = "") -> Protocol:
    """A new protocol in draft, with its version 1."""
    _require_manager(user, "create")
    with transaction.atomic():
        protocol = Protocol(status=Protocol.Status.DRAFT)
        _apply(protocol, values, allowances, user, reason or "Protocol entered")
        _snapshot(protocol, user=user, at=timezone.now(), reason=reason or "Protocol entered",
                  approval_reference=values.get("reference", ""))
    return protocol


def amend(*, user, protocol: Protocol, values: dict, allowances: list[dict], reason: str,
          approval_reference: str = "", password: str | None = None, now: datetime | None = None) -> ProtocolVersion:
    """Change the terms from now on: a new version. A signed protocol needs the manager's signature."""
    _require_manager(user, "amend")
    reason = (reason or "").strip()
    if not reason:
        raise ValidationError({"reason": "Reason: say what the amendment changes and why."})
    now = now or timezone.now()
    with transaction.atomic():
        protocol = Protocol.objects.select_for_update().get(pk=protocol.pk)  # serialises version numbers
        if protocol.status == Protocol.Status.CLOSED:
            raise Refused(f"Protocol {protocol.reference} is closed; it cannot be amended.")
        values = {k: v for k, v in values.items() if k != "reference"}  # the reference names the protocol
        _first_version(protocol, now)  # the terms before this amendment, if never written
        _apply(protocol, values, allowances, user, f"Amended: {reason}")
        version = _snapshot(protocol, user=user, at=now, reason=reason, approval_reference=approval_reference)
        if protocol.signatures.exists():
            sign(user=user, password=password or "", meaning=Signature.Meaning.AMENDED, obj=protocol)
    return version


def approve(*, user, protocol: Protocol, password: str, approved_on=None) -> Protocol:
    _require_manager(user, "approve")
    with transaction.atomic():
        protocol = Protocol.objects.select_for_update().get(pk=protocol.pk)
        if protocol.status not in (Protocol.Status.DRAFT, Protocol.Status.SUSPENDED):
            raise Refused(f"Protocol {protocol.reference} is {protocol.get_status_display().lower()}; only a draft or "
                          "suspended protocol can be approved.")
        protocol.status = Protocol.Status.APPROVED
        protocol.approved_on = approved_on or protocol.approved_on or timezone.localdate()
        protocol.full_clean()
        _save(protocol, user, "Approved (signed)")
        _first_version(protocol, timezone.now())
        sign(user=user, password=password, meaning=Signature.Meaning.APPROVED, obj=protocol)
    return protocol


def suspend(*, user, protocol: Protocol, password: str, reason: str) -> Protocol:
    _require_manager(user, "suspend")
    reason = (reason or "").strip()
    if not reason:
        raise ValidationError({"reason": "Reason: say why the protocol is suspended."})
    with transaction.atomic():
        protocol = Protocol.objects.select_for_update().get(pk=protocol.pk)
        if protocol.status != Protocol.Status.APPROVED:
            raise Refused(f"Protocol {protocol.reference} is {protocol.get_status_display().lower()}; only an "
                          "approved protocol can be suspended.")
        protocol.status = Protocol.Status.SUSPENDED
        _save(protocol, user, f"Suspended (signed): {reason}")
        sign(user=user, password=password, meaning=Signature.Meaning.SUSPENDED, obj=protocol)
    return protocol


def version_at(protocol: Protocol, at: datetime) -> ProtocolVersion:
    """The version in force at `at` (the newest that took effect by then; the first for an earlier time).

    A protocol saved without a version (by a fixture, or a script outside these services) gets
    version 1 from its present terms here, under its row lock, effective from the start of its first
    day (or `at`, if earlier).
    """
    found = protocol.versions.filter(effective_from__lte=at).order_by("-number").first()
    if found is None:
        found = protocol.versions.order_by("number").first()
    if found is not None:
        return found
    with transaction.atomic():
        return _first_version(Protocol.objects.select_for_update().get(pk=protocol.pk), at)


def _first_version(locked: Protocol, at: datetime) -> ProtocolVersion:
    """Version 1 of a protocol saved without one, from its terms as saved, in force from the start of its first
    day (or `at`, if earlier); the existing first version otherwise. Call with the protocol row locked."""
    found = locked.versions.order_by("number").first()
    if found is None:
        start = timezone.make_aware(datetime.combine(locked.starts_on, time.min))
        found = _snapshot(locked, user=None, at=min(start, at), reason="The terms as they stood when first used")
    return found


def expiring(today, days: int = EXPIRY_NOTICE_DAYS) -> list[Protocol]:
    """Approved protocols whose last day is within `days` of `today` (one query)."""
    return list(Protocol.objects.filter(status=Protocol.Status.APPROVED, expires_on__gte=today,
                                        expires_on__lte=today + timedelta(days=days))
                .order_by("expires_on", "reference"))



def today_notices(today) -> list:
    """Today's notices (colonies/today_hooks.py): approved protocols expiring within EXPIRY_NOTICE_DAYS."""
    from colonies.today_hooks import Notice

    out = []
    for p in expiring(today):
        days = (p.expires_on - today).days
        when = "today" if days == 0 else f"in {days} day{'s' if days != 1 else ''}"
        out.append(Notice(f"Protocol {p.reference} expires {when} ({lab_date(p.expires_on)})", p.get_absolute_url(),
                          p.title))
    return out
