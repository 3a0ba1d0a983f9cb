"""Population and colony health: the tank page's population summary, splits and lineage, the
health plots (SVG/PNG/CSV, cached) and the facility overview.

The numbers come from colonies/population.py and the pictures from colonies/charts.py (both
pure); this module only loads rows in a fixed number of queries and picks what to show.
The split forms live here beside their view because nothing else uses them.
"""
import hashlib
import math
import statistics
from dataclasses import dataclass, field
from datetime import datetime, time, timedelta

from django import forms
from django.contrib import messages
from django.core.cache import cache
from django.db.models import Count, OuterRef, Q, Subquery, Sum
from django.http import Http404, HttpResponse
from django.shortcuts import get_object_or_404, redirect, render
from django.utils import timezone
from django.views.decorators.http import require_GET, require_http_methods, require_POST

from . import charts, parameters, population, population_hooks, services
from .models import (CareTarget, Census, Check, Deviation, Feeding, Species, Split, SplitPart, Tank, TankTarget,
                     WaterChange, tank_code_validator)
from .idempotency import once_per_submission
from .roles import RESEARCHER, TECHNICIAN, role_required
from .validators import MAX_ANIMALS, MAX_TEXT, NamedErrorsMixin, check_moment

READ_ROLES = (TECHNICIAN, RESEARCHER)
PERIOD_DAYS = (30, 60, 120, 365)  # the period chooser's allow-list
DEFAULT_PLOT_DAYS = 120
DEFAULT_MORTALITY_DAYS = 30
FIT_WINDOW_DAYS = 120  # growth is fitted on the censuses of the last 120 days
LOGISTIC_MIN_POINTS = 6  # fewer points cannot tell a logistic curve from an exponential one
FORECAST_HORIZON_DAYS = 365
MORTALITY_WATCH_FACTOR = 2.0  # overview: "watch" a tank dying at twice its species' median rate (lab setting)
FLAGGED_WATCH_PCT = 20.0  # overview: "watch" when a fifth of the checks had a value outside target (lab setting)
CACHE_SECONDS = 24 * 3600


# ---------------------------------------------------------------------------------------------
# Population series of a tank: censuses and splits
# ---------------------------------------------------------------------------------------------
@dataclass(frozen=True)
class Point:
    at: datetime
    value: float
    lower: float | None
    upper: float | None
    kind: str  # "census"; "split" (after a split, out or in); "before-split" (for animal-days only)
    note: str = ""


def load_points(tank_ids) -> dict[int, list[Point]]:
    """Every tank's population estimates, oldest first, in three queries whatever the number of tanks.

    A split is a step: the estimate just before it and the estimate after it. A split into an
    existing tank adds the animals moved to that tank's previous estimate.
    """
    ids = list(tank_ids)
    raw: dict[int, list[tuple]] = {pk: [] for pk in ids}
    for tank_id, at, value, low, high, method in (
            Census.objects.current().filter(tank_id__in=ids, estimate__isnull=False)
            .values_list("tank_id", "observed_at", "estimate", "estimate_lower", "estimate_upper", "method")):
        raw[tank_id].append((at, 0, Point(at, value, low, high, "census", Census.Method(method).label)))
    step = timedelta(seconds=1)
    for tank_id, at, before, stayed in (Split.objects.current().filter(source_id__in=ids)
                                        .values_list("source_id", "split_at", "source_before", "stayed")):
        raw[tank_id].append((at - step, 1, Point(at - step, before, None, None, "before-split")))
        raw[tank_id].append((at, 1, Point(at, stayed, None, None, "split", "left after a split")))
    moved_in = []
    for tank_id, at, animals, created, source in (
            SplitPart.objects.filter(destination_id__in=ids, split__voided_at__isnull=True)
            .values_list("destination_id", "split__split_at", "animals", "created_tank", "split__source__code")):
        moved_in.append((tank_id, at, animals, created, source))
    out = {}
    for tank_id, items in raw.items():
        points = [p for *_, p in sorted(items, key=lambda i: (i[0], i[1]))]
        for dest, at, animals, created, source in sorted(moved_in, key=lambda m: m[1]):
            if dest != tank_id:
                continue
            earlier = [p for p in points if p.at < at]
            if created:
                points.append(Point(at, animals, None, None, "split", f"set up from {source}"))
            elif earlier:
                prior = earlier[-1].value
                points.append(Point(at - step, prior, None, None, "before-split"))
                points.append(Point(at, prior + animals, None, None, "split", f"{animals:.0f} added from {source}"))
            points.sort(key=lambda p: p.at)
        out[tank_id] = points
    return out


@dataclass(frozen=True)
class Growth:
    fit: population.GrowthFit | None
    t0: datetime | None
    n_points: int
    note: str  # why this model, or why no fit

    def at(self, when: datetime) -> float | None:
        if self.fit is None:
            return None
        return self.fit.predict((when - self.t0).total_seconds() / 86400)

    @property
    def rate_text(self) -> str:
        f = self.fit
        if f is None:
            return ""
        lo, hi = f.rate_ci
        return f"{f.rate_per_day:.3f} per day (95 % CI {lo:.3f} to {hi:.3f})"

    @property
    def doubling_text(self) -> str:
        f = self.fit
        if f is None or f.doubling_time_days is None:
            return "not doubling (rate at or below zero)" if f is not None else ""
        text = f"{f.doubling_time_days:.1f} days"
        if f.doubling_time_ci:
            lo, hi = f.doubling_time_ci
            text += f" (95 % CI {lo:.1f} to {'unbounded' if math.isinf(hi) else f'{hi:.1f}'})"
        return text


