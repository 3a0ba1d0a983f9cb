"""The period report (managers): choose a period and a scope, read it, print it, download the PDF and the
ZIP of CSVs, and issue it (a PeriodReport record with its manifest's SHA-256, to be signed)."""
from urllib.parse import urlencode

from django.contrib import messages
from django.contrib.staticfiles import finders
from django.core.exceptions import ValidationError
from django.db import transaction
from django.http import HttpResponse, HttpResponseBadRequest
from django.shortcuts import get_object_or_404, redirect, render
from django.template.loader import render_to_string
from django.utils import timezone
from django.views.decorators.http import require_GET, require_POST

from colonies.idempotency import once_per_submission
from colonies.models import Signature
from colonies.roles import MANAGER, role_required
from colonies.signature_forms import SigningForm
from colonies.signatures import sign, signatures_for

from .models import PeriodReport
from .period_report import queries, render as files
from .period_report.forms import PeriodReportForm, default_initial

PAGE = "experiments/period_report.html"


def _report(request, data):
    """(form, report or None, query string) for the GET or POST data."""
    form = PeriodReportForm(data or None, initial=default_initial())
    if not form.is_bound or not form.is_valid():
        return form, None, ""
    # As no one in particular sees it (user None: a blind study's conditions withheld from all, its operators
    # too): the files a manager issues, signs and prints are the same whoever does it, so their sums compare.
    report = queries.build(form.cleaned_data["scope"], form.scope_key(), form.period(), None)
    query = {k: data[k] for k in ("period_from", "period_to", "scope", form.cleaned_data["scope"]) if k in data}
    return form, report, urlencode(query)


def _filename(report, ext: str) -> str:
    p = report.period
    scope = f"-{report.scope.key}" if report.scope.key else ""
    return f"period-report-{p.first:%Y%m%d}-{p.last:%Y%m%d}-{report.scope.kind}{scope}.{ext}"


@require_GET
@role_required(MANAGER)
def period_report(request):
    form, report, query = _report(request, request.GET)
    status = 400 if form.is_bound and not form.is_valid() else 200
    return render(request, PAGE, {"form": form, "report": report, "query": query}, status=status)


def _static_fetcher(url: str):
    """WeasyPrint's fetcher: the page's stylesheet from the static files, nothing from the network."""
    from django.conf import settings
    from weasyprint import default_url_fetcher

    prefix = "vermilog-static:/"
    if url.startswith(prefix):
        path = finders.find(url[len(prefix):])
        if path:
            return default_url_fetcher("file://" + path)
    raise ValueError(f"The PDF loads only Vermilog's own static files ({settings.STATIC_URL}), not {url}.")


def _pdf_response(request, report, filename: str, **ctx) -> HttpResponse:
    html = render_to_string("experiments/period_report_print.html",
                            {"report": report, "printed_at": timezone.now(), "user": request.user, **ctx},
                            request=request)
    response = HttpResponse(files.pdf_bytes(html, "vermilog-static:/", _static_fetcher), content_type="application/pdf")
    response["Content-Disposition"] = f'attachment; filename="{filename}"'
    return response


@require_GET
@role_required(MANAGER)
def period_report_pdf(request):
    form, report, _ = _report(request, request.GET)
    if report is None:
        return HttpResponseBadRequest(" ".join(m for msgs in form.errors.values() for m in msgs) or "Choose a period.")
    return _pdf_response(request, report, _filename(report, "pdf"),
                         manifest_sha256=files.manifest_sha256(files.zip_bytes(report.sections)[1]))


@require_GET
@role_required(MANAGER)
def period_report_zip(request):
    form, report, _ = _report(request, request.GET)
    if report is None:
        return HttpResponseBadRequest(" ".join(m for msgs in form.errors.values() for m in msgs) or "Choose a period.")
    data, _ = files.zip_bytes(report.sections)
    response = HttpResponse(data, content_type="application/zip")
    response["Content-Disposition"] = f'attachment; filename="{_filename(report, "zip")}"'
    return response


@require_POST
@role_required(MANAGER)
@once_per_submission
def period_report_issue(request):
    form, report, _ = _report(request, request.POST)
    if report is None:
        return render(request, PAGE, {"form": form, "report": None}, status=400)
    _, text = files.zip_bytes(report.sections)
    issued = PeriodReport(period_from=report.period.first, period_to=report.period.last, scope=report.scope.kind,
                          scope_key=report.scope.key, scope_label=report.scope.label, issued_by=request.user,
                          manifest=text, manifest_sha256=files.manifest_sha256(text))
    issued._history_user, issued._change_reason = request.user, "Issued"
    issued.save()
    return redirect(issued)


def _issued(request, pk: int) -> tuple[PeriodReport, object, object, str, bool]:
    """(issued record, form, report rebuilt from today's records, query, whether today's files are those issued)."""
    issued = get_object_or_404(PeriodReport.objects.select_related("issued_by"), pk=pk)
    data = {"period_from": issued.period_from.isoformat(), "period_to": issued.period_to.isoformat(),
            "scope": issued.scope}
    if issued.scope != PeriodReport.Scope.FACILITY:
        data[issued.scope] = issued.scope_key
    form, report, query = _report(request, data)
    now_sum = files.manifest_sha256(files.zip_bytes(report.sections)[1]) if report else ""
    return issued, form, report, query, now_sum == issued.manifest_sha256


def _issued_page(request, issued, form, report, query, unchanged, signing=None, status=200):
    signatures = signatures_for(issued)
    return render(request, PAGE, {"form": form, "report": report, "query": query, "issued": issued,
                                  "unchanged": unchanged, "signatures": signatures,
                                  "signed_by_me": any(s.signature.signer_id == request.user.pk for s in signatures),
                                  "signing": signing or SigningForm(meaning=Signature.Meaning.REVIEWED)},
                  status=status)


@require_GET
@role_required(MANAGER)
def period_report_issued(request, pk: int):
    return _issued_page(request, *_issued(request, pk))


@require_GET
@role_required(MANAGER)
def period_report_issued_pdf(request, pk: int):
    """The issued report's PDF: its manifest sum and signatures; refused once today's records give other files."""
    issued, _form, report, _query, unchanged = _issued(request, pk)
    if not unchanged:
        return HttpResponse(CHANGED, status=409, content_type="text/plain; charset=utf-8")
    return _pdf_response(request, report, _filename(report, "pdf").replace(".pdf", f"-issued-{issued.pk}.pdf"),
                         manifest_sha256=issued.manifest_sha256, issued=issued, signatures=signatures_for(issued),
                         unchanged=True)


CHANGED = ("The records have changed since this report was issued: today's files differ from those issued. "
           "Issue the report again to read, sign or print what the records say now.")


@require_POST
@role_required(MANAGER)
@once_per_submission
def period_report_sign(request, pk: int):
    """A manager signs an issued report as reviewed, with their password, while its files are still those issued."""
    issued, form, report, query, unchanged = _issued(request, pk)
    signing = SigningForm(request.POST, meaning=Signature.Meaning.REVIEWED)
    if not unchanged:
        messages.error(request, CHANGED)
        return _issued_page(request, issued, form, report, query, unchanged, signing, status=409)
    if signing.is_valid():
        try:
            with transaction.atomic():
                sign(user=request.user, password=signing.cleaned_data["password"],
                     meaning=Signature.Meaning.REVIEWED, obj=issued)
        except ValidationError as error:
            signing.refused(error)
        else:
            messages.success(request, f"Signed as reviewed: {issued}.")
            return redirect(issued)
    return _issued_page(request, issued, form, report, query, unchanged, signing, status=400)
