"""Screens and small endpoints of image measurements: upload, progress, figure, frames CSV, re-run, void.

The trial page shows the measurements (experiments/templates/experiments/_measurements.html);
the scoring form shows the proposal. Nothing here names a trial's condition: a blinded scorer sees
the code, the frames and the numbers, as on the trial page.
"""
from django.contrib import messages
from django.core.exceptions import PermissionDenied
from django.http import Http404, HttpResponse, JsonResponse
from django.shortcuts import get_object_or_404, redirect
from django.views.decorators.http import require_GET, require_POST

from colonies.export_stream import csv_response
from colonies.exports import rows_csv
from colonies.health_plots import cache_key, cached
from colonies.idempotency import once_per_submission
from colonies.roles import has_role, role_required

from . import charts, measurement_charts, measuring, services
from .forms import errors_text
from .measurement_forms import MeasurementForm, VoidMeasurementForm
from .models import ImageMeasurement
from .views import READ, RUN, _get_trial, _trial_detail_page


def _get_measurement(pk: int) -> ImageMeasurement:
    return get_object_or_404(ImageMeasurement.objects.select_related("trial__study__owner", "requested_by"), pk=pk)


def trial_context(user, trial, form=None) -> dict:
    """What the trial page shows of its measurements (two queries: the list, and none more per row)."""
    rows = list(trial.measurements.select_related("requested_by", "decided_by", "voided_by").order_by("-requested_at", "-pk"))
    latest = next((m for m in rows if m.status == ImageMeasurement.Status.DONE and not m.is_voided), None)
    may_measure = has_role(user, *RUN) and services.may_change_study(user, trial.study)
    return {"measurements": rows, "latest_measurement": latest,
            "measurement_form": form or (MeasurementForm() if may_measure else None),
            "may_measure": may_measure and not trial.is_voided and not trial.study.is_locked,
            "measuring": any(m.in_progress for m in rows), "void_measurement_form": VoidMeasurementForm()}


@require_POST
@role_required(*RUN)
@once_per_submission
def measurement_new(request, pk):
    trial = _get_trial(pk)
    services.require_study_owner(request.user, trial.study, "measure images")
    form = MeasurementForm(request.POST, request.FILES)
    for field, message in getattr(request, "upload_refusals", {}).items():  # set by experiments.uploads
        form.add_error("files" if field == "files" else None, message)
    if not form.is_valid():
        messages.error(request, "Nothing was stored: " + errors_text(form))
        return _trial_detail_page(request, trial, status=400, measurement_form=form)
    try:
        m = measuring.start(user=request.user, trial=trial, source=form.source, uploads=form.cleaned_data["files"],
                            options=form.options())
    except services.Refused as refusal:
        form.add_error("files", str(refusal))
        messages.error(request, str(refusal))
        return _trial_detail_page(request, trial, status=400, measurement_form=form)
    if m.status == ImageMeasurement.Status.DONE:
        messages.success(request, f"Measured {m.frames_total} frames: "
                                  f"{measuring._said(m.dispersed, m.proposed_disperse_s())}.")
    elif m.status == ImageMeasurement.Status.FAILED:
        messages.error(request, f"The files were stored but could not be measured: {m.error}")
    else:
        messages.info(request, f"Measuring {m.frames_total} frames in the background; the page shows the progress.")
    return redirect(m)


@require_GET
@role_required(*READ)
def measurement_progress(request, pk):
    m = get_object_or_404(ImageMeasurement, pk=pk)
    return JsonResponse({"status": m.status, "shown_status": m.shown_status, "done": m.frames_done,
                         "total": m.frames_total, "percent": m.percent, "in_progress": m.in_progress,
                         "error": m.error})


@require_GET
@role_required(*READ)
def measurement_chart(request, pk, fmt):
    if fmt not in charts.FORMATS:
        raise Http404("Unknown chart format.")
    m = _get_measurement(pk)
    if m.status != ImageMeasurement.Status.DONE:
        raise Http404("This measurement has no result.")

    def build():
        return measurement_charts.fraction_chart(
            m.frames, threshold=m.threshold, window_s=m.window_s, dispersal_time_s=m.dispersal_time_s,
            censored=m.censored, title=f"Trial {m.trial.code} · image measurement #{m.pk}", fmt=fmt)

    body, _hit = cached(cache_key("measurement-chart", m.pk, m.finished_at.isoformat(), fmt), build)
    response = HttpResponse(body, content_type=charts.FORMATS[fmt])
    if request.GET.get("download"):
        response["Content-Disposition"] = f'attachment; filename="{m.trial.code}-measurement-{m.pk}.{fmt}"'
    return response


@require_GET
@role_required(*READ)
def measurement_csv(request, pk):
    m = _get_measurement(pk)
    if m.status != ImageMeasurement.Status.DONE:
        raise Http404("This measurement has no result.")
    numeric = ("t_s", "largest_fraction", "worm_area_mm2", "contrast_threshold")
    return csv_response(rows_csv(m.frames, measurement_charts.FRAME_CSV_COLUMNS, numeric=numeric),
                        f"{m.trial.code}-measurement-{m.pk}-frames.csv")


@require_POST
@role_required(*RUN)
@once_per_submission
def measurement_rerun(request, pk):
    m = _get_measurement(pk)
    try:
        new = measuring.rerun(user=request.user, measurement=m)
        messages.info(request, f"Measuring again as #{new.pk}.")
    except services.Refused as refusal:
        messages.error(request, str(refusal))
    return redirect(m.trial)


@require_POST
@role_required(*RUN)
@once_per_submission
def measurement_void(request, pk):
    m = _get_measurement(pk)
    if not services.may_change_study(request.user, m.trial.study):
        raise PermissionDenied(f"Only the study's owner or a manager may void measurements in study "
                               f"{m.trial.study.code}.")
    form = VoidMeasurementForm(request.POST)
    if not form.is_valid():
        messages.error(request, "Nothing was changed: " + errors_text(form))
        return redirect(m.trial)
    try:
        measuring.void(user=request.user, measurement=m, reason=form.cleaned_data["reason"])
        messages.success(request, f"Measurement #{m.pk} voided.")
    except services.Refused as refusal:
        messages.error(request, str(refusal))
    return redirect(m.trial)