def _aicc_log(y, predicted, k: int) -> float:
    # Both models compared on ln(count), the scale of multiplicative counting error; k counts the
    # residual variance too. Small-sample corrected AIC (Hurvich & Tsai 1989).
    n = len(y)
    if any(not (math.isfinite(b) and b > 0) for b in predicted):
        return math.inf  # a curve predicting no (or infinitely many) animals at a count cannot win on ln(count)
    sse = sum((math.log(a) - math.log(b)) ** 2 for a, b in zip(y, predicted))
    sse = max(sse, 1e-12)
    return n * math.log(sse / n) + 2 * k + (2 * k * (k + 1)) / max(n - k - 1, 1)


def fit_points(points: list[Point], now: datetime, window_days: int = FIT_WINDOW_DAYS) -> Growth:
    """Fit growth to the tank's estimates of the last `window_days`, from its latest split on.

    Exponential by default; logistic when there are at least LOGISTIC_MIN_POINTS points and it
    fits better by AICc on ln(count).
    """
    since = now - timedelta(days=window_days)
    usable = [p for p in points if p.kind != "before-split" and since <= p.at <= now]
    resets = [i for i, p in enumerate(usable) if p.kind == "split"]
    if resets:
        usable = usable[resets[-1]:]  # a split changes the culture: fit from the animals left after it
    if len(usable) < 3:
        return Growth(None, None, len(usable),
                      f"needs at least 3 estimates in the last {window_days} days since the latest split; "
                      f"{len(usable)} available")
    t0 = usable[0].at
    days = [(p.at - t0).total_seconds() / 86400 for p in usable]
    counts = [p.value for p in usable]
    try:
        exponential = population.fit_growth(days, counts, "exponential")
    except ValueError as error:
        exponential, why = None, str(error)
    logistic = None
    if len(usable) >= LOGISTIC_MIN_POINTS:
        try:
            logistic = population.fit_growth(days, counts, "logistic")
        except ValueError:
            logistic = None
    if exponential is None and logistic is None:
        return Growth(None, None, len(usable), f"no curve could be fitted ({why})")
    if exponential is None:
        return Growth(logistic, t0, len(usable), "logistic: an exponential fit is impossible with a zero count")
    if logistic is None:
        why = ("exponential (default)" if len(usable) < LOGISTIC_MIN_POINTS
               else "exponential: the logistic curve could not be fitted (counts not levelling off)")
        return Growth(exponential, t0, len(usable), why)
    if 0 in counts:
        return Growth(logistic, t0, len(usable), "logistic: counts include zero")
    aicc_exp = _aicc_log(counts, [exponential.predict(d) for d in days], 3)
    aicc_log = _aicc_log(counts, [logistic.predict(d) for d in days], 4)
    if aicc_log < aicc_exp:
        return Growth(logistic, t0, len(usable), "logistic: levels off, fits better than exponential (AICc)")
    return Growth(exponential, t0, len(usable), "exponential: fits as well as logistic (AICc)")


@dataclass(frozen=True)
class Mortality:
    deaths: int
    animal_days: float | None
    rate: float | None  # deaths per 1000 animal-days
    start: datetime
    end: datetime

    @property
    def days(self) -> int:
        return round((self.end - self.start).total_seconds() / 86400)


def mortality(points: list[Point], deaths: int, start: datetime, end: datetime, started_on=None) -> Mortality:
    """Deaths per 1000 animal-days over [start, end]; exposure from the estimates (trapezoid rule,
    population.animal_days), from the tank's start date if it started within the period."""
    if started_on is not None:
        start = max(start, timezone.make_aware(datetime.combine(started_on, time.min)))
    series = {}
    for p in points:
        series[(p.at - start).total_seconds() / 86400] = p.value
    if not series or end <= start:
        return Mortality(deaths, None, None, start, end)
    exposure = population.animal_days(sorted(series.items()), 0.0, (end - start).total_seconds() / 86400)
    rate = population.mortality_rate_per_1000_animal_days(deaths, exposure) if exposure > 0 else None
    return Mortality(deaths, exposure, rate, start, end)


@dataclass
class Summary:
    tank: Tank
    latest: Point | None
    growth: Growth
    mortality: Mortality
    capacity: float | None = None  # species max density x volume
    forecast_date: datetime | None = None
    forecast_text: str = ""
    splits: list = field(default_factory=list)
    movements: list = field(default_factory=list)  # (label, signed animals) since the latest estimate

    @property
    def now_estimate(self) -> float | None:
        """The latest estimate plus what other apps moved in or out since (trial cohorts)."""
        if not self.latest:
            return None
        return max(0.0, self.latest.value + sum(n for _, n in self.movements))

    @property
    def density(self) -> float | None:
        return self.latest.value / self.tank.volume_l if self.latest else None

    @property
    def max_density(self) -> int | None:
        return self.tank.species.max_density_per_l

    @property
    def pct_of_max(self) -> float | None:
        if self.density is None or not self.max_density:
            return None
        return 100 * self.density / self.max_density


