from django.db import migrations


def forwards(apps, schema_editor):
    """Give the role groups their back-office permissions (colonies.roles.ROLE_PERMISSIONS).

    Permissions are normally created after all migrations (post_migrate); create them now so a new
    database can be granted them here. ColoniesConfig.ready re-applies the same list after every migrate.
    """
    from django.contrib.auth.management import create_permissions

    from colonies.roles import sync_role_groups

    for app_config in apps.get_app_configs():
        app_config.models_module = True
        create_permissions(app_config, apps=apps, verbosity=0)
        app_config.models_module = None
    # Models added by later migrations do not exist here yet; their permissions come with the sync after migrate.
    sync_role_groups(apps.get_model("auth", "Group"), apps.get_model("auth", "Permission"), skip_missing=True)


class Migration(migrations.Migration):
    dependencies = [
        ("colonies", "0007_submission_keys"),
        ("experiments", "0001_initial"),
        ("auth", "0012_alter_user_first_name_max_length"),
        ("contenttypes", "0002_remove_content_type_name"),
    ]

    operations = [migrations.RunPython(forwards, migrations.RunPython.noop)]
