"""Loading a tank's (or every tank's) population series, deaths and plot rows, and the data
versions that key the plot cache. Each function runs a fixed number of queries whatever the number
of tanks or records; the numbers are computed by colonies/growth.py (pure).
"""
import hashlib
from collections import defaultdict
from datetime import datetime, time, timedelta

from django.core.cache import cache
from django.db.models import Count, Max, OuterRef, Q, Subquery, Sum
from django.utils import timezone

from . import growth, parameters, population, population_hooks
from .growth import Point
from .models import (CareTarget, Census, Check, DeadRemoval, Deviation, Feeding, Room, Species, Split, SplitPart,
                     Tank, TankTarget, WaterChange)

FIT_CACHE_SECONDS = 7 * 24 * 3600
METHOD_LABELS = dict(Census.Method.choices)
STEP = timedelta(seconds=1)  # a split is drawn as a step: the estimate just before it, then after it


def load_points(tank_ids, since: datetime | None = None) -> dict[int, list[Point]]:
    """Every tank's population estimates, oldest first, in three queries whatever the number of tanks.

    A split is a step: the estimate just before it and the estimate after it. A split into an
    existing tank adds the animals moved to that tank's previous estimate. One pass per tank over
    its own rows (the animals moved in are grouped by destination first).

    With `since` (the overview), a tank's points start at its last census before `since`: the
    points from `since` on, and the one before that animal-days and the latest estimate need, are
    those of the whole history (tests/colonies/test_health_series.py). One query more finds each
    tank's last census before `since`; splits are few and all read. Ties in time keep the order of
    saving (then id), so the window and the whole history agree on which estimate is the latest.
    """
    ids = list(tank_ids)
    bounds = _last_census_before(ids, since) if since is not None else {}
    censuses = Census.objects.current().filter(tank_id__in=ids, estimate__isnull=False).order_by()
    if since is not None:
        censuses = censuses.filter(observed_at__gte=min([since, *bounds.values()]))
    raw: dict[int, list[tuple]] = {pk: [] for pk in ids}
    for tank_id, at, value, low, high, method, pk in censuses.values_list(
            "tank_id", "observed_at", "estimate", "estimate_lower", "estimate_upper", "method", "pk"):
        if since is None or at >= bounds.get(tank_id, since):
            raw[tank_id].append((at, 0, pk, Point(at, value, low, high, "census", METHOD_LABELS[method])))
    for tank_id, at, before, stayed, pk in (Split.objects.current().filter(source_id__in=ids).order_by()
                                            .values_list("source_id", "split_at", "source_before", "stayed", "pk")):
        raw[tank_id].append((at - STEP, 1, pk, Point(at - STEP, before, None, None, "before-split")))
        raw[tank_id].append((at, 1, pk, Point(at, stayed, None, None, "split", "left after a split")))
    moved_in = defaultdict(list)
    for tank_id, at, animals, created, source in (
            SplitPart.objects.filter(destination_id__in=ids, split__voided_at__isnull=True).order_by()
            .values_list("destination_id", "split__split_at", "animals", "created_tank", "split__source__code")):
        moved_in[tank_id].append((at, animals, created, source))
    points = {tank_id: _with_moves_in([p for *_, p in sorted(items, key=lambda i: i[:3])],
                                      sorted(moved_in.get(tank_id, ()), key=lambda m: m[0]))
              for tank_id, items in raw.items()}
    # A split into an existing tank at the very moment of the tank's last census before `since`
    # would add to an estimate older than the window: read that tank's whole history (never seen
    # in practice, but the window must equal the whole history).
    exact_again = [tank_id for tank_id, moves in moved_in.items()
                   if any(not created and at == bounds.get(tank_id) for at, _, created, _ in moves)]
    if exact_again:
        points.update(load_points(exact_again))
    return {tank_id: [p for p in tank_points if tank_id in exact_again or p.at >= bounds.get(tank_id, p.at)]
            for tank_id, tank_points in points.items()}


