"""Dishes: the group of animals the welfare limits count, and one dish per cohort for the trials so far.

Until now every trial was an exposure of its whole cohort. The faithful translation is one dish per
cohort that has trials, holding all of them, so every exposure count, rest and cumulative dose stays
exactly what it was:

- the dish holds the largest number of animals any of its (not voided) trials used, at most the
  cohort's size; it was set up when the cohort was drawn, by who drew it;
- a cohort that has ended passes its end (kind, time, who, method, note, tank) to its dish. The
  animals a cohort returned now come back by two routes that never overlap (the dish's animals, and
  the cohort's animals never put in a dish), so the return is split: the dish returns as many as it
  holds, at most what the cohort returned, and the cohort keeps the rest. The tank receives the same
  total at the same moment, so no population estimate changes. The cohort's history gets a row saying
  so; every new dish gets its "created" history row.

Trial.dish is then made required. Reversing adds returned dish animals back to their cohort.
"""

import django.db.models.deletion
import django.utils.timezone
import experiments.validators
import simple_history.models
from django.conf import settings
from django.db import migrations, models
from django.db.models import Max, OuterRef, Q, Subquery


REASON = "Migration 0006: one dish per cohort holding all its trials"


def _fire_deferred_checks(schema_editor):
    """Run the deferred foreign-key checks of the rows just written: PostgreSQL refuses to alter a table
    (Trial.dish, next) while it has pending trigger events."""
    if schema_editor.connection.vendor == "postgresql":
        schema_editor.execute("SET CONSTRAINTS ALL IMMEDIATE")
        schema_editor.execute("SET CONSTRAINTS ALL DEFERRED")


def _history_row(model, obj, **extra):
    """A historical row copying `obj`'s current values (historical models have the same attnames)."""
    values = {f.attname: getattr(obj, f.attname) for f in obj._meta.concrete_fields}
    return model(**values, **extra)


def dishes_from_cohorts(apps, schema_editor):
    from django.utils import timezone

    Cohort = apps.get_model("experiments", "Cohort")
    Dish = apps.get_model("experiments", "Dish")
    Trial = apps.get_model("experiments", "Trial")
    HistoricalDish = apps.get_model("experiments", "HistoricalDish")
    HistoricalCohort = apps.get_model("experiments", "HistoricalCohort")
    now = timezone.now()
    # Per cohort with trials: the largest arena among trials that count (any trial when all are voided).
    largest = {row["cohort_id"]: row["counting"] or row["any"] for row in Trial.objects.order_by().values("cohort_id")
               .annotate(counting=Max("animals", filter=Q(voided_at__isnull=True)), any=Max("animals"))}
    dishes, changed = [], []
    for cohort in Cohort.objects.filter(pk__in=list(largest)).order_by("pk"):
        dish = Dish(cohort_id=cohort.pk, number=1, animals=min(largest[cohort.pk], cohort.size),
                    set_up_at=cohort.drawn_at, set_up_by_id=cohort.drawn_by_id)
        if cohort.end:
            dish.end, dish.ended_at, dish.ended_by_id = cohort.end, cohort.ended_at, cohort.ended_by_id
            dish.end_method, dish.end_note = cohort.end_method, cohort.end_note
            if cohort.end == "returned":
                dish.returned_to_id = cohort.returned_to_id
                dish.returned_count = min(cohort.returned_count, dish.animals)
                cohort.returned_count -= dish.returned_count
                changed.append(cohort)
        dishes.append(dish)
    Dish.objects.bulk_create(dishes, batch_size=500)
    HistoricalDish.objects.bulk_create(
        [_history_row(HistoricalDish, d, history_date=now, history_type="+", history_change_reason=REASON)
         for d in Dish.objects.all()], batch_size=500)
    for cohort in changed:
        Cohort.objects.filter(pk=cohort.pk).update(returned_count=cohort.returned_count)
    HistoricalCohort.objects.bulk_create(
        [_history_row(HistoricalCohort, c, history_date=now, history_type="~",
                      history_change_reason=f"{REASON}: animals returned split with dish C-{c.pk:04d}-D1 "
                                            f"({c.returned_count} not in the dish)") for c in changed], batch_size=500)
    Trial.objects.update(dish_id=Subquery(Dish.objects.filter(cohort_id=OuterRef("cohort_id"), number=1)
                                          .values("pk")[:1]))
    _fire_deferred_checks(schema_editor)


