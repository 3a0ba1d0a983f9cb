from django.apps import AppConfig


class ExperimentsConfig(AppConfig):
    name = "experiments"
    verbose_name = "Experiments"

    def ready(self):
        from colonies import population_hooks, today_hooks

        from .protocols import today_notices
        from .services import cohort_movements

        population_hooks.register(cohort_movements)
        today_hooks.register(today_notices)