def _last_census_before(tank_ids: list[int], since: datetime) -> dict[int, datetime]:
    """Per tank, the time of its last census (with an estimate) before `since`; tanks with none are
    left out. One query: a seek on the (tank, time) index per tank."""
    last = (Census.objects.current().filter(tank_id=OuterRef("pk"), estimate__isnull=False, observed_at__lt=since)
            .order_by("-observed_at").values("observed_at")[:1])
    return {pk: at for pk, at in Tank.objects.filter(pk__in=tank_ids).annotate(at=Subquery(last))
            .values_list("pk", "at") if at is not None}


def _with_moves_in(points: list[Point], moves: list[tuple]) -> list[Point]:
    for at, animals, created, source in moves:
        earlier = [p for p in points if p.at < at]
        if created:
            points.append(Point(at, animals, None, None, "split", f"set up from {source}"))
        elif earlier:
            prior = earlier[-1].value
            points.append(Point(at - STEP, prior, None, None, "before-split"))
            points.append(Point(at, prior + animals, None, None, "split", f"{animals:.0f} added from {source}"))
        points.sort(key=lambda p: p.at)
    return points


def check_counts(tank_ids, start, end) -> dict[int, dict]:
    """Per tank: dead removed, checks and checks with a flagged value over [start, end] (two queries).

    `dead` is every death recorded in the period, each once: the counts at checks plus the dead-animal
    removals outside the round (a removal is not a check, so it adds nothing to `checks`).
    """
    ids = list(tank_ids)
    rows = {r["tank_id"]: r for r in (
        Check.objects.current().filter(tank_id__in=ids, observed_at__gte=start, observed_at__lte=end)
        .values("tank_id").annotate(dead=Sum("dead_removed"), checks=Count("id"), flagged=Count("id", filter=~Q(flags={}))))}
    for tank_id, removed in (DeadRemoval.objects.current().filter(tank_id__in=ids, observed_at__gte=start, observed_at__lte=end)
                             .values("tank_id").annotate(n=Sum("count")).values_list("tank_id", "n")):
        row = rows.setdefault(tank_id, {"tank_id": tank_id, "dead": 0, "checks": 0, "flagged": 0})
        row["dead"] = (row["dead"] or 0) + removed
    return rows


def started_at(tank: Tank) -> datetime:
    """The start of the tank's first day (local midnight)."""
    return timezone.make_aware(datetime.combine(tank.started_on, time.min))


FITS_KEY = "vermilog:growth-fits"  # one shared cache entry: {digest of a fit's inputs: Growth}
SHARED_FITS = 2048  # fits kept in it (newest last), a few hundred bytes each


def fits(usables: dict) -> dict:
    """growth.fit_usable of each series (any keys, e.g. tank ids), shared between processes.

    Each fit is found by its inputs (the estimates it uses), so a stored fit is never stale: first in
    this process's memory, then in one cache entry that every worker shares (one read however many
    tanks miss), else fitted (~3 ms each) and written back in one write. One entry rather than one per
    tank, so the overview costs one cache read and the figures' entries are not crowded out. Two
    workers writing at once may lose each other's new fits: they are fitted again, never wrong.
    """
    out, missing = {}, {}
    for key, usable in usables.items():
        found = growth.remembered(usable)
        if found is None:
            missing[key] = usable
        else:
            out[key] = found
    if not missing:
        return out
    shared = cache.get(FITS_KEY) or {}
    added = False
    for key, usable in missing.items():
        digest = hashlib.sha256(repr((usable, growth.FIT_WINDOW_DAYS)).encode()).hexdigest()
        found = shared.get(digest)
        if found is None:
            found = shared[digest] = growth.fit_usable(usable)
            added = True
        else:
            growth.remember(usable, found)
        out[key] = found
    if added:
        cache.set(FITS_KEY, dict(list(shared.items())[-SHARED_FITS:]), FIT_CACHE_SECONDS)
    return out


