from django.apps import AppConfig


class ExperimentsConfig(AppConfig):
    name = "experiments"
    verbose_name = "Experiments"

    def ready(self):
        from colonies import population_hooks

        from .services import cohort_movements

        population_hooks.register(cohort_movements)
