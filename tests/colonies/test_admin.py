"""The back office: reference data pages load, nothing can be deleted, changes need a reason and go through
the app's service; managers (with is_staff) hold exactly the permissions declared in colonies/roles.py."""
import pytest
from django.contrib import admin
from django.contrib.auth.models import Group, Permission, User
from django.core.management import call_command
from django.test import RequestFactory
from django.urls import reverse

from colonies import demo
from colonies.models import CareTarget, Census, Check, Feeding, Room, Species, Tank, WaterChange
from colonies.roles import ALL_ROLES, MANAGER, RESEARCHER, ROLE_PERMISSIONS, TECHNICIAN
from experiments.models import Protocol
from tests.factories import make_check, make_room, make_tank, make_user

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


# ---------------------------------------------------------------------------------------------
# Roles in the back office: permissions declared in colonies/roles.py, granted by migration
# ---------------------------------------------------------------------------------------------
def _perm_names(group) -> set[str]:
    return {f"{p.content_type.app_label}.{p.codename}" for p in group.permissions.select_related("content_type")}


def test_role_groups_carry_exactly_the_declared_permissions(db):
    for role in ALL_ROLES:
        assert _perm_names(Group.objects.get(name=role)) == set(ROLE_PERMISSIONS[role]), role


def test_no_role_may_delete_anything_and_only_managers_have_back_office_permissions():
    assert ROLE_PERMISSIONS[TECHNICIAN] == [] and ROLE_PERMISSIONS[RESEARCHER] == []
    assert not [p for perms in ROLE_PERMISSIONS.values() for p in perms if ".delete_" in p]
    assert {"colonies.add_room", "colonies.change_tank", "colonies.change_species", "experiments.view_protocol",
            "experiments.view_allowance"} <= set(ROLE_PERMISSIONS[MANAGER])
    # Protocols are entered, amended (versions) and approved (signed) in the app's own pages only.
    assert not {"experiments.add_protocol", "experiments.change_protocol", "experiments.add_allowance",
                "experiments.change_allowance", "colonies.add_signature", "colonies.change_signature"} \
        & set(ROLE_PERMISSIONS[MANAGER])


def test_a_permission_added_by_hand_is_taken_away_by_the_next_migrate(db):
    group = Group.objects.get(name=TECHNICIAN)
    group.permissions.add(Permission.objects.get(codename="change_room"))

    call_command("migrate", verbosity=0)

    assert _perm_names(group) == set()


@pytest.fixture
def demo_manager(db, monkeypatch):
    """The demo's manager, as the demo loader makes her (ten days of data are enough here, as in test_demo.py)."""
    monkeypatch.setattr(demo, "DAYS", 10)
    call_command("load_demo", verbosity=0)
    manager = User.objects.get(username="morwen")
    assert manager.is_staff and not manager.is_superuser
    return manager


def _admin_url(model, view, *args):
    return reverse(f"admin:{model._meta.app_label}_{model._meta.model_name}_{view}", args=args)


def _form_data(response) -> dict:
    """The posted form as the browser would send it back: every field's initial value, inlines included."""
    data = {}
    forms_ = [response.context["adminform"].form]
    for inline in response.context["inline_admin_formsets"]:
        fs = inline.formset
        forms_ += list(fs.forms)
        data.update({f"{fs.prefix}-{k}": v for k, v in fs.management_form.initial.items()})
    for form in forms_:
        for name, field in form.fields.items():
            value = form[name].value()
            if value is None:
                continue
            if isinstance(value, (list, tuple)):
                data[form.add_prefix(name)] = [str(v) for v in value]
            elif isinstance(value, bool):
                if value:
                    data[form.add_prefix(name)] = "on"
            else:
                data[form.add_prefix(name)] = str(value)
    return data


@pytest.mark.parametrize("model", [Room, Tank, Species], ids=lambda m: m.__name__)
def test_demo_manager_opens_add_and_change_pages_and_saves_with_a_reason(client, demo_manager, model):
    client.force_login(demo_manager)
    obj = model.objects.order_by("pk").first()

    assert client.get(_admin_url(model, "changelist")).status_code == 200
    assert client.get(_admin_url(model, "add")).status_code == 200
    page = client.get(_admin_url(model, "change", obj.pk))
    assert page.status_code == 200
    data = _form_data(page)
    data["change_reason"] = "Annual review of the back office"
    data["notes"] = "Reviewed in the back office"

    response = client.post(_admin_url(model, "change", obj.pk), data)

    assert response.status_code == 302, response.context and response.context["adminform"].form.errors
    obj.refresh_from_db()
    assert obj.notes == "Reviewed in the back office"
    latest = obj.history.latest("history_date")
    assert (latest.history_user, latest.history_change_reason) == (demo_manager, "Annual review of the back office")
    delete_url = _admin_url(model, "delete", obj.pk)
    assert client.get(delete_url).status_code == 403
    assert client.post(delete_url, {"post": "yes"}).status_code == 403
    assert model.objects.filter(pk=obj.pk).exists()