def fit(points, now: datetime) -> growth.Growth:
    """One series' fit (see fits)."""
    return fits({0: growth.usable_points(points, now)})[0]


def summarize(tank: Tank, points, deaths: int, now: datetime, mortality_days: int,
              fitted: growth.Growth | None = None) -> growth.Summary:
    return growth.summarize(tank, points, deaths, now, started_at(tank), mortality_days,
                            fitted or fit(points, now))


def tank_summary(tank: Tank, now: datetime | None = None,
                 mortality_days: int = growth.DEFAULT_MORTALITY_DAYS) -> growth.Summary:
    """The tank page's population summary and splits: six queries whatever the tank's history."""
    now = now or timezone.now()
    points = load_points([tank.pk])[tank.pk]
    dead = check_counts([tank.pk], now - timedelta(days=mortality_days), now).get(tank.pk, {}).get("dead") or 0
    summary = summarize(tank, points, dead, now, mortality_days)
    summary.splits = split_rows(tank.splits_out.current().prefetch_related("parts__destination")[:10])
    if summary.latest:
        summary.movements = population_hooks.movements_since(tank.pk, summary.latest.at)
    return summary


def split_rows(splits) -> list[dict]:
    rows = []
    for split in splits:
        parts = list(split.parts.all())
        balance = population.split_balance(split.source_before, [split.stayed] + [p.animals for p in parts])
        rows.append({"split": split, "parts": parts, "balance": balance,
                     "difference_pct": 100 * balance.relative_difference})
    return rows


# ---------------------------------------------------------------------------------------------
# Cache keys: a version that changes with any record of the tank
# ---------------------------------------------------------------------------------------------
def _newest(history_qs, **match):
    return Subquery(history_qs.filter(**match).order_by("-history_id").values("history_id")[:1])


def records_versions(tank_ids) -> dict[int, str]:
    """Per tank, a string that changes whenever anything its plots show changes (one query).

    History rows are only ever added (saves, corrections and voids each add one), so the newest
    history id of each record type is a version that cannot go back.
    """
    pk = OuterRef("pk")
    split_ids_in = SplitPart.objects.filter(destination_id=OuterRef(OuterRef("pk"))).values("split_id")
    rows = Tank.objects.filter(pk__in=list(tank_ids)).annotate(
        v_tank=_newest(Tank.history, id=pk),
        v_check=_newest(Check.history, tank_id=pk),
        v_feeding=_newest(Feeding.history, tank_id=pk),
        v_water=_newest(WaterChange.history, tank_id=pk),
        v_census=_newest(Census.history, tank_id=pk),
        v_removal=_newest(DeadRemoval.history, tank_id=pk),
        v_split_out=_newest(Split.history, source_id=pk),
        v_split_in=_newest(Split.history, id__in=split_ids_in),
        v_part=_newest(SplitPart.history, destination_id=pk),
        v_override=_newest(TankTarget.history, tank_id=pk),
        v_species=_newest(Species.history, id=OuterRef("species_id")),
        v_targets=_newest(CareTarget.history, species_id=OuterRef("species_id")),
        v_room=_newest(Room.history, id=OuterRef("room_id")),
    ).values_list("pk", "v_tank", "v_check", "v_feeding", "v_water", "v_census", "v_removal", "v_split_out", "v_split_in",
                  "v_part", "v_override", "v_species", "v_targets", "v_room")
    return {row[0]: ".".join(str(v or 0) for v in row[1:]) for row in rows}


# Every record type that the overview shows (its tanks, rooms, species and targets, censuses, splits,
# checks, dead-animal removals and deviations). History rows are only ever added, so the newest history id of each is a
# version of the whole facility that changes with any save, correction or void.
FACILITY_HISTORIES = (Tank, Room, Species, CareTarget, TankTarget, Census, Split, SplitPart, Check, DeadRemoval,
                      Deviation)


def facility_version() -> str:
    """The newest history id of each record type the overview shows: one indexed max() per
    history table (eleven small queries), whatever the number of tanks and records."""
    return ".".join(str(model.history.aggregate(v=Max("history_id"))["v"] or 0) for model in FACILITY_HISTORIES)


