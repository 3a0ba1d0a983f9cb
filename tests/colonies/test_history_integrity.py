"""Nothing lost, nothing rewritten: no revert through the history pages, no purge command, and no
delete of users, role groups or history rows on any route (admin, instance, queryset)."""
import pytest
from django.contrib import admin
from django.contrib.auth.models import Group, User
from django.core.management import CommandError, call_command, get_commands
from django.db import transaction
from django.db.models import ProtectedError
from django.test import RequestFactory
from django.urls import reverse

from colonies import integrity
from colonies.admin import HistoryAdmin
from colonies.models import Check, Room, Species, Tank
from colonies.roles import MANAGER, TECHNICIAN
from tests.factories import make_check, make_room, make_tank, make_user


@pytest.fixture
def staff_manager(db):
    return make_user("mira", role=MANAGER, is_staff=True)


@pytest.fixture
def tank(db, technician):
    tank = make_tank(code="FW-01", room=make_room(code="fw-1"))
    tank._change_reason = "Volume re-measured"
    tank.volume_l = 12.5
    tank.save()
    return tank


def _history_url(model, obj, version):
    return reverse(f"admin:{model._meta.app_label}_{model._meta.model_name}_simple_history", args=[obj.pk, version.pk])


# ---------------------------------------------------------------------------------------------
# Revert
# ---------------------------------------------------------------------------------------------
def test_every_back_office_page_with_a_history_refuses_revert():
    with_history = [m for m, a in admin.site._registry.items() if hasattr(a, "history_form_view")]
    assert {Tank, Check, Species, Room} <= set(with_history)
    for model in with_history:
        assert isinstance(admin.site._registry[model], HistoryAdmin), model


def test_no_history_table_is_registered_in_the_back_office():
    registered = [m.__name__ for m in admin.site._registry]
    assert not [name for name in registered if name.startswith("Historical")]


@pytest.mark.parametrize("revert_setting", [True, False])
@pytest.mark.parametrize("who", ["superuser", "staff_manager"])
def test_reverting_a_tank_to_its_first_version_is_refused_on_get_and_post(client, tank, who, revert_setting,
                                                                          settings, request):
    settings.SIMPLE_HISTORY_REVERT_DISABLED = revert_setting  # the refusal does not depend on the setting
    client.force_login(request.getfixturevalue(who))
    first = tank.history.earliest("history_date")
    url = _history_url(Tank, tank, first)

    assert client.get(url).status_code == 403
    response = client.post(url, {"code": "FW-01", "room": tank.room_id, "species": tank.species_id, "volume_l": "3",
                                 "system": "static", "status": "active", "started_on": "2026-01-01",
                                 "change_reason": "revert", "_change_history": "1"})

    assert response.status_code == 403
    tank.refresh_from_db()
    assert tank.volume_l == 12.5
    assert tank.history.count() == 2


def test_reverting_a_check_is_refused_for_a_superuser(client, superuser, technician, tank):
    check = make_check(tank, user=technician, ph=7.0)
    version = check.history.get()

    assert client.get(_history_url(Check, check, version)).status_code == 302  # anonymous: to the login
    client.force_login(superuser)
    assert client.post(_history_url(Check, check, version), {"ph": "5.0", "void_reason": ""}).status_code == 403
    check.refresh_from_db()
    assert check.ph == 7.0


def test_history_page_lists_versions_with_reason_and_offers_no_revert(client, superuser, tank):
    client.force_login(superuser)

    response = client.get(reverse("admin:colonies_tank_history", args=[tank.pk]))

    assert response.status_code == 200
    html = response.content.decode()
    assert "Volume re-measured" in html
    assert "/history/" + str(tank.history.earliest("history_date").pk) not in html  # no link to a version's form
    assert "Revert" not in html and "revert to" not in html


# ---------------------------------------------------------------------------------------------
# Purge commands
# ---------------------------------------------------------------------------------------------
@pytest.mark.parametrize("name", ["clean_duplicate_history", "clean_old_history"])
def test_vermilog_command_replaces_the_history_librarys_purge(name):
    assert get_commands()[name] == "colonies"  # colonies comes before simple_history in INSTALLED_APPS