def summarize(tank: Tank, points: list[Point], deaths: int, now: datetime,
              mortality_days: int = DEFAULT_MORTALITY_DAYS) -> Summary:
    """Everything the population panel shows, from loaded rows (no query; needs tank.species)."""
    current = [p for p in points if p.kind != "before-split" and p.at <= now]
    latest = current[-1] if current else None
    growth = fit_points(points, now)
    summary = Summary(tank, latest, growth,
                      mortality(points, deaths, now - timedelta(days=mortality_days), now, tank.started_on))
    if tank.species.max_density_per_l:
        summary.capacity = tank.species.max_density_per_l * tank.volume_l
    summary.forecast_date, summary.forecast_text = _forecast(summary, now)
    return summary


def _forecast(s: Summary, now: datetime) -> tuple[datetime | None, str]:
    if s.capacity is None:
        return None, "no maximum density on the species profile"
    if s.latest is None:
        return None, "no estimate yet"
    if s.latest.value >= s.capacity:
        return None, "at or above the maximum now"
    fit = s.growth.fit
    if fit is None:
        return None, "no growth curve"
    day = fit.day_reaching(s.capacity)
    if day is None:
        if fit.model == "logistic" and fit.carrying_capacity is not None and fit.carrying_capacity < s.capacity:
            return None, f"not expected: the fitted curve levels off at about {fit.carrying_capacity:,.0f}"
        return None, "not expected: the fitted curve is not growing"
    when = s.growth.t0 + timedelta(days=day)
    if when <= now:
        return now, "about now (the fitted curve has passed it; the latest estimate is below)"
    if when > now + timedelta(days=FORECAST_HORIZON_DAYS):
        return None, f"not within {FORECAST_HORIZON_DAYS} days at the fitted rate"
    return when, ""


def _deaths(tank_ids, start, end) -> dict[int, dict]:
    """Per tank: dead removed, checks and checks with a flagged value over [start, end] (one query)."""
    rows = (Check.objects.current().filter(tank_id__in=list(tank_ids), observed_at__gte=start, observed_at__lte=end)
            .values("tank_id").annotate(dead=Sum("dead_removed"), checks=Count("id"),
                                        flagged=Count("id", filter=~Q(flags={}))))
    return {r["tank_id"]: r for r in rows}


def tank_summary(tank: Tank, now: datetime | None = None, mortality_days: int = DEFAULT_MORTALITY_DAYS) -> Summary:
    """The tank page's population summary and splits: six queries whatever the tank's history."""
    now = now or timezone.now()
    points = load_points([tank.pk])[tank.pk]
    dead = _deaths([tank.pk], now - timedelta(days=mortality_days), now).get(tank.pk, {}).get("dead") or 0
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
        v_split_out=_newest(Split.history, source_id=pk),
        v_split_in=_newest(Split.history, id__in=split_ids_in),
        v_part=_newest(SplitPart.history, destination_id=pk),
        v_override=_newest(TankTarget.history, tank_id=pk),
        v_species=_newest(Species.history, id=OuterRef("species_id")),
        v_targets=_newest(CareTarget.history, species_id=OuterRef("species_id")),
    ).values_list("pk", "v_tank", "v_check", "v_feeding", "v_water", "v_census", "v_split_out", "v_split_in",
                  "v_part", "v_override", "v_species", "v_targets")
    return {row[0]: ".".join(str(v or 0) for v in row[1:]) for row in rows}


def _cached(key: str, build) -> tuple[bytes, bool]:
    """(bytes, came from the cache)."""
    hit = cache.get(key)
    if hit is not None:
        return hit, True
    value = build()
    cache.set(key, value, CACHE_SECONDS)
    return value, False


def _key(*parts) -> str:
    return "vermilog:" + hashlib.sha256(":".join(str(p) for p in parts).encode()).hexdigest()


# ---------------------------------------------------------------------------------------------
# Tank plot: rows, figure, views
# ---------------------------------------------------------------------------------------------
def _period(request, default: int) -> int:
    raw = request.GET.get("days", "")
    if raw == "":
        return default
    try:
        days = int(raw)
    except ValueError:
        raise Http404(f"Period: '{raw}' is not one of {', '.join(map(str, PERIOD_DAYS))} days.") from None
    if days not in PERIOD_DAYS:
        raise Http404(f"Period: {days} days is not one of {', '.join(map(str, PERIOD_DAYS))} days.")
    return days


def _window(days: int) -> tuple[datetime, datetime]:
    """[start, end) of the last `days` days in whole local days, so a plot is the same all day long."""
    end = timezone.make_aware(datetime.combine(timezone.localdate() + timedelta(days=1), time.min))
    return end - timedelta(days=days), end


def _local(dt: datetime) -> datetime:
    return timezone.localtime(dt)


