"""Deviation register (managers), deviation pages, acknowledge and close (technicians and managers)."""
import re
from datetime import datetime

import pandas as pd
from django import forms
from django.contrib import messages
from django.core.exceptions import PermissionDenied, ValidationError
from django.db.models import Count, F
from django.shortcuts import get_object_or_404, redirect, render
from django.utils import formats
from django.views.decorators.http import require_GET, require_http_methods, require_POST

from . import deviation_export
from .export_stream import csv_response
from .filters import DeviationFilter
from .forms import reason_field
from .history import versions_of
from .models import Deviation, Signature
from .signature_forms import SigningForm
from .signatures import signatures_for
from .idempotency import once_per_submission
from .roles import MANAGER, RESEARCHER, TECHNICIAN, role_required


class CloseForm(forms.Form):
    corrective_action = reason_field(
        "Corrective action", widget=forms.Textarea(attrs={"rows": 3}),
        help_text="What was done about it, and what was checked afterwards. Required to close.",
        error_messages={"required": "Corrective action: describe what was done before closing."},
    )

    def clean_corrective_action(self):
        text = self.cleaned_data["corrective_action"].strip()
        if not text:
            raise forms.ValidationError("Corrective action: describe what was done before closing.")
        return text


def _evidence_rows(dev) -> list[dict]:
    rows = []
    for e in reversed(dev.evidence):
        details = [(k, _shown(v)) for k, v in e.items() if k not in ("ref", "at", "seen", "check")]
        rows.append({"when": _shown(e.get("at") or e.get("seen") or ""), "details": details, "check": e.get("check")})
    return rows


def _shown(value):
    """Evidence keeps local times as 'YYYY-MM-DD HH:MM' (deviations._local); shown the lab's way."""
    if isinstance(value, str) and EVIDENCE_TIME.fullmatch(value):
        return formats.date_format(datetime.strptime(value, "%Y-%m-%d %H:%M"), "DATETIME_FORMAT")
    return value


EVIDENCE_TIME = re.compile(r"\d{4}-\d{2}-\d{2} \d{2}:\d{2}")


def _register_qs():
    return Deviation.objects.select_related("tank__room", "closed_by", "acknowledged_by").prefetch_related("signatures")


def _detail(request, dev, form, signing, status=200):
    return render(request, "colonies/deviation_detail.html",
                  {"dev": dev, "form": form, "signing": signing, "entries": _history(dev), "evidence": _evidence_rows(dev),
                   "close_refusal": dev.close_refusal(request.user), "signatures": signatures_for(dev)},
                  status=status)


@require_GET
@role_required(MANAGER)
def register(request):
    data = request.GET.copy() if request.GET else {"unresolved": "on"}
    dfilter = DeviationFilter(data, queryset=_register_qs())
    qs = dfilter.qs
    by_rule = {r["rule"]: r["n"] for r in qs.order_by().values("rule").annotate(n=Count("id"))}
    by_room = list(qs.order_by().values("tank__room__name").annotate(n=Count("id")).order_by("-n"))
    closed = list(qs.filter(closed_at__isnull=False).order_by().annotate(dt=F("closed_at") - F("opened_at"))
                  .values_list("dt", flat=True))
    median_close = pd.Series([d.total_seconds() / 3600 for d in closed]).median() if closed else None
    page = list(qs[:200])
    ctx = {
        "filter": dfilter, "deviations": page, "total": len(page) if len(page) < 200 else qs.count(),
        "by_rule": [(label, by_rule.get(value, 0)) for value, label in Deviation.Rule.choices if by_rule.get(value)],
        "by_room": by_room, "median_close_h": median_close, "n_closed": len(closed),
        "query": request.GET.urlencode(),
    }
    return render(request, "colonies/deviation_register.html", ctx)


@require_GET
@role_required(MANAGER)
def register_csv(request):
    """The deviations matching the filter (every one unless filtered), oldest first, streamed."""
    dfilter = DeviationFilter(request.GET, queryset=Deviation.objects.all())
    return csv_response(deviation_export.csv_text(dfilter.qs), "vermilog-deviations.csv")


@require_GET
@role_required(TECHNICIAN, RESEARCHER)
def detail(request, pk):
    dev = get_object_or_404(_register_qs(), pk=pk)
    # Actions typed with the flagged values are the starting point: nobody types them twice.
    return _detail(request, dev, CloseForm(initial={"corrective_action": dev.corrective_action}),
                   SigningForm(meaning=Signature.Meaning.CLOSED))


def _history(dev):
    """The deviation's newest versions; its evidence list is the table above, so its changes show as the count."""
    return versions_of("Deviation", dev.history.all(), hidden={"evidence"}, limit=HISTORY_SHOWN,
                       no_user="rule engine")


HISTORY_SHOWN = 50


@require_POST
@role_required(TECHNICIAN)
@once_per_submission
def acknowledge(request, pk):
    dev = get_object_or_404(Deviation, pk=pk)
    try:
        dev.acknowledge(user=request.user)
    except ValueError as error:
        messages.error(request, str(error))
    else:
        messages.success(request, f"Acknowledged: {dev}.")
    return redirect(dev)


@require_http_methods(["POST"])
@role_required(TECHNICIAN)
@once_per_submission
def close(request, pk):
    dev = get_object_or_404(_register_qs(), pk=pk)
    refusal = dev.close_refusal(request.user)
    if refusal:
        raise PermissionDenied(refusal)
    form = CloseForm(request.POST)
    signing = SigningForm(request.POST, meaning=Signature.Meaning.CLOSED)
    if form.is_valid() and signing.is_valid():
        try:
            dev.close(user=request.user, corrective_action=form.cleaned_data["corrective_action"],
                      password=signing.cleaned_data["password"])
        except ValidationError as error:
            signing.refused(error)
        except ValueError as error:
            messages.error(request, str(error))
        else:
            messages.success(request, f"Closed and signed: {dev}.")
            return redirect(dev)
    return _detail(request, dev, form, signing, status=400)
