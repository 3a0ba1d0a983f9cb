"""Printable tank labels with QR codes."""
import pytest
from django.urls import reverse

from colonies.labels import qr_svg
from colonies.models import Tank
from tests.factories import make_room, make_tank, page_text

pytestmark = pytest.mark.django_db


def test_qr_svg_is_inline_svg_naming_its_url():
    svg = qr_svg("http://lab.invalid/tanks/FW-01/")
    assert svg.startswith("<svg") and "xmlns" in svg
    assert "<title>http://lab.invalid/tanks/FW-01/</title>" in svg


def test_label_sheet_lists_active_tanks_with_a_qr_code_to_each_tank_page(client, researcher):
    room = make_room(name="Wet lab Q")
    active = make_tank(code="FW-01", room=room)
    make_tank(code="FW-99", room=room, status=Tank.Status.RETIRED)
    client.force_login(researcher)
    response = client.get(reverse("colonies:tank-labels"))
    assert response.status_code == 200
    text = page_text(response)
    assert "FW-01" in text and "FW-99" not in text  # active tanks by default
    assert f"<title>http://testserver{active.get_absolute_url()}</title>" in text
    retired = page_text(client.get(reverse("colonies:tank-labels"), {"status": "retired"}))
    assert "FW-99" in retired and "FW-01" not in retired


def test_label_sheet_needs_login_and_a_role(client, outsider):
    url = reverse("colonies:tank-labels")
    assert client.get(url).status_code == 302
    client.force_login(outsider)
    assert client.get(url).status_code == 403


def test_label_sheet_query_count_does_not_grow(client, technician, django_assert_max_num_queries):
    client.force_login(technician)
    room = make_room()
    for _ in range(3):
        make_tank(room=room)
    with django_assert_max_num_queries(10) as small:
        client.get(reverse("colonies:tank-labels"))
    for _ in range(30):
        make_tank(room=room)
    with django_assert_max_num_queries(len(small.captured_queries)):
        response = client.get(reverse("colonies:tank-labels"))
    assert len(response.context["labels"]) == 33


def test_qr_svg_is_remembered_by_content_and_a_new_url_gets_its_own_code():
    qr_svg.cache_clear()
    first = qr_svg("http://lab.invalid/tanks/KC-01/")
    again = qr_svg("http://lab.invalid/tanks/KC-01/")
    other = qr_svg("http://lab.invalid/tanks/KC-02/")
    assert again == first and qr_svg.cache_info().hits == 1
    assert other != first and "<title>http://lab.invalid/tanks/KC-02/</title>" in other
    # the cached text is what a fresh encoding gives (segno is deterministic)
    assert qr_svg.__wrapped__("http://lab.invalid/tanks/KC-01/") == first