def tank_plot_rows(tank: Tank, start: datetime, end: datetime, now: datetime | None = None) -> list[dict]:
    """The tidy rows behind a tank's health figure (charts.TANK_COLUMNS); a fixed number of queries."""
    now = now or timezone.now()
    rows: list[dict] = []
    points = load_points([tank.pk])[tank.pk]
    for p in points:
        if start <= p.at <= end and p.kind != "before-split":
            rows.append({"series": "population", "at": _local(p.at), "value": p.value, "lower": p.lower,
                         "upper": p.upper, "unit": "animals", "note": "split" if p.kind == "split" else "census",
                         "label": p.note})
    growth = fit_points(points, min(now, end))
    if growth.fit is not None:
        first = max(start, growth.t0)
        steps = 60
        span = (min(end, now) - first) / steps
        for i in range(steps + 1):
            when = first + span * i
            rows.append({"series": "fit", "at": _local(when), "value": growth.at(when), "unit": "animals",
                         "note": growth.fit.model})
    if tank.species.max_density_per_l:
        rows.append({"series": "capacity", "at": _local(start), "unit": "animals",
                     "value": tank.species.max_density_per_l * tank.volume_l,
                     "note": f"{tank.species.max_density_per_l} animals/L x {tank.volume_l:g} L"})
    targets = tank.care_targets()
    keys = [p.key for p in tank.relevant_parameters()]
    checks = (tank.check_set.current().filter(observed_at__gte=start, observed_at__lt=end).order_by("observed_at")
              .values("observed_at", "dead_removed", "flags", *keys))
    dead_by_day: dict = {}
    for c in checks:
        day = _local(c["observed_at"]).date()
        dead_by_day[day] = dead_by_day.get(day, 0) + (c["dead_removed"] or 0)
        for key in keys:
            if c[key] is None:
                continue
            p = parameters.BY_KEY[key]
            target = targets.get(key)
            flag = (c["flags"] or {}).get(key) or {}
            rows.append({"series": "reading", "at": _local(c["observed_at"]), "parameter": key, "label": p.label,
                         "unit": p.unit, "value": c[key],
                         "target_low": target.low if target else None, "target_high": target.high if target else None,
                         "flagged": flag.get("side", "")})
    for day, dead in sorted(dead_by_day.items()):
        rows.append({"series": "deaths", "at": timezone.make_aware(datetime.combine(day, time(12))), "value": dead,
                     "unit": "animals/day"})
    for at, amount, unit, food in (tank.feeding_set.current().filter(observed_at__gte=start, observed_at__lt=end)
                                   .values_list("observed_at", "amount", "unit", "food")):
        rows.append({"series": "feeding", "at": _local(at), "value": amount, "unit": unit, "note": food})
    for at, percent, litres in (tank.waterchange_set.current().filter(observed_at__gte=start, observed_at__lt=end)
                                .values_list("observed_at", "percent", "litres")):
        rows.append({"series": "water_change", "at": _local(at), "value": percent if percent is not None else litres,
                     "unit": "%" if percent is not None else "L"})
    for p in points:
        if p.kind == "split" and start <= p.at <= end:
            rows.append({"series": "split", "at": _local(p.at), "value": p.value, "unit": "animals", "note": p.note})
    return rows


def _tank_for_plot(code: str) -> Tank:
    return get_object_or_404(Tank.objects.select_related("room", "species")
                             .prefetch_related("species__targets", "target_overrides"), code=code)


def tank_plot_key(tank: Tank, days: int, fmt: str) -> str:
    """Cache key of a tank's figure: tank, period (whole local days), records version and format."""
    start, _ = _window(days)
    return _key("tank-plot", tank.pk, days, start.isoformat(), records_versions([tank.pk])[tank.pk], fmt)


def render_tank_plot(tank: Tank, days: int, fmt: str) -> tuple[bytes, bool]:
    """The tank's figure for the last `days` days, from the cache when its records have not changed."""
    start, end = _window(days)

    def build():
        frame = charts.tank_frame(tank_plot_rows(tank, start, end))
        title = f"Tank {tank.code} · {tank.species.scientific_name} · {tank.room.name}"
        subtitle = (f"{_local(start):%d %b %Y} to {_local(end - timedelta(seconds=1)):%d %b %Y} ({days} days) · "
                    f"{tank.volume_l:g} L · made by Vermilog {timezone.localdate():%Y-%m-%d}")
        return charts.tank_figure(frame, title=title, subtitle=subtitle, start=_local(start), end=_local(end), fmt=fmt)

    return _cached(tank_plot_key(tank, days, fmt), build)


def _format(request) -> str:
    fmt = request.GET.get("format", "svg")
    if fmt not in charts.FORMATS:
        raise Http404(f"Format: '{fmt}' is not one of {', '.join(charts.FORMATS)}.")
    return fmt


def _image(body: bytes, fmt: str, filename: str) -> HttpResponse:
    response = HttpResponse(body, content_type=charts.FORMATS[fmt])
    response["Content-Disposition"] = f'inline; filename="{filename}.{fmt}"'
    response["Cache-Control"] = "private, max-age=300"
    return response