def test_back_office_shows_protocols_but_neither_adds_nor_changes_them(client, demo_manager, superuser):
    """A signed protocol changes only with a new signature, and every change is a version: the app's pages do
    that (experiments/protocols.py), the back office cannot, not even for a superuser."""
    protocol = Protocol.objects.filter(signatures__isnull=False).first()
    before = (Protocol.objects.count(), protocol.history.count(), protocol.notes)
    for user in (demo_manager, superuser):
        client.force_login(user)
        assert client.get(_admin_url(Protocol, "change", protocol.pk)).status_code == 200  # read
        assert client.get(_admin_url(Protocol, "add")).status_code == 403
        data = {"title": protocol.title, "notes": "Changed behind the signature", "change_reason": "Edit"}
        assert client.post(_admin_url(Protocol, "change", protocol.pk), data).status_code == 403
        assert client.post(_admin_url(Protocol, "add"), {"reference": "AWB-2026-101", "title": "x"}).status_code == 403
    protocol.refresh_from_db()
    assert (Protocol.objects.count(), protocol.history.count(), protocol.notes) == before


def test_back_office_care_target_gets_the_apps_bounds_check_and_nothing_is_saved(client, db):
    manager = make_user("mira", role=MANAGER, is_staff=True)
    client.force_login(manager)
    species = make_tank(code="FW-02").species
    page = client.get(_admin_url(Species, "change", species.pk))
    data = _form_data(page)
    data.update({"change_reason": "New pH target", "targets-0-parameter": "ph", "targets-0-low": "6.0",
                 "targets-0-high": "15", "targets-0-source": "lab setting", "notes": "changed"})
    data["targets-TOTAL_FORMS"] = "1"

    response = client.post(_admin_url(Species, "change", species.pk), data)

    assert response.status_code == 200  # the form again
    assert "pH high: 15 is outside the physical range" in response.content.decode()
    species.refresh_from_db()
    assert species.notes != "changed" and not CareTarget.objects.filter(species=species).exists()


def test_species_edited_in_the_back_office_and_in_the_app_keep_the_same_who_and_why(client, db):
    manager = make_user("mira", role=MANAGER, is_staff=True)
    client.force_login(manager)
    species = make_tank(code="FW-03").species
    data = _form_data(client.get(_admin_url(Species, "change", species.pk)))
    data.update({"change_reason": "Warmer room", "targets-TOTAL_FORMS": "1", "targets-0-parameter": "temp_c",
                 "targets-0-low": "18", "targets-0-high": "24", "targets-0-source": "lab setting"})

    assert client.post(_admin_url(Species, "change", species.pk), data).status_code == 302

    target = CareTarget.objects.get(species=species, parameter="temp_c")
    for version in (species.history.latest("history_date"), target.history.get()):
        assert (version.history_user, version.history_change_reason) == (manager, "Warmer room")


@pytest.mark.parametrize("role", [TECHNICIAN, RESEARCHER])
def test_technicians_and_researchers_get_nothing_in_the_back_office_even_as_staff(client, db, role):
    user = make_user(f"staff-{role}", role=role, is_staff=True)
    room = make_room(code="wet-5")
    client.force_login(user)

    assert client.get(_admin_url(Room, "changelist")).status_code == 403
    assert client.get(_admin_url(Room, "change", room.pk)).status_code == 403
    assert client.post(_admin_url(Room, "add"), {"code": "x", "name": "x", "change_reason": "x"}).status_code == 403
    assert not Room.objects.filter(code="x").exists()


def test_a_manager_without_is_staff_is_sent_to_the_login_by_the_back_office(client, manager):
    client.force_login(manager)

    response = client.get(_admin_url(Room, "changelist"))

    assert response.status_code == 302 and "/admin/login/" in response["Location"]


@pytest.mark.django_db
def test_tank_cannot_be_founded_from_itself_or_its_descendants():
    from colonies.admin import TankAdminForm
    from tests.factories import make_tank

    parent = make_tank(code="LIN-01")
    child = make_tank(code="LIN-02")
    child.founded_from.add(parent)
    grandchild = make_tank(code="LIN-03")
    grandchild.founded_from.add(child)

    def errors(tank, parents):
        form = TankAdminForm(instance=tank)
        form.cleaned_data = {"founded_from": Tank.objects.filter(pk__in=[p.pk for p in parents])}
        try:
            form.clean_founded_from()
        except Exception as error:  # ValidationError
            return " ".join(error.messages)
        return ""

    assert "LIN-01 is this tank" in errors(parent, [parent])
    assert "LIN-03" in errors(parent, [grandchild])  # a loop of three
    assert errors(grandchild, [parent]) == ""  # an earlier line is fine
