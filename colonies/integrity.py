"""Refusals that keep the record whole, whichever route a delete takes (admin, shell, queryset).

- A user is never deleted: every history row they made points at them (a delete would blank the
  who of those rows). Set `is_active = False` instead.
- A role group is never deleted: its members would silently lose the role. Rename it or move the
  members instead.
- A history row is never deleted: it is the only copy of an earlier version.

The receivers raise ProtectedError, the error Django raises for a protected foreign key, so the
admin and callers treat it like any other refused delete. Connected in ColoniesConfig.ready().
A queryset delete sends pre_delete for each row when a receiver is connected, so it is refused too.
"""
from django.apps import apps
from django.contrib.auth.models import Group, User
from django.db.models import ProtectedError
from django.db.models.signals import pre_delete

USER_REFUSAL = "Users are never deleted: their name stays on every record and history row they made. " \
               "Deactivate the account instead (is_active = False)."
GROUP_REFUSAL = "Role groups are never deleted: their members would silently lose the role. " \
                "Move the members to another group instead."
HISTORY_REFUSAL = "History rows are never deleted: each is the only copy of an earlier version."


def refuse_user_delete(sender, instance, **kwargs):
    raise ProtectedError(f"{USER_REFUSAL} (user {instance.get_username()})", {instance})


def refuse_group_delete(sender, instance, **kwargs):
    raise ProtectedError(f"{GROUP_REFUSAL} (group {instance.name})", {instance})


def refuse_history_delete(sender, instance, **kwargs):
    raise ProtectedError(f"{HISTORY_REFUSAL} ({sender.__name__} {instance.pk})", {instance})


def historical_models():
    """Every history table the history library made for a Vermilog model."""
    return [m for m in apps.get_models() if m.__name__.startswith("Historical")
            and m._meta.app_label in ("colonies", "experiments")]


def connect():
    pre_delete.connect(refuse_user_delete, sender=User, dispatch_uid="vermilog-refuse-user-delete")
    pre_delete.connect(refuse_group_delete, sender=Group, dispatch_uid="vermilog-refuse-group-delete")
    for model in historical_models():
        pre_delete.connect(refuse_history_delete, sender=model, dispatch_uid=f"vermilog-refuse-{model.__name__}")
