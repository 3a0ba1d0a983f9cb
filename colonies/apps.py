from django.apps import AppConfig


class ColoniesConfig(AppConfig):
    name = "colonies"
    verbose_name = "Colonies and husbandry"