def _csv(body: bytes, filename: str) -> HttpResponse:
    response = HttpResponse(body, content_type="text/csv; charset=utf-8")
    response["Content-Disposition"] = f'attachment; filename="{filename}.csv"'
    return response


@require_GET
@role_required(*READ_ROLES)
def tank_health(request, code):
    """The tank's health figure with a period chooser and the population numbers for that period."""
    tank = _tank_for_plot(code)
    days = _period(request, DEFAULT_PLOT_DAYS)
    summary = tank_summary(tank, mortality_days=days)
    return render(request, "colonies/health_tank.html", {"tank": tank, "days": days, "periods": PERIOD_DAYS,
                                                          "summary": summary})


@require_GET
@role_required(*READ_ROLES)
def tank_plot(request, code):
    tank = _tank_for_plot(code)
    fmt = _format(request)
    days = _period(request, DEFAULT_PLOT_DAYS)
    body, _ = render_tank_plot(tank, days, fmt)
    return _image(body, fmt, f"vermilog-{tank.code}-{days}d")


@require_GET
@role_required(*READ_ROLES)
def tank_plot_csv(request, code):
    tank = _tank_for_plot(code)
    days = _period(request, DEFAULT_PLOT_DAYS)
    start, end = _window(days)
    return _csv(charts.to_csv(charts.tank_frame(tank_plot_rows(tank, start, end))), f"vermilog-{tank.code}-{days}d")


# ---------------------------------------------------------------------------------------------
# Facility overview
# ---------------------------------------------------------------------------------------------
STATUS_ORDER = {"attention": 0, "watch": 1, "ok": 2}


def overview(days: int = DEFAULT_MORTALITY_DAYS, now: datetime | None = None) -> dict:
    """Per tank in use and per room: estimate, density, growth, mortality and flags over the last
    `days` days, worst first. Seven queries whatever the number of tanks and records."""
    now = now or timezone.now()
    start = now - timedelta(days=days)
    tanks = list(Tank.objects.in_use().select_related("room", "species").order_by("room__code", "code"))
    ids = [t.pk for t in tanks]
    points = load_points(ids)
    checks = _deaths(ids, start, now)
    worst = {r["tank_id"]: r for r in Deviation.objects.unresolved().filter(tank_id__in=ids).values("tank_id")
             .annotate(n=Count("id"), worst=Subquery(
                 Deviation.objects.unresolved().filter(tank_id=OuterRef("tank_id")).order_by("-severity")
                 .values("severity")[:1]))}
    rows = []
    for tank in tanks:
        c = checks.get(tank.pk, {})
        s = summarize(tank, points[tank.pk], c.get("dead") or 0, now, days)
        dev = worst.get(tank.pk, {})
        rows.append({"tank": tank, "summary": s, "points": points[tank.pk], "checks": c.get("checks") or 0,
                     "flagged_pct": 100 * c["flagged"] / c["checks"] if c.get("checks") else None,
                     "open_deviations": dev.get("n", 0), "worst_severity": dev.get("worst") or 0})
    _classify(rows)
    rows.sort(key=lambda r: (STATUS_ORDER[r["status"]], -r["worst_severity"], -(r["mortality_ratio"] or 0),
                             -(r["summary"].pct_of_max or 0), r["tank"].code))
    for rank, row in enumerate(rows, start=1):
        row["rank"] = rank
    return {"rows": rows, "rooms": _rooms(rows), "start": start, "end": now, "days": days}


def _classify(rows) -> None:
    """Status per tank: attention (major deviation open, or above maximum density), watch (a
    moderate deviation open, at 90 % of the maximum, mortality at MORTALITY_WATCH_FACTOR x its species'
    median, or FLAGGED_WATCH_PCT of checks flagged), else ok."""
    by_species: dict[int, list[float]] = {}
    for r in rows:
        if r["summary"].mortality.rate is not None:
            by_species.setdefault(r["tank"].species_id, []).append(r["summary"].mortality.rate)
    for r in rows:
        s = r["summary"]
        rates = by_species.get(r["tank"].species_id, [])
        median = statistics.median(rates) if rates else None
        r["mortality_ratio"] = (s.mortality.rate / median) if (median and s.mortality.rate is not None) else None
        reasons = []
        pct = s.pct_of_max
        if r["worst_severity"] >= Deviation.Severity.MAJOR:
            reasons.append("major deviation open")
        if pct is not None and pct > 100:
            reasons.append(f"{pct:.0f} % of maximum density")
        if reasons:
            r["status"], r["reasons"] = "attention", reasons
            continue
        if r["worst_severity"] >= Deviation.Severity.MODERATE:
            reasons.append("moderate deviation open")
        if pct is not None and pct >= 90:
            reasons.append(f"{pct:.0f} % of maximum density")
        if r["mortality_ratio"] is not None and r["mortality_ratio"] >= MORTALITY_WATCH_FACTOR and s.mortality.deaths:
            reasons.append(f"mortality {r['mortality_ratio']:.1f} x the species median")
        if r["flagged_pct"] is not None and r["flagged_pct"] >= FLAGGED_WATCH_PCT:
            reasons.append(f"{r['flagged_pct']:.0f} % of checks flagged")
        r["status"], r["reasons"] = ("watch" if reasons else "ok"), reasons