def cohorts_from_dishes(apps, schema_editor):
    """Back to one group per cohort: a cohort's returned animals again include those its dishes returned."""
    Cohort = apps.get_model("experiments", "Cohort")
    Dish = apps.get_model("experiments", "Dish")
    Trial = apps.get_model("experiments", "Trial")
    for cohort in Cohort.objects.filter(end="returned"):
        back = sum(d.returned_count or 0 for d in Dish.objects.filter(cohort_id=cohort.pk, end="returned",
                                                                       voided_at__isnull=True))
        if back:
            Cohort.objects.filter(pk=cohort.pk).update(returned_count=min(cohort.size, cohort.returned_count + back))
    Trial.objects.update(dish_id=None)
    _fire_deferred_checks(schema_editor)


class Migration(migrations.Migration):

    dependencies = [
        ('colonies', '0018_history_newest_per_tank'),
        ('experiments', '0005_text_lengths'),
        migrations.swappable_dependency(settings.AUTH_USER_MODEL),
    ]

    operations = [
        migrations.CreateModel(
            name='HistoricalDish',
            fields=[
                ('id', models.BigIntegerField(auto_created=True, blank=True, db_index=True, verbose_name='ID')),
                ('voided_at', models.DateTimeField(blank=True, editable=False, null=True)),
                ('void_reason', models.TextField(blank=True, editable=False)),
                ('number', models.PositiveIntegerField(help_text="The dish's number within its cohort (1, 2, ...).")),
                ('animals', models.PositiveIntegerField(help_text='Animals put in the dish.', validators=[experiments.validators.Within('animals')])),
                ('set_up_at', models.DateTimeField(default=django.utils.timezone.now, help_text='When the animals were put in the dish.')),
                ('end', models.CharField(blank=True, choices=[('returned', 'Returned to a tank'), ('retired', 'Retired'), ('died', 'Died')], max_length=10)),
                ('ended_at', models.DateTimeField(blank=True, null=True)),
                ('returned_count', models.PositiveIntegerField(blank=True, help_text='Animals put back (alive).', null=True)),
                ('end_method', models.CharField(blank=True, help_text='Retired: the method used.', max_length=200)),
                ('end_note', models.TextField(blank=True, max_length=4000)),
                ('history_id', models.AutoField(primary_key=True, serialize=False)),
                ('history_date', models.DateTimeField(db_index=True)),
                ('history_change_reason', models.TextField(null=True)),
                ('history_type', models.CharField(choices=[('+', 'Created'), ('~', 'Changed'), ('-', 'Deleted')], max_length=1)),
            ],
            options={
                'verbose_name': 'historical dish',
                'verbose_name_plural': 'historical dishes',
                'ordering': ('-history_date', '-history_id'),
                'get_latest_by': ('history_date', 'history_id'),
            },
            bases=(simple_history.models.HistoricalChanges, models.Model),
        ),
        migrations.AlterField(
            model_name='historicalprotocol',
            name='max_cumulative_dose_mj_cm2',
            field=models.FloatField(blank=True, help_text='Most light/UV dose one dish of animals may receive in total, mJ/cm². Empty: no light stimulus approved.', null=True, validators=[experiments.validators.Within('dose_mj_cm2')]),
        ),
        migrations.AlterField(
            model_name='historicalprotocol',
            name='max_exposures_per_group',
            field=models.PositiveIntegerField(help_text='Most trials (exposures, sham included) for one dish (group of animals).', validators=[experiments.validators.Within('exposures')]),
        ),
        migrations.AlterField(
            model_name='historicalprotocol',
            name='min_rest_hours',
            field=models.FloatField(default=0, help_text='Least time between two exposures of the same dish, hours.', validators=[experiments.validators.Within('min_rest_hours')]),
        ),
        migrations.AlterField(
            model_name='protocol',
            name='max_cumulative_dose_mj_cm2',
            field=models.FloatField(blank=True, help_text='Most light/UV dose one dish of animals may receive in total, mJ/cm². Empty: no light stimulus approved.', null=True, validators=[experiments.validators.Within('dose_mj_cm2')]),
        ),
        migrations.AlterField(
            model_name='protocol',
            name='max_exposures_per_group',
            field=models.PositiveIntegerField(help_text='Most trials (exposures, sham included) for one dish (group of animals).', validators=[experiments.validators.Within('exposures')]),
        ),
        migrations.AlterField(
            model_name='protocol',
            name='min_rest_hours',
            field=models.FloatField(default=0, help_text='Least time between two exposures of the same dish, hours.', validators=[experiments.validators.Within('min_rest_hours')]),
        ),
        migrations.CreateModel(
            name='Dish',
            fields=[
                ('id', models.BigAutoField(auto_created=True, primary_key=True, serialize=False, verbose_name='ID')),
                ('voided_at', models.DateTimeField(blank=True, editable=False, null=True)),
                ('void_reason', models.TextField(blank=True, editable=False)),
                ('number', models.PositiveIntegerField(help_text="The dish's number within its cohort (1, 2, ...).")),
                ('animals', models.PositiveIntegerField(help_text='Animals put in the dish.', validators=[experiments.validators.Within('animals')])),
                ('set_up_at', models.DateTimeField(default=django.utils.timezone.now, help_text='When the animals were put in the dish.')),
                ('end', models.CharField(blank=True, choices=[('returned', 'Returned to a tank'), ('retired', 'Retired'), ('died', 'Died')], max_length=10)),
                ('ended_at', models.DateTimeField(blank=True, null=True)),
                ('returned_count', models.PositiveIntegerField(blank=True, help_text='Animals put back (alive).', null=True)),
                ('end_method', models.CharField(blank=True, help_text='Retired: the method used.', max_length=200)),
                ('end_note', models.TextField(blank=True, max_length=4000)),
                ('cohort', models.ForeignKey(on_delete=django.db.models.deletion.PROTECT, related_name='dishes', to='experiments.cohort')),
                ('ended_by', models.ForeignKey(blank=True, null=True, on_delete=django.db.models.deletion.PROTECT, related_name='+', to=settings.AUTH_USER_MODEL)),
                ('returned_to', models.ForeignKey(blank=True, null=True, on_delete=django.db.models.deletion.PROTECT, related_name='dishes_returned', to='colonies.tank')),
                ('set_up_by', models.ForeignKey(on_delete=django.db.models.deletion.PROTECT, related_name='+', to=settings.AUTH_USER_MODEL)),
                ('voided_by', models.ForeignKey(blank=True, editable=False, null=True, on_delete=django.db.models.deletion.PROTECT, related_name='+', to=settings.AUTH_USER_MODEL)),
            ],
            options={
                'verbose_name_plural': 'dishes',
                'ordering': ['cohort_id', 'number'],
                'get_latest_by': 'set_up_at',
            },
        ),
        migrations.AddField(
            model_name='historicaltrial',
            name='dish',
            field=models.ForeignKey(blank=True, db_constraint=False, help_text="The group of animals exposed; always a dish of the trial's cohort.", null=True, on_delete=django.db.models.deletion.DO_NOTHING, related_name='+', to='experiments.dish'),
        ),
        migrations.AddField(
            model_name='trial',
            name='dish',
            field=models.ForeignKey(help_text="The group of animals exposed; always a dish of the trial's cohort.", null=True, on_delete=django.db.models.deletion.PROTECT, related_name='trials', to='experiments.dish'),
        ),
        migrations.AddIndex(
            model_name='trial',
            index=models.Index(fields=['dish', 'run_at'], name='trial_dish_run'),
        ),
        migrations.AddField(
            model_name='historicaldish',
            name='cohort',
            field=models.ForeignKey(blank=True, db_constraint=False, null=True, on_delete=django.db.models.deletion.DO_NOTHING, related_name='+', to='experiments.cohort'),
        ),
        migrations.AddField(
            model_name='historicaldish',
            name='ended_by',
            field=models.ForeignKey(blank=True, db_constraint=False, null=True, on_delete=django.db.models.deletion.DO_NOTHING, related_name='+', to=settings.AUTH_USER_MODEL),
        ),
        migrations.AddField(
            model_name='historicaldish',
            name='history_user',
            field=models.ForeignKey(null=True, on_delete=django.db.models.deletion.SET_NULL, related_name='+', to=settings.AUTH_USER_MODEL),
        ),
        migrations.AddField(
            model_name='historicaldish',
            name='returned_to',
            field=models.ForeignKey(blank=True, db_constraint=False, null=True, on_delete=django.db.models.deletion.DO_NOTHING, related_name='+', to='colonies.tank'),
        ),
        migrations.AddField(
            model_name='historicaldish',
            name='set_up_by',
            field=models.ForeignKey(blank=True, db_constraint=False, null=True, on_delete=django.db.models.deletion.DO_NOTHING, related_name='+', to=settings.AUTH_USER_MODEL),
        ),
        migrations.AddField(
            model_name='historicaldish',
            name='voided_by',
            field=models.ForeignKey(blank=True, db_constraint=False, editable=False, null=True, on_delete=django.db.models.deletion.DO_NOTHING, related_name='+', to=settings.AUTH_USER_MODEL),
        ),
        migrations.AddIndex(
            model_name='dish',
            index=models.Index(fields=['returned_to', 'ended_at'], name='dish_returned_ended'),
        ),
        migrations.AddConstraint(
            model_name='dish',
            constraint=models.UniqueConstraint(fields=('cohort', 'number'), name='dish_number_unique_in_cohort'),
        ),
        migrations.AddConstraint(
            model_name='dish',
            constraint=models.CheckConstraint(condition=models.Q(('animals__gte', 1)), name='dish_animals_positive'),
        ),
        migrations.AddConstraint(
            model_name='dish',
            constraint=models.CheckConstraint(condition=models.Q(('animals__isnull', True), models.Q(('animals__gte', 1), ('animals__lte', 100000)), _connector='OR'), name='dish_animals_bounds'),
        ),
        migrations.AddConstraint(
            model_name='dish',
            constraint=models.CheckConstraint(condition=models.Q(('returned_count__isnull', True), ('returned_count__lte', models.F('animals')), _connector='OR'), name='dish_returned_not_above_animals'),
        ),
        migrations.AddConstraint(
            model_name='dish',
            constraint=models.CheckConstraint(condition=models.Q(models.Q(('end', 'returned'), _negated=True), models.Q(('returned_count__isnull', False), ('returned_to__isnull', False)), _connector='OR'), name='dish_returned_has_tank_and_count'),
        ),
        migrations.AddConstraint(
            model_name='dish',
            constraint=models.CheckConstraint(condition=models.Q(('end', ''), ('ended_at__isnull', False), _connector='OR'), name='dish_end_has_time'),
        ),
        migrations.AlterField(
            model_name='cohort',
            name='end',
            field=models.CharField(blank=True, choices=[('returned', 'Returned to a tank'), ('retired', 'Retired'), ('died', 'Died'), ('dishes', 'All animals went into dishes')], max_length=10),
        ),
        migrations.AlterField(
            model_name='historicalcohort',
            name='end',
            field=models.CharField(blank=True, choices=[('returned', 'Returned to a tank'), ('retired', 'Retired'), ('died', 'Died'), ('dishes', 'All animals went into dishes')], max_length=10),
        ),
        migrations.RunPython(dishes_from_cohorts, cohorts_from_dishes),
        migrations.AlterField(
            model_name='trial',
            name='dish',
            field=models.ForeignKey(help_text="The group of animals exposed; always a dish of the trial's cohort.", on_delete=django.db.models.deletion.PROTECT, related_name='trials', to='experiments.dish'),
        ),
    ]
