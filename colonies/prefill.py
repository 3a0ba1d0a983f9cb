"""What the feeding and water-change forms offer before anything is typed: the tank's last entry of the
same kind, or else its species' defaults. Used by the tank page and the many-tanks screen; runs no query
(the caller passes the last entry it loaded).
"""
from dataclasses import dataclass, field

from django.utils import timezone
from django.utils.dateformat import format as date_format

from .models import Feeding, Species, WaterChange

LAST = "last"
SPECIES = "species"


@dataclass
class Prefill:
    values: dict = field(default_factory=dict)  # form field name -> value as the input shows it
    source: str = ""  # LAST, SPECIES or "" (nothing to offer)
    last_at: object = None  # when the last entry was observed, when the values come from it

    def text(self, what: str) -> str:
        """Where the values come from, for the page ("from the last feeding, 12 Mar 09:10")."""
        if self.source == LAST:
            return f"from the last {what}, {date_format(timezone.localtime(self.last_at), 'j M H:i')}"
        if self.source == SPECIES:
            return "from the species' defaults"
        return f"no earlier {what} and no species default"


def shown(value) -> str:
    """A number as an input shows it: 0.05 not 0.05000000001, 50 not 50.0; empty for None."""
    if value is None:
        return ""
    return f"{value:g}" if isinstance(value, float) else str(value)


def _kept(values: dict) -> dict:
    return {k: v for k, v in values.items() if v not in ("", None)}


def feeding(species: Species, last: Feeding | None) -> Prefill:
    if last is not None:
        return Prefill({"food": last.food, "amount": shown(last.amount), "unit": last.unit}, LAST, last.observed_at)
    values = _kept({"food": species.default_food, "amount": shown(species.default_feeding_amount)})
    if not values:
        return Prefill()
    return Prefill({**values, "unit": species.default_feeding_unit}, SPECIES)


def water_change(species: Species, last: WaterChange | None) -> Prefill:
    """The last change's amount and water, or the species' fraction (as a percent) and default water."""
    if last is not None:
        return Prefill(_kept({"percent": shown(last.percent), "litres": shown(last.litres),
                              "source_water": last.source_water}), LAST, last.observed_at)
    return Prefill(_kept({"percent": shown(round(species.water_change_fraction * 100, 2)),
                          "source_water": species.default_source_water}), SPECIES)
