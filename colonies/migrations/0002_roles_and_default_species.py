from django.db import migrations
from django.utils import timezone


def _record_creation(historical_model, obj, when, reason):
    """Migrations do not fire django-simple-history's signals: write the 'created' version ourselves,
    so the default profiles have a history like everything else."""
    fields = {f.attname: getattr(obj, f.attname) for f in obj._meta.concrete_fields}
    historical_model.objects.create(**fields, history_date=when, history_type="+", history_change_reason=reason)


def forwards(apps, schema_editor):
    from colonies import care_defaults
    from colonies.roles import ALL_ROLES

    Group = apps.get_model("auth", "Group")
    for name in ALL_ROLES:
        Group.objects.get_or_create(name=name)
    Species = apps.get_model("colonies", "Species")
    CareTarget = apps.get_model("colonies", "CareTarget")
    existing = set(Species.objects.values_list("pk", flat=True))
    care_defaults.install(Species, CareTarget)
    when = timezone.now()
    reason = "Default profile shipped with Vermilog"
    for species in Species.objects.exclude(pk__in=existing):
        _record_creation(apps.get_model("colonies", "HistoricalSpecies"), species, when, reason)
        for target in CareTarget.objects.filter(species=species):
            _record_creation(apps.get_model("colonies", "HistoricalCareTarget"), target, when, reason)


class Migration(migrations.Migration):
    dependencies = [
        ("colonies", "0001_initial"),
        ("auth", "0012_alter_user_first_name_max_length"),
    ]

    operations = [migrations.RunPython(forwards, migrations.RunPython.noop)]
