"""Small, explicit builders for test data. Each saves and returns one object; keywords override defaults.

No JSON fixtures and no factory library: a test shows the few values it cares about and the
builders fill in the rest with plain, valid defaults.
"""
import csv
import html
import io
import itertools

from django.contrib.auth.models import Group, User

from colonies import services
from colonies.models import CareTarget, Check, Room, Species, Tank, TankTarget

_numbers = itertools.count(1)


def _next() -> int:
    return next(_numbers)


def make_user(username: str | None = None, *, role: str | None = None, **overrides) -> User:
    user = User.objects.create_user(username or f"user{_next()}", password="pw", **overrides)
    if role:
        # get_or_create: the groups come from a data migration, which a flushed database lacks.
        user.groups.add(Group.objects.get_or_create(name=role)[0])
    return user


def make_species(*, targets: dict[str, tuple[float | None, float | None]] | None = None, **overrides) -> Species:
    """A species with the given care targets, e.g. targets={"ph": (6.0, 8.0)}."""
    fields = {"scientific_name": f"Testworm species{_next()}", "common_name": "", "habitat": "freshwater"}
    fields.update(overrides)
    species = Species.objects.create(**fields)
    for key, (low, high) in (targets or {}).items():
        CareTarget.objects.create(species=species, parameter=key, low=low, high=high, source="test value")
    return species


def make_room(**overrides) -> Room:
    n = _next()
    fields = {"code": f"room-{n}", "name": f"Room {n}"}
    fields.update(overrides)
    return Room.objects.create(**fields)


def make_tank(**overrides) -> Tank:
    fields = {"code": f"T-{_next():03d}", "volume_l": 2.0}
    fields.update(overrides)
    if "room" not in fields:
        fields["room"] = make_room()
    if "species" not in fields:
        fields["species"] = make_species()
    return Tank.objects.create(**fields)


def make_tank_target(tank: Tank, parameter: str, low: float | None, high: float | None, **overrides) -> TankTarget:
    fields = {"reason": "test override"}
    fields.update(overrides)
    return TankTarget.objects.create(tank=tank, parameter=parameter, low=low, high=high, **fields)


def make_check(tank: Tank, *, user: User, observed_at=None, **row) -> Check:
    """A check saved the way the tank page saves one (flags computed, history row written)."""
    return services.record_check(user=user, tank=tank, row=row, observed_at=observed_at)


def round_data(rows: dict[str, dict], *, listed: list[str] | None = None, **extra) -> dict:
    """POST data of the daily round: {tank code: {field: value}} becomes "<code>-<field>" keys."""
    data = {"tanks": ",".join(listed if listed is not None else rows)}
    for code, fields in rows.items():
        for name, value in fields.items():
            data[f"{code}-{name}"] = value
    data.update(extra)
    return data


def species_edit_data(species: Species, *, reason: str = "Reviewed against the SOP", new_targets=(), new_plans=(),
                      **changes) -> dict:
    """POST data for the species-edit page: the profile as it is, with `changes` and extra target and plan rows
    (new_plans: dicts of MeasurementPlanForm fields)."""
    data = {name: getattr(species, name) for name in (
        "common_name", "habitat", "check_interval_hours", "feeding_interval_days", "water_change_interval_days",
        "water_change_fraction", "census_interval_days", "reserve_min_animals", "notes")}
    data.update({name: getattr(species, name) for name in ("default_food", "default_feeding_unit", "default_source_water")})
    for name in ("max_density_per_l", "default_feeding_amount"):
        data[name] = getattr(species, name) if getattr(species, name) is not None else ""
    data.update(changes)
    targets = list(species.targets.all())
    data.update({"targets-TOTAL_FORMS": len(targets) + len(new_targets), "targets-INITIAL_FORMS": len(targets),
                 "targets-MIN_NUM_FORMS": 0, "targets-MAX_NUM_FORMS": 1000})
    for i, t in enumerate(targets):
        data.update({f"targets-{i}-id": t.pk, f"targets-{i}-species": species.pk, f"targets-{i}-parameter": t.parameter,
                     f"targets-{i}-low": "" if t.low is None else t.low,
                     f"targets-{i}-high": "" if t.high is None else t.high, f"targets-{i}-source": t.source})
    for j, (key, low, high, source) in enumerate(new_targets, start=len(targets)):
        data.update({f"targets-{j}-id": "", f"targets-{j}-species": species.pk, f"targets-{j}-parameter": key,
                     f"targets-{j}-low": low, f"targets-{j}-high": high, f"targets-{j}-source": source})
    plans = list(species.measurement_plans.all())
    data.update({"plans-TOTAL_FORMS": len(plans) + len(new_plans), "plans-INITIAL_FORMS": len(plans),
                 "plans-MIN_NUM_FORMS": 0, "plans-MAX_NUM_FORMS": 1000})
    plan_fields = ("parameter", "cadence", "every_days", "weekday", "after_water_change", "while_deviation_open")
    for i, plan in enumerate([{"id": p.pk, **{f: getattr(p, f) for f in plan_fields}} for p in plans] + list(new_plans)):
        for name, value in {"id": "", "species": species.pk, **plan}.items():
            if value is None or value is False:
                continue  # an empty number, an unticked box: not sent
            data[f"plans-{i}-{name}"] = "on" if value is True else value
    data["reason"] = reason
    return data


def page_text(response) -> str:
    """The response body with HTML entities decoded, for asserting on messages as the user reads them."""
    return html.unescape(response.content.decode())


def csv_rows(response) -> list[list[str]]:
    body = b"".join(response.streaming_content).decode("utf-8")
    return list(csv.reader(io.StringIO(body)))
