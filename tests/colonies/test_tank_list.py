"""The tank list and its declared filters."""
import pytest
from django.urls import reverse

from colonies.models import Tank
from tests.factories import make_room, make_tank


@pytest.fixture
def tanks(db):
    fw, mar = make_room(code="fw-1"), make_room(code="mar-1")
    return [make_tank(code="FW-01", room=fw), make_tank(code="FW-02", room=fw, status=Tank.Status.RETIRED),
            make_tank(code="MA-01", room=mar)]


@pytest.mark.parametrize("query,expected", [
    pytest.param(lambda t: {}, ["FW-01", "FW-02", "MA-01"], id="all"),
    pytest.param(lambda t: {"room": t[0].room.pk}, ["FW-01", "FW-02"], id="room"),
    pytest.param(lambda t: {"status": "retired"}, ["FW-02"], id="status"),
    pytest.param(lambda t: {"code": "ma-"}, ["MA-01"], id="code-contains"),
    pytest.param(lambda t: {"ordering": "-code"}, ["MA-01", "FW-02", "FW-01"], id="ordering"),
])
def test_tank_list_filters_and_sorts(client, researcher, tanks, query, expected):
    client.force_login(researcher)

    response = client.get(reverse("colonies:tank-list"), query(tanks))

    assert response.status_code == 200
    assert [t.code for t in response.context["tanks"]] == expected
