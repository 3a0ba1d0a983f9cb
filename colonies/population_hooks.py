"""Animals that leave a tank or come back to it outside husbandry records.

The trials app draws cohorts from tanks and returns them; colonies must not import it (it depends
on colonies, not the other way round). So it registers a provider here at start-up, and the tank
page asks every provider what moved since the tank's latest estimate.
"""
from collections.abc import Callable
from datetime import datetime

# provider(tank_id, since) -> [(label, signed number of animals), ...]
Provider = Callable[[int, datetime], list[tuple[str, int]]]
_providers: list[Provider] = []


def register(provider: Provider) -> Provider:
    if provider not in _providers:
        _providers.append(provider)
    return provider


def movements_since(tank_id: int, since: datetime) -> list[tuple[str, int]]:
    """What every provider reports for the tank after `since` (one query per provider)."""
    return [item for provider in _providers for item in provider(tank_id, since) if item[1]]
