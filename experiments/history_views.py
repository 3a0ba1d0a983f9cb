"""Change history pages of the trial records: protocol, booking, cohort (with its dishes), study
(with its slot claims) and trial (with its override, files and image measurements).

The versions are read and written as the husbandry pages do (colonies/history.py and
history_format.py). A trial's history leaves out what the blinding rule hides from the viewer
(experiments/blinding.py): the condition and stimulus fields, the override's reason and limits,
the files' names; a blind study's history leaves out its conditions, reference, seed and allocation.
"""
from django.core.paginator import Paginator
from django.shortcuts import get_object_or_404, render
from django.views.decorators.http import require_GET

from colonies.history import Source, history_index, page_entries
from colonies.roles import role_required

from . import blinding
from .models import Allowance, Attachment, Dish, ImageMeasurement, Override, Protocol, SlotClaim
from .views import READ, _get_booking, _get_cohort, _get_study, _get_trial

PAGE_SIZE = 100
NOTHING = frozenset()


def _page(request, record, title: str, sources: list[Source]):
    page = Paginator(history_index(sources), PAGE_SIZE).get_page(request.GET.get("page"))
    return render(request, "experiments/history.html", {"record": record, "title": title, "page": page,
                                                         "entries": page_entries(sources, page.object_list)})


@require_GET
@role_required(*READ)
def protocol_history(request, pk):
    protocol = get_object_or_404(Protocol, pk=pk)
    return _page(request, protocol, f"protocol {protocol.reference}", [
        Source("Protocol", protocol.history.all(), name=lambda h: f"Protocol {h.reference}"),
        Source("Stimulus allowance", Allowance.history.filter(protocol_id=pk))])


@require_GET
@role_required(*READ)
def booking_history(request, pk):
    booking = _get_booking(pk)
    return _page(request, booking, f"booking {booking.pk}", [Source("Booking", booking.history.all())])


@require_GET
@role_required(*READ)
def cohort_history(request, pk):
    cohort = _get_cohort(pk)
    return _page(request, cohort, f"cohort {cohort.label}", [
        Source("Cohort", cohort.history.all(), name=lambda h: f"Cohort C-{h.id:04d}"),
        Source("Dish", Dish.history.filter(cohort_id=pk), name=lambda h: f"Dish C-{h.cohort_id:04d}-D{h.number}")])


@require_GET
@role_required(*READ)
def study_history(request, code):
    study = _get_study(code)
    hidden = blinding.HIDDEN_STUDY_FIELDS if study.is_blind else NOTHING
    return _page(request, study, f"study {study.code}", [
        Source("Study", study.history.all(), hidden, name=lambda h: f"Study {h.code}"),
        Source("Slot claim", SlotClaim.history.filter(study_id=study.pk), name=lambda h: f"Slot {h.slot} claim")])


@require_GET
@role_required(*READ)
def trial_history(request, pk):
    trial = _get_trial(pk)
    blind = not blinding.may_see_condition(request.user, trial)
    # The per-frame numbers are the measurement's CSV; a diff of them says nothing a person reads.
    measurement_hidden = frozenset({"frames", *(("files",) if blind else ())})
    return _page(request, trial, f"trial {trial.code}", [
        Source("Trial", trial.history.all(), blinding.HIDDEN_TRIAL_FIELDS if blind else NOTHING,
               name=lambda h: f"Trial {h.code}"),
        Source("Override", Override.history.filter(trial_id=pk),
               blinding.HIDDEN_OVERRIDE_FIELDS if blind else NOTHING),
        Source("File", Attachment.history.filter(trial_id=pk),
               blinding.HIDDEN_ATTACHMENT_FIELDS if blind else NOTHING),
        Source("Image measurement", ImageMeasurement.history.filter(trial_id=pk), measurement_hidden)])
