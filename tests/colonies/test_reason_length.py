"""Reasons of any length up to REASON_MAX_CHARS are kept whole; longer ones are refused with a message."""
import pytest
from django.urls import reverse
from django.utils import timezone

from colonies.admin import ReasonAdminForm
from colonies.forms import ReasonForm, TankTargetForm
from colonies.models import REASON_MAX_CHARS
from experiments.forms import ReasonForm as ExperimentReasonForm, ScoreForm, TrialForm
from tests.factories import make_check, make_tank, page_text

LONG = ("The probe was calibrated against the wrong buffer; re-measured after recalibration. " * 13)[:1000]


@pytest.fixture
def check(technician):
    return make_check(make_tank(code="FW-01"), user=technician, ph=7.0)


def test_a_reason_of_1000_characters_is_kept_whole_in_the_history(client, technician, check):
    client.force_login(technician)

    response = client.post(reverse("colonies:void", args=["check", check.pk]), {"reason": LONG})

    assert response.status_code == 302
    check.refresh_from_db()
    assert check.void_reason == LONG
    latest = check.history.order_by("-history_date", "-history_id").first()
    assert latest.history_change_reason == f"Voided: {LONG}"


def test_a_correction_reason_of_1000_characters_is_kept_whole(client, technician, check):
    client.force_login(technician)

    response = client.post(reverse("colonies:check-edit", args=[check.pk]), {"check-ph": "7.3", "reason": LONG})

    assert response.status_code == 302
    check.refresh_from_db()
    assert check.ph == 7.3
    assert check.history.order_by("-history_date", "-history_id").first().history_change_reason == LONG


def test_a_reason_over_the_maximum_is_refused_naming_field_and_limit_and_nothing_is_voided(client, technician, check):
    client.force_login(technician)

    response = client.post(reverse("colonies:void", args=["check", check.pk]), {"reason": "x" * (REASON_MAX_CHARS + 1)})

    assert response.status_code == 400
    assert "Reason: at most 2,000 characters are kept; this one has 2001. Shorten it." in page_text(response)
    check.refresh_from_db()
    assert not check.is_voided
    assert check.history.count() == 1


@pytest.mark.parametrize("form_class, name", [
    (ReasonForm, "reason"), (TankTargetForm, "reason"), (ExperimentReasonForm, "reason"),
    (TrialForm, "override_reason"), (ScoreForm, "reason"), (ReasonAdminForm, "change_reason"),
])
def test_every_reason_field_allows_the_documented_maximum(form_class, name):
    field = form_class.base_fields[name]
    assert field.max_length == REASON_MAX_CHARS
    assert field.error_messages["max_length"].endswith("this one has %(show_value)s. Shorten it.")


def test_a_corrective_action_longer_than_the_limit_is_refused_and_the_deviation_stays_open(client, manager):
    from colonies.models import Deviation
    from tests.factories import make_tank

    tank = make_tank()
    dev = Deviation.objects.create(tank=tank, rule=Deviation.Rule.OUT_OF_TARGET, parameter="ph", summary="pH high",
                                   opened_at=timezone.now())
    client.force_login(manager)
    response = client.post(reverse("colonies:deviation-close", args=[dev.pk]),
                           {"corrective_action": "x" * (REASON_MAX_CHARS + 1)})
    assert response.status_code in (200, 400)
    assert "Corrective action: at most 2,000 characters" in response.content.decode()
    dev.refresh_from_db()
    assert dev.status != Deviation.Status.CLOSED and dev.corrective_action == ""
