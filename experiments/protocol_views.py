"""Protocol pages: the list (researchers and managers), a protocol's page, and the managers' new, amend,
approve and suspend (experiments/protocols.py writes; approving, suspending and amending a signed
protocol are signed)."""
from django.contrib import messages
from django.core.exceptions import ValidationError
from django.shortcuts import get_object_or_404, redirect, render
from django.utils import timezone
from django.views.decorators.http import require_GET, require_http_methods, require_POST

from colonies.idempotency import once_per_submission
from colonies.models import Signature
from colonies.roles import MANAGER, RESEARCHER, TECHNICIAN, has_role, role_required
from colonies.signature_forms import SigningForm
from colonies.signatures import signatures_for

from . import protocols
from .models import Protocol
from .protocol_forms import (TERM_FIELDS, AmendForm, ApproveForm, ProtocolForm, SuspendForm, allowance_formset,
                             allowance_values)


def _get_protocol(pk) -> Protocol:
    return get_object_or_404(Protocol.objects.prefetch_related("allowances", "signatures"), pk=pk)


def _refused(request, error: ValidationError, form, signing) -> None:
    """Put a service's refusal on the forms: the password on the signing form, the rest on the main form."""
    if signing is not None and hasattr(error, "error_dict") and "password" in error.error_dict:
        signing.refused(error)
    else:
        form.add_error(None, error.messages)


@require_GET
@role_required(RESEARCHER)
def protocol_list(request):
    """Every protocol with its status, expiry and limits: usable ones first; drafts only for managers."""
    today = timezone.localdate()
    qs = Protocol.objects.prefetch_related("allowances").order_by("expires_on", "reference")
    if not has_role(request.user, MANAGER):
        qs = qs.exclude(status=Protocol.Status.DRAFT)
    rows = [{"protocol": p, "problem": p.problem(today), "days_left": (p.expires_on - today).days} for p in qs]
    rows.sort(key=lambda r: (bool(r["problem"]), r["protocol"].expires_on))
    return render(request, "experiments/protocol_list.html",
                  {"rows": rows, "today": today, "notice_days": protocols.EXPIRY_NOTICE_DAYS,
                   "is_manager": has_role(request.user, MANAGER)})


def _detail(request, protocol, approve=None, suspend=None, status=200):
    versions = list(protocol.versions.select_related("recorded_by").order_by("-number"))
    ctx = {"protocol": protocol, "problem": protocol.problem(timezone.localdate()), "cautions": protocol.cautions(),
           "studies": protocol.studies.select_related("owner"),
           "cohorts": protocol.cohorts.select_related("origin_tank")[:50], "versions": versions,
           "signatures": signatures_for(protocol), "is_manager": has_role(request.user, MANAGER),
           "approve": approve or (ApproveForm(initial={"approved_on": protocol.approved_on or timezone.localdate()}),
                                  SigningForm(meaning=Signature.Meaning.APPROVED)),
           "suspend": suspend or (SuspendForm(), SigningForm(meaning=Signature.Meaning.SUSPENDED))}
    return render(request, "experiments/protocol_detail.html", ctx, status=status)


@require_GET
@role_required(TECHNICIAN, RESEARCHER)
def protocol_detail(request, pk):
    return _detail(request, _get_protocol(pk))


@require_http_methods(["GET", "POST"])
@role_required(MANAGER)
@once_per_submission
def protocol_new(request):
    form = ProtocolForm(request.POST or None)
    allowances = allowance_formset(request.POST or None)
    if request.method == "POST" and form.is_valid() and allowances.is_valid():
        try:
            protocol = protocols.create(user=request.user, values=form.cleaned_data,
                                        allowances=allowance_values(allowances))
        except ValidationError as error:
            _refused(request, error, form, None)
        else:
            messages.success(request, f"Protocol {protocol.reference} entered as a draft (version 1). "
                                      "Approve it when the approval body has.")
            return redirect(protocol)
    return render(request, "experiments/protocol_form.html", {"form": form, "allowances": allowances, "protocol": None},
                  status=400 if request.method == "POST" else 200)


@require_http_methods(["GET", "POST"])
@role_required(MANAGER)
@once_per_submission
def protocol_amend(request, pk):
    protocol = _get_protocol(pk)
    signed = bool(protocol.signatures.all())
    form = ProtocolForm(request.POST or None, instance=protocol, amending=True)
    allowances = allowance_formset(request.POST or None, protocol)
    amend = AmendForm(request.POST or None)
    signing = SigningForm(request.POST or None, meaning=Signature.Meaning.AMENDED) if signed else None
    forms_ok = request.method == "POST" and all(
        f.is_valid() for f in (form, allowances, amend, *([signing] if signing else [])))
    if forms_ok:
        try:
            version = protocols.amend(
                user=request.user, protocol=protocol, values={k: form.cleaned_data[k] for k in TERM_FIELDS},
                allowances=allowance_values(allowances), reason=amend.cleaned_data["reason"],
                approval_reference=amend.cleaned_data["approval_reference"],
                password=signing.cleaned_data["password"] if signing else None)
        except ValidationError as error:
            _refused(request, error, form, signing)
        except protocols.Refused as refusal:
            form.add_error(None, str(refusal))
        else:
            messages.success(request, f"Protocol {protocol.reference} amended: version {version.number} applies to "
                                      "trials from now on; earlier trials keep the terms they ran under.")
            return redirect(protocol)
    ctx = {"form": form, "allowances": allowances, "amend": amend, "signing": signing,
           "protocol": Protocol.objects.get(pk=protocol.pk)}  # the page's title shows the saved protocol
    return render(request, "experiments/protocol_form.html", ctx, status=400 if request.method == "POST" else 200)


@require_POST
@role_required(MANAGER)
@once_per_submission
def protocol_approve(request, pk):
    protocol = _get_protocol(pk)
    form, signing = ApproveForm(request.POST), SigningForm(request.POST, meaning=Signature.Meaning.APPROVED)
    if form.is_valid() and signing.is_valid():
        try:
            protocols.approve(user=request.user, protocol=protocol, password=signing.cleaned_data["password"],
                              approved_on=form.cleaned_data["approved_on"])
        except ValidationError as error:
            _refused(request, error, form, signing)
        except protocols.Refused as refusal:
            form.add_error(None, str(refusal))
        else:
            messages.success(request, f"Protocol {protocol.reference} approved and signed.")
            return redirect(protocol)
    return _detail(request, _get_protocol(pk), approve=(form, signing), status=400)


@require_POST
@role_required(MANAGER)
@once_per_submission
def protocol_suspend(request, pk):
    protocol = _get_protocol(pk)
    form, signing = SuspendForm(request.POST), SigningForm(request.POST, meaning=Signature.Meaning.SUSPENDED)
    if form.is_valid() and signing.is_valid():
        try:
            protocols.suspend(user=request.user, protocol=protocol, password=signing.cleaned_data["password"],
                              reason=form.cleaned_data["reason"])
        except ValidationError as error:
            _refused(request, error, form, signing)
        except protocols.Refused as refusal:
            form.add_error(None, str(refusal))
        else:
            messages.success(request, f"Protocol {protocol.reference} suspended and signed: no trials or bookings "
                                      "under it until it is approved again.")
            return redirect(protocol)
    return _detail(request, _get_protocol(pk), suspend=(form, signing), status=400)
