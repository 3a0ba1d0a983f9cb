"""Comparing readings with care targets. Pure functions; the round, the tank page and the
deviation rules all call these, so a value is flagged the same way everywhere."""
from dataclasses import dataclass

import numpy as np

from . import derived


@dataclass(frozen=True)
class Target:
    low: float | None
    high: float | None
    source: str = ""  # "species" or "tank" (an override)

    def text(self, unit: str = "") -> str:
        suffix = f" {unit}" if unit else ""
        if self.low is not None and self.high is not None:
            return f"{self.low:g}–{self.high:g}{suffix}"
        if self.low is not None:
            return f"≥ {self.low:g}{suffix}"
        if self.high is not None:
            return f"≤ {self.high:g}{suffix}"
        return "no target"


def limit_text(target: "Target", unit: str = "") -> str:
    """The target's limits without a comparison sign, for "▲ above …" / "▼ below …"."""
    suffix = f" {unit}" if unit else ""
    if target.low is not None and target.high is not None:
        return f"{target.low:g}–{target.high:g}{suffix}"
    limit = target.low if target.low is not None else target.high
    return f"{limit:g}{suffix}" if limit is not None else "no target"


def out_of_target(value: float | None, target: Target | None) -> str | None:
    """Return "low" or "high" when value lies outside the target, else None (missing value or no target)."""
    if value is None or target is None:
        return None
    if target.low is not None and value < target.low:
        return "low"
    if target.high is not None and value > target.high:
        return "high"
    return None


def sides(values: np.ndarray, low: np.ndarray, high: np.ndarray) -> np.ndarray:
    """out_of_target over arrays: -1 below the low end, 1 above the high end, 0 inside.

    NaN stands for a missing value or an open end and compares false, as None does above.
    """
    return np.where(values < low, -1, np.where(values > high, 1, 0))


def flags_for(readings: dict[str, float | None], targets: dict[str, Target]) -> dict[str, dict]:
    """The flags stored on a check: one entry per out-of-target reading, with the target in force then.

    Stored (not recomputed) so that a later change of targets does not rewrite what the technician
    was shown when the value was logged.
    """
    flags = {}
    for key, value in readings.items():
        target = targets.get(key)
        side = out_of_target(value, target)
        if side:
            flags[key] = {"value": value, "side": side, "low": target.low, "high": target.high}
    return flags


def describe(key: str, flag: dict) -> str:
    p = derived.label_for(key)
    target = Target(flag.get("low"), flag.get("high"))
    word = "below" if flag["side"] == "low" else "above"
    return f"{p.label} {p.format(flag['value'])} {p.unit} is {word} the care target {target.text(p.unit)}".replace("  ", " ")