def _rooms(rows) -> list[dict]:
    """Per room: pooled mortality (total deaths / total animal-days of tanks with an estimate)."""
    rooms: dict[int, dict] = {}
    for r in rows:
        tank, m = r["tank"], r["summary"].mortality
        room = rooms.setdefault(tank.room_id, {"room": tank.room, "tanks": 0, "deaths": 0, "animal_days": 0.0,
                                               "without_estimate": 0, "attention": 0})
        room["tanks"] += 1
        room["attention"] += r["status"] == "attention"
        if m.animal_days:
            room["deaths"] += m.deaths
            room["animal_days"] += m.animal_days
        else:
            room["without_estimate"] += 1
    for room in rooms.values():
        room["rate"] = (population.mortality_rate_per_1000_animal_days(room["deaths"], room["animal_days"])
                        if room["animal_days"] > 0 else None)
    return sorted(rooms.values(), key=lambda r: r["room"].code)


def overview_rows(data: dict, trend_start: datetime) -> list[dict]:
    """The tidy rows behind the overview figure and its CSV (charts.OVERVIEW_COLUMNS)."""
    out = []
    end = data["end"]
    for r in data["rows"]:
        tank, s = r["tank"], r["summary"]
        base = {"tank": tank.code, "room": tank.room.code, "species": tank.species.scientific_name, "rank": r["rank"]}
        for p in r["points"]:
            if p.kind != "before-split" and trend_start <= p.at <= end:
                out.append({**base, "series": "population", "at": _local(p.at), "value": p.value, "lower": p.lower,
                            "upper": p.upper, "unit": "animals", "note": p.kind})
        metrics = {
            "status": (None, "; ".join(r["reasons"]) or "ok"),
            "estimate": (s.latest.value if s.latest else None, ""),
            "capacity": (s.capacity, ""),
            "density_pct_of_max": (s.pct_of_max, ""),
            "growth_rate_per_day": (s.growth.fit.rate_per_day if s.growth.fit else None,
                                    s.growth.fit.model if s.growth.fit else s.growth.note),
            "mortality_per_1000_animal_days": (s.mortality.rate, f"{data['days']} days"),
            "deaths": (s.mortality.deaths, f"{data['days']} days"),
            "flagged_checks_pct": (r["flagged_pct"], f"{r['checks']} checks"),
            "open_deviations": (r["open_deviations"], ""),
        }
        for name, (value, note) in metrics.items():
            if name == "status":
                note = r["status"]
            out.append({**base, "series": name, "at": _local(end), "value": value,
                        "unit": charts.OVERVIEW_METRICS.get(name, "animals"), "note": note})
    return out


def _overview_frame(days: int):
    data = overview(days)
    trend_start = data["end"] - timedelta(days=max(days, FIT_WINDOW_DAYS))
    return data, trend_start, charts.overview_frame(overview_rows(data, trend_start))


def overview_version() -> str:
    tanks = records_versions(Tank.objects.in_use().values_list("pk", flat=True))
    newest_deviation = Deviation.history.order_by("-history_id").values_list("history_id", flat=True).first() or 0
    return hashlib.sha256(repr((sorted(tanks.items()), newest_deviation)).encode()).hexdigest()[:16]


def overview_plot_key(days: int, fmt: str) -> str:
    return _key("overview-plot", days, timezone.localdate().isoformat(), overview_version(), fmt)


def render_overview_plot(days: int, fmt: str) -> tuple[bytes, bool]:
    today = timezone.localdate()

    def build():
        data, trend_start, frame = _overview_frame(days)
        title = (f"Colony health · {today:%d %b %Y} · worst first · health over the last {days} days, "
                 f"population over {max(days, FIT_WINDOW_DAYS)} days")
        return charts.overview_figure(frame, title=title, start=_local(trend_start), end=_local(data["end"]), fmt=fmt)

    return _cached(overview_plot_key(days, fmt), build)


@require_GET
@role_required(*READ_ROLES)
def health_overview(request):
    days = _period(request, DEFAULT_MORTALITY_DAYS)
    data = overview(days)
    return render(request, "colonies/health_overview.html", {**data, "periods": PERIOD_DAYS})


@require_GET
@role_required(*READ_ROLES)
def health_overview_plot(request):
    fmt = _format(request)
    days = _period(request, DEFAULT_MORTALITY_DAYS)
    body, _ = render_overview_plot(days, fmt)
    return _image(body, fmt, f"vermilog-colony-health-{days}d")


@require_GET
@role_required(*READ_ROLES)
def health_overview_csv(request):
    days = _period(request, DEFAULT_MORTALITY_DAYS)
    _, _, frame = _overview_frame(days)
    return _csv(charts.to_csv(frame), f"vermilog-colony-health-{days}d")


