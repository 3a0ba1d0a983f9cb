"""Idempotent form posts: a resubmitted form (a double tap, a reloaded page) saves nothing twice.

Each record-creating form carries a hidden one-time key (`{% load submission %}{% submission_key %}`).
`@once_per_submission` on the view claims the key for the user before the view runs, in the same
transaction as the view's own writes. The claim is a row in a table with a unique (user, key):
two identical submits at the same moment serialise on that constraint (PostgreSQL makes the
second insert wait for the first transaction; SQLite serialises writers), the second one fails to
claim and answers with where the first one went, plus an "already saved" message.

A submission counts as saved when the view redirects without queueing an error message. When it
did not (a form shown again with errors, a refusal), the claim is dropped again in the same
transaction, so the key never reaches the database and a corrected resubmit runs normally.
A POST without a key (scripts, tests of the plain views) is processed as before.
"""
import functools
import uuid

from django.contrib import messages
from django.db import IntegrityError, transaction
from django.http import HttpResponse, HttpResponseBadRequest
from django.shortcuts import redirect

SUBMISSION_FIELD = "submission_key"
PATH_LENGTH = 300  # Submission.path max_length
ALREADY_SAVED = "Already saved: this form was submitted before, so nothing new was recorded."


def _error_count(request) -> int:
    # The messages queued during this request (not yet shown); Django keeps them on the storage.
    queued = getattr(getattr(request, "_messages", None), "_queued_messages", [])
    return sum(1 for m in queued if m.level >= messages.ERROR)


def _replay(request, key: uuid.UUID):
    from .models import Submission

    done = Submission.objects.filter(user=request.user, key=key).first()
    if done is None or done.path != request.path[:PATH_LENGTH]:
        return HttpResponse(f"Submission key: {key} was already used for another form; allowed: the key this "
                            "form was rendered with. Reload the page and submit again. Nothing was saved.",
                            status=409, content_type="text/plain; charset=utf-8")
    messages.info(request, ALREADY_SAVED)
    return redirect(done.result_url)


def once_per_submission(view):
    """Run a POST carrying a submission key at most once per user and key (see the module docstring).

    Put it under the method and role decorators, so that refused requests claim nothing.
    """
    @functools.wraps(view)
    def wrapped(request, *args, **kwargs):
        if request.method != "POST" or SUBMISSION_FIELD not in request.POST or not request.user.is_authenticated:
            return view(request, *args, **kwargs)
        raw = request.POST[SUBMISSION_FIELD]
        try:
            key = uuid.UUID(raw.strip())
        except ValueError:
            return HttpResponseBadRequest(f"Submission key: '{raw[:60]}' is not a valid key; allowed: the UUID the "
                                          "form was rendered with. Reload the page and submit again. Nothing was "
                                          "saved.", content_type="text/plain; charset=utf-8")
        from .models import Submission

        with transaction.atomic():
            try:
                with transaction.atomic():  # a savepoint: a failed claim leaves the transaction usable
                    claim = Submission.objects.create(user=request.user, key=key, path=request.path[:PATH_LENGTH])
            except IntegrityError:
                return _replay(request, key)
            errors_before = _error_count(request)
            response = view(request, *args, **kwargs)
            if response.status_code in (301, 302, 303) and _error_count(request) == errors_before:
                claim.result_url = response["Location"][:500]
                claim.save(update_fields=["result_url"])
            else:
                claim.delete()  # never committed: the same key may be posted again once corrected
        return response

    return wrapped
