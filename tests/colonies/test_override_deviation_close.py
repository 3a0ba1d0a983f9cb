"""The deviation a manager's protocol override opens (Rule.PROTOCOL_LIMIT) is closed by a manager only."""
import pytest
from django.core.exceptions import PermissionDenied
from django.urls import reverse

from colonies.models import Deviation
from tests.experiments.builders import days_ago, make_cohort, make_protocol, make_study, record


@pytest.fixture
def override_deviation(researcher, manager):
    protocol = make_protocol()
    cohort = make_cohort(user=researcher, protocol=protocol, at=days_ago(10))
    study = make_study(user=researcher, protocol=protocol, replicates=3)
    for n in (9, 8, 7):
        record(study, cohort, researcher, at=days_ago(n))
    deviation = record(study, cohort, manager, at=days_ago(6), override_reason="Replacement dish").deviation
    assert deviation.rule == Deviation.Rule.PROTOCOL_LIMIT
    return deviation


def test_a_technician_cannot_close_the_override_deviation(client, technician, override_deviation):
    client.force_login(technician)
    page = client.get(override_deviation.get_absolute_url()).content.decode()
    assert "only a manager may close it" in page and "Close deviation" not in page
    response = client.post(reverse("colonies:deviation-close", args=[override_deviation.pk]),
                           {"corrective_action": "Looked fine"})
    assert response.status_code == 403
    assert "Rule: a protocol limit overridden deviation records a manager&#x27;s override" in response.content.decode()
    override_deviation.refresh_from_db()
    assert override_deviation.status == Deviation.Status.OPEN
    assert override_deviation.history.count() == 1


def test_the_model_refuses_a_technician_too(technician, override_deviation):
    with pytest.raises(PermissionDenied, match="only a manager may close it"):
        override_deviation.close(user=technician, corrective_action="Looked fine", password="pw")
    override_deviation.refresh_from_db()
    assert override_deviation.closed_at is None


def test_a_manager_closes_the_override_deviation(client, manager, override_deviation):
    client.force_login(manager)
    assert "Sign and close deviation" in client.get(override_deviation.get_absolute_url()).content.decode()
    response = client.post(reverse("colonies:deviation-close", args=[override_deviation.pk]),
                           {"corrective_action": "Reviewed with the welfare officer; animals retired", "password": "pw"})
    assert response.status_code == 302
    override_deviation.refresh_from_db()
    assert (override_deviation.status, override_deviation.closed_by) == (Deviation.Status.CLOSED, manager)


def test_a_technician_still_acknowledges_it(client, technician, override_deviation):
    client.force_login(technician)
    assert client.post(reverse("colonies:deviation-acknowledge", args=[override_deviation.pk])).status_code == 302
    override_deviation.refresh_from_db()
    assert override_deviation.status == Deviation.Status.ACKNOWLEDGED