# ---------------------------------------------------------------------------------------------
# Splits
# ---------------------------------------------------------------------------------------------
def _animals(label: str, value, minimum: float) -> float:
    if value is None:
        return value
    if not (math.isfinite(value) and minimum <= value <= MAX_ANIMALS):
        raise forms.ValidationError(f"{label}: {value:g} is impossible; allowed range {minimum:g} to {MAX_ANIMALS:,} animals.")
    return value


class SplitForm(NamedErrorsMixin, forms.Form):
    split_at = forms.DateTimeField(
        required=False, label="Split at", help_text="Leave empty for now.",
        widget=forms.DateTimeInput(attrs={"type": "datetime-local"}, format="%Y-%m-%dT%H:%M"),
    )
    source_before = forms.FloatField(label="Animals before the split (estimate)",
                                     help_text="Usually the latest census estimate.")
    stayed = forms.FloatField(label="Animals left in this tank (estimate)")
    note = forms.CharField(required=False, max_length=MAX_TEXT, widget=forms.TextInput(attrs={"placeholder": "Note"}))

    def __init__(self, *args, tank: Tank, **kwargs):
        super().__init__(*args, **kwargs)
        self.tank = tank

    def clean_split_at(self):
        return check_moment("Split at", self.cleaned_data.get("split_at"), started_on=self.tank.started_on,
                            what=f"when tank {self.tank.code} was started")

    def clean_source_before(self):
        return _animals("Animals before the split", self.cleaned_data.get("source_before"), 1)

    def clean_stayed(self):
        return _animals("Animals left in this tank", self.cleaned_data.get("stayed"), 0)

    def clean(self):
        cleaned = super().clean()
        before, stayed = cleaned.get("source_before"), cleaned.get("stayed")
        if before is not None and stayed is not None and stayed > before:
            self.add_error("stayed", f"Animals left in this tank: {stayed:g} is impossible; allowed range 0 to "
                                     f"{before:g} animals (the animals before the split).")
        return cleaned


class SplitPartForm(NamedErrorsMixin, forms.Form):
    """One destination: an existing tank of the same species, or a new tank set up now."""

    destination = forms.ChoiceField(required=False, label="To existing tank")
    new_code = forms.CharField(required=False, max_length=12, label="or new tank code")
    new_position = forms.CharField(required=False, max_length=30, label="New tank position")
    new_volume_l = forms.FloatField(required=False, label="New tank volume (L)")
    animals = forms.FloatField(required=False, label="Animals moved (estimate)")

    def __init__(self, *args, destinations: list[Tank], **kwargs):
        super().__init__(*args, **kwargs)
        self.by_code = {t.code: t for t in destinations}
        self.fields["destination"].choices = [("", "—")] + [(t.code, t.code) for t in destinations]

    def clean_new_code(self):
        code = self.cleaned_data.get("new_code", "").strip().upper()
        if code:
            try:
                tank_code_validator(code)
            except forms.ValidationError:
                raise forms.ValidationError(f"New tank code: '{code}' is not a tank code; use 1-12 capital letters, "
                                            "digits or hyphens (e.g. FW-A07).") from None
        return code

    def clean_new_volume_l(self):
        volume = self.cleaned_data.get("new_volume_l")
        if volume is not None and not (0.01 <= volume <= 10000):
            raise forms.ValidationError(f"New tank volume (L): {volume:g} is impossible; allowed range 0.01 to 10000 L.")
        return volume

    def clean_animals(self):
        return _animals("Animals moved", self.cleaned_data.get("animals"), 0)

    def clean(self):
        cleaned = super().clean()
        if self.errors or not self.has_entry():
            return cleaned
        code, new_code = cleaned.get("destination"), cleaned.get("new_code")
        if bool(code) == bool(new_code):
            self.add_error("destination", "Destination: choose an existing tank or enter a new tank code (one of them).")
        if new_code and cleaned.get("new_volume_l") is None:
            self.add_error("new_volume_l", f"New tank volume (L): enter the volume of {new_code} (0.01 to 10000 L).")
        if cleaned.get("animals") is None:
            self.add_error("animals", "Animals moved: enter the estimated number of animals moved.")
        return cleaned

    def has_entry(self) -> bool:
        c = self.cleaned_data
        return any(c.get(name) not in (None, "") for name in ("destination", "new_code", "new_volume_l", "animals"))

    def part(self):
        c = self.cleaned_data
        if c.get("new_code"):
            target = services.NewTank(code=c["new_code"], volume_l=c["new_volume_l"], position=c.get("new_position", ""))
        else:
            target = self.by_code[c["destination"]]
        return target, c["animals"]


SplitPartFormSet = forms.formset_factory(SplitPartForm, extra=3, max_num=6)


def split_forms(tank: Tank, data=None, latest: float | None = None):
    """The split form and its destination rows for the tank page (one query for the destinations)."""
    destinations = list(Tank.objects.in_use().filter(species_id=tank.species_id).exclude(pk=tank.pk)
                        .only("code").order_by("code"))
    initial = {"source_before": round(latest)} if latest else {}
    form = SplitForm(data, tank=tank, prefix="split", initial=initial)
    parts = SplitPartFormSet(data, prefix="part", form_kwargs={"destinations": destinations})
    return form, parts


