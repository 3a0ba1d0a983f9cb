"""Protocol pages: managers enter, amend, approve and suspend (signed); researchers read the list; Today shows
protocols expiring within 30 days. Access for every URL (anonymous, roles, 405) is in test_access.py."""
from datetime import timedelta

import pytest
from django.db import connection
from django.test.utils import CaptureQueriesContext
from django.urls import reverse
from django.utils import timezone

from colonies.models import Signature
from experiments import protocols
from experiments.models import Allowance, Protocol, ProtocolVersion
from experiments.validators import outside_message
from tests.experiments import protocol_posts
from tests.experiments.builders import UV, make_protocol
from tests.factories import page_text

pytestmark = pytest.mark.django_db
BLUE = {"kind": "light", "wavelength_min_nm": 450, "wavelength_max_nm": 490, "max_irradiance_mw_cm2": 2,
        "max_duration_s": 60}


def _saved(protocol=None):
    """Everything a refused protocol form must leave as it was."""
    rows = (Protocol.objects.count(), Protocol.history.count(), Allowance.objects.count(),
            ProtocolVersion.objects.count(), Signature.objects.count())
    if protocol is not None:
        protocol.refresh_from_db()
        rows += (protocol.status, protocol.max_exposures_per_group)
    return rows


def _draft(client, manager, **overrides):
    client.force_login(manager)
    response = client.post(reverse("experiments:protocol-new"),
                           protocol_posts.new_protocol(allowances=[BLUE], **overrides))
    assert response.status_code == 302, page_text(response)[:3000]
    return Protocol.objects.get(reference="QAW-T-101")


def test_manager_enters_a_draft_with_its_allowances_as_version_1(client, manager):
    protocol = _draft(client, manager)

    assert protocol.status == Protocol.Status.DRAFT
    [allowance] = protocol.allowances.all()
    assert (allowance.kind, allowance.max_irradiance_mw_cm2, allowance.wavelength_max_nm) == ("light", 2.0, 490.0)
    [version] = protocol.versions.all()
    assert (version.number, version.max_exposures_per_group, version.allowances[0]["max_duration_s"]) == (1, 3, 60.0)
    assert protocol.history.get().history_user == manager
    assert not protocol.signatures.exists()  # a draft carries no signature


def test_an_impossible_maximum_is_refused_naming_the_field_and_nothing_is_saved(client, manager):
    client.force_login(manager)
    before = _saved()

    response = client.post(reverse("experiments:protocol-new"),
                           protocol_posts.new_protocol(allowances=[BLUE], max_animals_per_trial=0))

    assert response.status_code == 400
    assert response.context["form"].errors["max_animals_per_trial"] == [outside_message("animals", 0)]
    assert "Most animals per trial" in page_text(response)
    assert _saved() == before


def test_approving_needs_the_password_and_saves_nothing_without_it(client, manager):
    protocol = _draft(client, manager)
    before = _saved(protocol)
    url = reverse("experiments:protocol-approve", args=[protocol.pk])

    for password in ("wrong", ""):
        response = client.post(url, {"approved_on": timezone.localdate().isoformat(), "password": password})
        assert response.status_code == 400
        signing = response.context["approve"][1]
        assert signing.errors["password"][0].startswith("Password:")
        assert _saved(protocol) == before

    response = client.post(url, {"approved_on": timezone.localdate().isoformat(), "password": "pw"})

    assert response.status_code == 302
    protocol.refresh_from_db()
    assert protocol.status == Protocol.Status.APPROVED
    sig = protocol.signatures.get()
    assert (sig.signer, sig.meaning) == (manager, Signature.Meaning.APPROVED)
    page = page_text(client.get(protocol.get_absolute_url()))
    assert f"Signed by {manager.get_username()}," in page and "meaning: approved" in page


def test_suspending_is_signed_and_stops_new_work(client, manager):
    protocol = make_protocol()
    client.force_login(manager)
    url = reverse("experiments:protocol-suspend", args=[protocol.pk])
    before = _saved(protocol)

    refused = client.post(url, {"reason": "Welfare review", "password": "nope"})
    assert refused.status_code == 400 and _saved(protocol) == before

    assert client.post(url, {"reason": "Welfare review", "password": "pw"}).status_code == 302
    protocol.refresh_from_db()
    assert protocol.status == Protocol.Status.SUSPENDED
    assert protocol.signatures.get().meaning == Signature.Meaning.SUSPENDED
    assert "is suspended, not approved" in protocol.problem(timezone.localdate())
    assert "meaning: suspended" in page_text(client.get(protocol.get_absolute_url()))


