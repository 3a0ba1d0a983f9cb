"""Roles are Django groups. Checks live here and in view decorators, never only in templates.

- technician: records husbandry (checks, feedings, water changes, censuses, the round).
- researcher: reads husbandry; books animals and logs trials (experiments app).
- manager: everything, including care profiles and the audit pages.
A superuser counts as a manager.
"""
from functools import wraps

from django.core.exceptions import PermissionDenied

TECHNICIAN = "technician"
RESEARCHER = "researcher"
MANAGER = "manager"
ALL_ROLES = (TECHNICIAN, RESEARCHER, MANAGER)


def roles_of(user) -> frozenset[str]:
    """The user's roles; cached on the user object so a page asks the database once."""
    if not user.is_authenticated:
        return frozenset()
    cached = getattr(user, "_vermilog_roles", None)
    if cached is None:
        names = set(user.groups.filter(name__in=ALL_ROLES).values_list("name", flat=True))
        if user.is_superuser:
            names.add(MANAGER)
        cached = frozenset(names)
        user._vermilog_roles = cached
    return cached


def has_role(user, *roles: str) -> bool:
    """Managers pass every role check."""
    mine = roles_of(user)
    return MANAGER in mine or any(r in mine for r in roles)


def can_record_husbandry(user) -> bool:
    return has_role(user, TECHNICIAN)


def can_read_husbandry(user) -> bool:
    return has_role(user, TECHNICIAN, RESEARCHER)


def role_required(*roles: str):
    """View decorator: 403 unless the user holds one of the roles (managers always pass).

    Login itself is enforced for every view by LoginRequiredMiddleware.
    """
    def decorator(view):
        @wraps(view)
        def wrapped(request, *args, **kwargs):
            if not has_role(request.user, *roles):
                raise PermissionDenied("Your role does not allow this page.")
            return view(request, *args, **kwargs)
        return wrapped
    return decorator


def roles_context(request):
    user = getattr(request, "user", None)
    if user is None or not user.is_authenticated:
        return {}
    mine = roles_of(user)
    return {
        "roles": mine,
        "can_record": can_record_husbandry(user),
        "can_read": can_read_husbandry(user),
        "is_manager": MANAGER in mine,
    }


# ---------------------------------------------------------------------------------------------
# Back-office permissions of each role: the one place they are declared. A data migration grants
# them and every `migrate` brings the groups back to exactly this (ColoniesConfig.ready), so a
# permission added to a group by hand does not survive. Only managers use the back office (their
# accounts also need is_staff); no role may delete anything, and there the admin refuses it anyway.
# ---------------------------------------------------------------------------------------------
def _perms(app_label: str, actions: str, *models: str) -> list[str]:
    return [f"{app_label}.{action}_{model}" for model in models for action in actions.split()]


ROLE_PERMISSIONS: dict[str, list[str]] = {
    TECHNICIAN: [],
    RESEARCHER: [],
    MANAGER: [
        # reference data: rooms, tanks (and their own targets), species care profiles
        *_perms("colonies", "view add change", "room", "tank", "tanktarget", "species", "caretarget"),
        *_perms("experiments", "view", "protocol", "allowance", "protocolversion"),  # changed in the app, signed
        # records: read here, entered and corrected in the app
        *_perms("colonies", "view", "check", "feeding", "waterchange", "census", "deadremoval", "split", "splitpart",
                "deviation", "signature"),
        *_perms("experiments", "view", "booking", "cohort", "dish", "study", "trial", "override", "attachment",
                "slotclaim", "periodreport"),
    ],
}


def sync_role_groups(group_model, permission_model, *, skip_missing: bool = False) -> None:
    """Create the role groups if missing and give each exactly its declared permissions.

    Takes the models as arguments so a migration can pass its historical ones. `skip_missing`: leave out
    permissions of models that a migration's state does not have yet (a model added later); the sync
    after every migrate (ColoniesConfig.ready) grants them.
    """
    for role, names in ROLE_PERMISSIONS.items():
        group, _ = group_model.objects.get_or_create(name=role)
        wanted = []
        for name in names:
            app_label, codename = name.split(".")
            perm = permission_model.objects.filter(content_type__app_label=app_label, codename=codename).first()
            if perm is None and skip_missing:
                continue
            if perm is None:
                raise LookupError(f"Role {role}: permission {name} does not exist (a model renamed?).")
            wanted.append(perm)
        group.permissions.set(wanted)