@require_POST
@role_required(TECHNICIAN)
@once_per_submission
def tank_split(request, code):
    tank = get_object_or_404(Tank.objects.select_related("room", "species"), code=code)
    form, parts = split_forms(tank, request.POST)
    if form.is_valid() & parts.is_valid():
        rows = [f.part() for f in parts if f.has_entry()]
        if not rows:
            form.add_error(None, "Destinations: enter at least one destination tank and the animals moved to it.")
        else:
            c = form.cleaned_data
            try:
                split = services.record_split(user=request.user, source=tank, source_before=c["source_before"],
                                              stayed=c["stayed"], parts=rows, split_at=c.get("split_at"),
                                              note=c.get("note", ""))
            except ValueError as error:
                form.add_error(None, str(error))
            else:
                balance = population.split_balance(split.source_before, [split.stayed] + [a for _, a in rows])
                messages.success(request, f"Split of {tank.code} saved: {split.stayed:.0f} stayed, "
                                          f"{balance.parts_total - split.stayed:.0f} moved to {len(rows)} tank"
                                          f"{'s' if len(rows) != 1 else ''}; books differ by {balance.difference:+.0f} "
                                          f"animals ({100 * balance.relative_difference:+.1f} %).")
                return redirect(tank)
    from .views import _tank_page_ctx  # the tank page, shown again with the errors

    messages.error(request, "Split not saved. Correct the fields marked below.")
    ctx = _tank_page_ctx(request, tank, split_form=form, part_forms=parts)
    return render(request, "colonies/tank_detail.html", ctx, status=400)


@require_http_methods(["GET", "POST"])
@role_required(TECHNICIAN)
@once_per_submission
def split_void(request, pk):
    split = get_object_or_404(Split.objects.select_related("source"), pk=pk)
    if split.is_voided:
        messages.info(request, f"{split} is already voided.")
        return redirect(split.source)
    from .forms import ReasonForm

    form = ReasonForm(request.POST or None)
    if request.method == "POST" and form.is_valid():
        services.void_split(user=request.user, split=split, reason=form.cleaned_data["reason"])
        messages.success(request, f"Voided: {split}. It stays in the tank's history.")
        return redirect(split.source)
    return render(request, "colonies/void.html", {"record": split, "form": form, "kind": "split"},
                  status=400 if request.method == "POST" else 200)


# ---------------------------------------------------------------------------------------------
# Lineage
# ---------------------------------------------------------------------------------------------
def lineage_rows(tank: Tank) -> tuple[list[dict], int]:
    """The culture line of `tank` as a depth-first list of rows (depth, tank, how it was founded).

    Three queries whatever the size of the line: all lineage edges, the tanks of this line, and
    the splits that link them. The tree is built in Python. A tank founded from two parents
    appears under both; the second time it is marked as already shown.
    """
    edges = list(Tank.founded_from.through.objects.values_list("from_tank_id", "to_tank_id"))  # (child, parent)
    parents: dict[int, set[int]] = {}
    children: dict[int, set[int]] = {}
    for child, parent in edges:
        parents.setdefault(child, set()).add(parent)
        children.setdefault(parent, set()).add(child)
    line, todo = set(), [tank.pk]
    while todo:  # the connected component: ancestors, descendants and their relatives
        pk = todo.pop()
        if pk in line:
            continue
        line.add(pk)
        todo.extend(parents.get(pk, ()))
        todo.extend(children.get(pk, ()))
    tanks = Tank.objects.select_related("room", "species").in_bulk(line)
    links: dict[tuple[int, int], list] = {}
    for source_id, dest_id, at, animals, created in (
            SplitPart.objects.filter(split__voided_at__isnull=True, destination_id__in=line)
            .values_list("split__source_id", "destination_id", "split__split_at", "animals", "created_tank")):
        links.setdefault((dest_id, source_id), []).append({"at": at, "animals": animals, "created": created})
    roots = sorted((pk for pk in line if not parents.get(pk, set()) & line),
                   key=lambda pk: (tanks[pk].started_on, tanks[pk].code))
    rows, shown = [], set()

    def walk(pk, depth, parent):
        repeat = pk in shown
        rows.append({"tank": tanks[pk], "depth": depth, "indent": depth * 1.6, "parent": tanks.get(parent),
                     "splits": sorted(links.get((pk, parent), []), key=lambda s: s["at"]), "repeat": repeat,
                     "current": pk == tank.pk})
        if repeat:
            return
        shown.add(pk)
        for child in sorted(children.get(pk, ()), key=lambda c: (tanks[c].started_on, tanks[c].code)):
            if child in line:
                walk(child, depth + 1, pk)

    for root in roots:
        walk(root, 0, None)
    for pk in sorted(line - shown, key=lambda pk: tanks[pk].code):  # only in a (mistaken) lineage cycle
        if pk not in shown:
            walk(pk, 0, None)
    return rows, len(line)


@require_GET
@role_required(*READ_ROLES)
def tank_lineage(request, code):
    tank = get_object_or_404(Tank.objects.select_related("room", "species"), code=code)
    rows, size = lineage_rows(tank)
    return render(request, "colonies/lineage.html", {"tank": tank, "rows": rows, "size": size})