def test_a_signed_protocol_is_amended_only_with_a_new_signature(client, manager):
    protocol = make_protocol(allowances=[UV], status=Protocol.Status.DRAFT)
    protocols.approve(user=manager, protocol=protocol, password="pw")
    client.force_login(manager)
    url = reverse("experiments:protocol-amend", args=[protocol.pk])
    assert "Your password" in page_text(client.get(url))  # the page asks for the signature
    before = _saved(protocol)

    for password in (None, "wrong"):
        response = client.post(url, protocol_posts.amend_protocol(protocol, {"max_exposures_per_group": 2},
                                                                  {"uv": {"max_dose_mj_cm2": 50}}, password=password))
        assert response.status_code == 400
        assert "Password" in page_text(response)
        assert _saved(protocol) == before  # terms, allowances, versions and signatures as they were

    response = client.post(url, protocol_posts.amend_protocol(
        protocol, {"max_exposures_per_group": 2}, {"uv": {"max_dose_mj_cm2": 50}}, password="pw",
        approval_reference="AWB minute 2026/88"))

    assert response.status_code == 302, page_text(response)[:3000]
    protocol.refresh_from_db()
    assert protocol.max_exposures_per_group == 2 and protocol.allowances.get().max_dose_mj_cm2 == 50
    v1, v2 = protocol.versions.order_by("number")
    assert (v1.max_exposures_per_group, v1.allowances[0]["max_dose_mj_cm2"]) == (3, 100.0)  # as approved
    assert (v2.max_exposures_per_group, v2.allowances[0]["max_dose_mj_cm2"], v2.approval_reference) == \
        (2, 50.0, "AWB minute 2026/88")
    assert [s.meaning for s in protocol.signatures.all()] == [Signature.Meaning.APPROVED, Signature.Meaning.AMENDED]
    page = page_text(client.get(protocol.get_absolute_url()))
    assert "meaning: amendment approved" in page and "AWB minute 2026/88" in page


def test_a_draft_is_amended_without_a_signature(client, manager):
    protocol = _draft(client, manager)
    response = client.post(reverse("experiments:protocol-amend", args=[protocol.pk]),
                           protocol_posts.amend_protocol(protocol, {"min_rest_hours": 48}, new=[UV]))
    assert response.status_code == 302, page_text(response)[:3000]
    protocol.refresh_from_db()
    assert protocol.min_rest_hours == 48 and protocol.versions.count() == 2
    assert set(protocol.allowances.values_list("kind", flat=True)) == {"light", "uv"}
    assert not protocol.signatures.exists()


def test_researchers_see_usable_protocols_with_expiry_and_limits_but_not_drafts(client, researcher, manager):
    soon = make_protocol(expires_on=timezone.localdate() + timedelta(days=12), title="Expiring soon")
    make_protocol(status=Protocol.Status.DRAFT, approved_on=None, title="Still a draft")
    client.force_login(researcher)
    page = page_text(client.get(reverse("experiments:protocol-list")))
    assert soon.reference in page and "in 12 days" in page and "≤ 12 animals" in page and "≤ 100 mJ/cm²" in page
    assert "Still a draft" not in page and "Enter a protocol" not in page
    client.force_login(manager)
    assert "Still a draft" in page_text(client.get(reverse("experiments:protocol-list")))


def test_protocol_list_query_count_does_not_grow_with_protocols(client, researcher):
    client.force_login(researcher)
    counts = []
    for n in (2, 8):
        while Protocol.objects.count() < n:
            make_protocol()
        with CaptureQueriesContext(connection) as ctx:
            assert client.get(reverse("experiments:protocol-list")).status_code == 200
        counts.append(len(ctx.captured_queries))
    assert counts[0] == counts[1] <= 5  # session, user, roles, protocols, their allowances


def test_today_shows_approved_protocols_expiring_within_30_days(client, technician):
    today = timezone.localdate()
    soon = make_protocol(expires_on=today + timedelta(days=30))
    later = make_protocol(expires_on=today + timedelta(days=31))
    draft = make_protocol(expires_on=today + timedelta(days=5), status=Protocol.Status.DRAFT, approved_on=None)
    client.force_login(technician)
    page = page_text(client.get(reverse("colonies:home")))
    assert f"Protocol {soon.reference} expires in 30 days" in page
    assert later.reference not in page and draft.reference not in page