@pytest.mark.parametrize("name, args", [
    ("clean_duplicate_history", ["--auto"]),
    ("clean_duplicate_history", ["colonies.Tank", "--minutes", "100000"]),
    ("clean_old_history", ["--auto", "--days", "0"]),
    ("clean_old_history", ["colonies.Tank"]),
])
def test_purge_commands_refuse_and_every_history_row_survives(tank, name, args):
    # An unchanged re-save is the duplicate clean_duplicate_history would remove.
    tank._change_reason = "saved again"
    tank.save()
    before = list(tank.history.values_list("history_id", flat=True))

    with pytest.raises(CommandError, match=f"{name} is disabled in Vermilog.*Nothing was removed"):
        call_command(name, *args)

    assert list(tank.history.values_list("history_id", flat=True)) == before
    assert len(before) == 3


# ---------------------------------------------------------------------------------------------
# Users, role groups and history rows are never deleted
# ---------------------------------------------------------------------------------------------
def _refused(delete, match=None):
    # The refusal aborts the transaction the delete runs in, as any failed delete does; in the
    # shell each statement is its own transaction, here a savepoint stands in for it.
    with pytest.raises(ProtectedError, match=match), transaction.atomic():
        delete()


def test_a_user_cannot_be_deleted_from_the_orm_and_keeps_their_history(db):
    # A manager who only edited a room: the history row's user would be set to NULL by a delete.
    editor = make_user("edda", role=MANAGER)
    room = Room(code="wet-2", name="Wet lab 2")
    room._history_user, room._change_reason = editor, "New room"
    room.save()

    _refused(editor.delete, "Deactivate the account instead")
    _refused(User.objects.filter(pk=editor.pk).delete, "Users are never deleted")

    assert User.objects.filter(pk=editor.pk).exists()
    assert room.history.get().history_user == editor


def test_a_user_with_records_cannot_be_deleted_either(technician, tank):
    make_check(tank, user=technician, ph=7.0)

    _refused(technician.delete)
    assert User.objects.filter(pk=technician.pk).exists()


def test_a_user_is_deactivated_instead(technician):
    technician.is_active = False
    technician.save()

    technician.refresh_from_db()
    assert technician.is_active is False


def test_a_role_group_cannot_be_deleted_from_the_orm_and_members_keep_the_role(technician):
    group = Group.objects.get(name=TECHNICIAN)

    _refused(group.delete, "would silently lose the role")
    _refused(Group.objects.all().delete, "Role groups are never deleted")

    assert technician.groups.filter(name=TECHNICIAN).exists()


@pytest.mark.parametrize("model", [User, Group], ids=lambda m: m.__name__)
def test_users_and_groups_cannot_be_deleted_in_the_back_office(client, superuser, technician, model):
    obj = technician if model is User else Group.objects.get(name=TECHNICIAN)
    model_admin = admin.site._registry[model]
    request = RequestFactory().get("/")
    request.user = superuser
    client.force_login(superuser)
    url = reverse(f"admin:auth_{model._meta.model_name}_delete", args=[obj.pk])

    assert model_admin.has_delete_permission(request, obj) is False
    assert "delete_selected" not in model_admin.get_actions(request)
    assert client.get(url).status_code == 403
    assert client.post(url, {"post": "yes"}).status_code == 403
    changelist = reverse(f"admin:auth_{model._meta.model_name}_changelist")
    response = client.post(changelist, {"action": "delete_selected", "_selected_action": [obj.pk], "post": "yes"})
    assert response.status_code in (200, 302)  # the action does not exist: nothing happens
    assert model.objects.filter(pk=obj.pk).exists()


def test_history_rows_cannot_be_deleted_from_the_orm(tank):
    version = tank.history.earliest("history_date")

    _refused(version.delete, "History rows are never deleted")
    _refused(Tank.history.all().delete, "History rows are never deleted")

    assert tank.history.count() == 2


def test_every_vermilog_history_table_is_protected():
    models = integrity.historical_models()
    assert {"HistoricalTank", "HistoricalCheck", "HistoricalTrial", "HistoricalStudy"} <= {m.__name__ for m in models}
