from django.db import migrations


def forwards(apps, schema_editor):
    from colonies import care_defaults
    from colonies.roles import ALL_ROLES

    Group = apps.get_model("auth", "Group")
    for name in ALL_ROLES:
        Group.objects.get_or_create(name=name)
    care_defaults.install(apps.get_model("colonies", "Species"), apps.get_model("colonies", "CareTarget"))


class Migration(migrations.Migration):
    dependencies = [
        ("colonies", "0001_initial"),
        ("auth", "0012_alter_user_first_name_max_length"),
    ]

    operations = [migrations.RunPython(forwards, migrations.RunPython.noop)]