def window(days: int) -> tuple[datetime, datetime]:
    """[start, end) of the last `days` days in whole local days, so a plot is the same all day long."""
    end = timezone.make_aware(datetime.combine(timezone.localdate() + timedelta(days=1), time.min))
    return end - timedelta(days=days), end


def local(dt: datetime) -> datetime:
    return timezone.localtime(dt)


def tank_plot_rows(tank: Tank, start: datetime, end: datetime, now: datetime | None = None) -> list[dict]:
    """The tidy rows behind a tank's health figure (charts.TANK_COLUMNS); a fixed number of queries."""
    now = now or timezone.now()
    rows: list[dict] = []
    points = load_points([tank.pk])[tank.pk]
    for p in points:
        if start <= p.at <= end and p.kind != "before-split":
            rows.append({"series": "population", "at": local(p.at), "value": p.value, "lower": p.lower,
                         "upper": p.upper, "unit": "animals", "note": "split" if p.kind == "split" else "census",
                         "label": p.note})
    fitted = fit(points, min(now, end))
    if fitted.fit is not None:
        first = max(start, fitted.t0)
        steps = 60
        span = (min(end, now) - first) / steps
        for i in range(steps + 1):
            when = first + span * i
            rows.append({"series": "fit", "at": local(when), "value": fitted.at(when), "unit": "animals",
                         "note": fitted.fit.model})
    if tank.species.max_density_per_l:
        rows.append({"series": "capacity", "at": local(start), "unit": "animals",
                     "value": tank.species.max_density_per_l * tank.volume_l,
                     "note": f"{tank.species.max_density_per_l} animals/L x {tank.volume_l:g} L"})
    targets = tank.care_targets()
    keys = [p.key for p in tank.relevant_parameters()]
    checks = (tank.check_set.current().filter(observed_at__gte=start, observed_at__lt=end).order_by("observed_at")
              .values("observed_at", "dead_removed", "flags", *keys))
    dead_by_day: dict = {}
    for c in checks:
        day = local(c["observed_at"]).date()
        dead_by_day[day] = dead_by_day.get(day, 0) + (c["dead_removed"] or 0)
        for key in keys:
            if c[key] is None:
                continue
            p = parameters.BY_KEY[key]
            target = targets.get(key)
            flag = (c["flags"] or {}).get(key) or {}
            rows.append({"series": "reading", "at": local(c["observed_at"]), "parameter": key, "label": p.label,
                         "unit": p.unit, "value": c[key],
                         "target_low": target.low if target else None, "target_high": target.high if target else None,
                         "flagged": flag.get("side", "")})
    for at, count in (tank.deadremoval_set.current().filter(observed_at__gte=start, observed_at__lt=end)
                      .values_list("observed_at", "count")):
        day = local(at).date()
        dead_by_day[day] = dead_by_day.get(day, 0) + count
    for day, dead in sorted(dead_by_day.items()):
        rows.append({"series": "deaths", "at": timezone.make_aware(datetime.combine(day, time(12))), "value": dead,
                     "unit": "animals/day"})
    for at, amount, unit, food in (tank.feeding_set.current().filter(observed_at__gte=start, observed_at__lt=end)
                                   .values_list("observed_at", "amount", "unit", "food")):
        rows.append({"series": "feeding", "at": local(at), "value": amount, "unit": unit, "note": food})
    for at, percent, litres in (tank.waterchange_set.current().filter(observed_at__gte=start, observed_at__lt=end)
                                .values_list("observed_at", "percent", "litres")):
        rows.append({"series": "water_change", "at": local(at), "value": percent if percent is not None else litres,
                     "unit": "%" if percent is not None else "L"})
    for p in points:
        if p.kind == "split" and start <= p.at <= end:
            rows.append({"series": "split", "at": local(p.at), "value": p.value, "unit": "animals", "note": p.note})
    return rows

