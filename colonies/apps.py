from django.apps import AppConfig
from django.db.models.signals import post_migrate


def _sync_roles(sender, **kwargs):
    """After every migrate (and test flush): role groups carry exactly roles.ROLE_PERMISSIONS."""
    from django.apps import apps
    from django.contrib.auth.management import create_permissions
    from django.contrib.auth.models import Group, Permission

    from .roles import sync_role_groups

    # post_migrate reaches this app before experiments, whose permissions would not exist yet on a
    # new database; creating them now is what the later signal would do (it skips existing ones).
    for app_config in apps.get_app_configs():
        create_permissions(app_config, verbosity=0)
    sync_role_groups(Group, Permission)


def _create_cache_tables(sender, using="default", **kwargs):
    """After every migrate: the table of a database cache (VERMILOG_CACHE=db) exists wherever migrate
    runs (demo, tests, CI, a restore target); it skips a table that is already there."""
    from django.conf import settings
    from django.core.management import call_command

    from vermilog.caches import database_cache_tables

    if database_cache_tables(settings.CACHES):
        call_command("createcachetable", database=using, verbosity=0)


class ColoniesConfig(AppConfig):
    name = "colonies"
    verbose_name = "Colonies and husbandry"

    def ready(self):
        from . import integrity

        integrity.connect()
        post_migrate.connect(_sync_roles, sender=self, dispatch_uid="vermilog-sync-roles")
        post_migrate.connect(_create_cache_tables, sender=self, dispatch_uid="vermilog-cache-tables")
