"""Notices other apps add to Today, e.g. protocols about to expire.

Colonies must not import the trials app (it depends on colonies, not the other way round), so the
trials app registers a provider here from its AppConfig.ready(), as for population_hooks.
"""
from collections.abc import Callable
from dataclasses import dataclass
from datetime import date


@dataclass(frozen=True)
class Notice:
    text: str
    url: str
    detail: str = ""


Provider = Callable[[date], list[Notice]]
_providers: list[Provider] = []


def register(provider: Provider) -> Provider:
    if provider not in _providers:
        _providers.append(provider)
    return provider


def notices(today: date) -> list[Notice]:
    """What every provider has for Today (each provider runs a fixed number of queries)."""
    return [notice for provider in _providers for notice in provider(today)]
