"""The back office: reference data pages load for a superuser, nothing can be deleted, changes need a reason."""
import pytest
from django.contrib import admin
from django.test import RequestFactory
from django.urls import reverse

from colonies.models import Census, Check, Feeding, Room, Species, Tank, WaterChange
from tests.factories import make_check, make_room, make_tank

REFERENCE = [Species, Room, Tank]
RECORDS = [Check, Feeding, WaterChange, Census]


@pytest.fixture
def objects(db, technician):
    tank = make_tank(code="FW-01", room=make_room(code="fw-1"))
    return {Species: tank.species, Room: tank.room, Tank: tank, Check: make_check(tank, user=technician, ph=7.0)}


def _url(model, view, *args):
    return reverse(f"admin:colonies_{model._meta.model_name}_{view}", args=args)


@pytest.mark.parametrize("model", REFERENCE, ids=lambda m: m.__name__)
def test_reference_data_pages_load_for_a_superuser(client, superuser, objects, model):
    client.force_login(superuser)
    obj = objects[model]

    for url in (_url(model, "changelist"), _url(model, "add"), _url(model, "change", obj.pk),
                _url(model, "history", obj.pk)):
        assert client.get(url).status_code == 200, url


@pytest.mark.parametrize("model", REFERENCE + [Check], ids=lambda m: m.__name__)
def test_delete_is_not_offered(client, superuser, objects, model):
    client.force_login(superuser)
    request = RequestFactory().get("/")
    request.user = superuser
    model_admin = admin.site._registry[model]

    assert model_admin.has_delete_permission(request) is False
    assert model_admin.has_delete_permission(request, objects[model]) is False
    assert "delete_selected" not in model_admin.get_actions(request)
    response = client.post(_url(model, "delete", objects[model].pk), {"post": "yes"})
    assert response.status_code == 403
    assert model.objects.filter(pk=objects[model].pk).exists()


@pytest.mark.parametrize("model", RECORDS, ids=lambda m: m.__name__)
def test_husbandry_records_are_read_only_in_the_back_office(client, superuser, objects, model):
    client.force_login(superuser)
    request = RequestFactory().get("/")
    request.user = superuser
    model_admin = admin.site._registry[model]

    assert client.get(_url(model, "changelist")).status_code == 200
    assert model_admin.has_add_permission(request) is False
    assert model_admin.has_change_permission(request) is False


def test_room_added_in_the_back_office_keeps_the_reason_in_history(client, superuser, db):
    client.force_login(superuser)

    response = client.post(_url(Room, "add"), {"code": "wet-9", "name": "Wet lab 9", "notes": "",
                                                "change_reason": "New room commissioned"})

    assert response.status_code == 302
    room = Room.objects.get(code="wet-9")
    history = room.history.get()
    assert (history.history_user, history.history_change_reason) == (superuser, "New room commissioned")


def test_back_office_change_without_reason_is_refused(client, superuser, db):
    client.force_login(superuser)

    response = client.post(_url(Room, "add"), {"code": "wet-9", "name": "Wet lab 9", "notes": ""})

    assert response.status_code == 200  # the form again, with the error
    assert "change_reason" in response.context["adminform"].form.errors
    assert not Room.objects.filter(code="wet-9").exists()
