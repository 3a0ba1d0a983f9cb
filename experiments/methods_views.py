"""The methods draft of a study (page and Markdown download) and its validity criteria (declared on the study page).

Thin views over experiments/methods_records.py (queries) and experiments/methods.py / validity.py (pure).
Who: researchers and managers, as for planning a study (technicians read the study page, not the draft);
the criteria are changed by the study's owner or a manager, before unblinding.
"""
from django.contrib import messages
from django.core.exceptions import PermissionDenied
from django.http import HttpResponse
from django.shortcuts import redirect, render
from django.utils import timezone
from django.views.decorators.http import require_GET, require_POST

from colonies.idempotency import once_per_submission
from colonies.roles import RESEARCHER, role_required
from vermilog.lab_time import lab_moment

from . import methods, methods_records, services, validity
from .views import _get_study


def _draft(code):
    study = _get_study(code)
    draft = methods_records.draft_for(study)
    return study, draft, methods.compose(draft)


@require_GET
@role_required(RESEARCHER)
def study_methods(request, code):
    study, draft, sections = _draft(code)
    return render(request, "experiments/study_methods.html",
                  {"study": study, "draft": draft, "sections": sections, "blind": study.is_blind})


@require_GET
@role_required(RESEARCHER)
def study_methods_markdown(request, code):
    study, draft, sections = _draft(code)
    text = methods.to_markdown(draft, sections, generated=lab_moment(timezone.now()))
    response = HttpResponse(text, content_type="text/markdown; charset=utf-8")
    response["Content-Disposition"] = f'attachment; filename="methods-{study.code}.md"'
    return response


@require_POST
@role_required(RESEARCHER)
@once_per_submission
def study_validity(request, code):
    study = _get_study(code)
    if not services.may_change_study(request.user, study):
        raise PermissionDenied("Only the study's owner or a manager may change its validity criteria.")
    try:
        methods_records.set_validity_criteria(user=request.user, study=study,
                                              criteria=validity.criteria_from_form(request.POST))
        messages.success(request, f"Validity criteria of study {study.code} saved.")
        return redirect(study.get_absolute_url() + "#validity")
    except validity.CriteriaError as error:
        for text in error.errors.values():
            messages.error(request, text)
        messages.error(request, "Nothing was changed.")
    except services.Refused as refusal:
        messages.error(request, str(refusal))
    return redirect(study)  # the messages show at the top of the page
