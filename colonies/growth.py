"""Population growth, mortality and summaries of one tank: plain functions over loaded points.

Pure: no Django import. The rows come from colonies/health_series.py; the statistics from
colonies/population.py and colonies/growth_curves.py. Times are aware datetimes.
"""
import math
import threading
from dataclasses import dataclass, field
from datetime import datetime, timedelta

from . import growth_curves, population

DEFAULT_MORTALITY_DAYS = 30
FIT_WINDOW_DAYS = 120  # growth is fitted on the censuses of the last 120 days
LOGISTIC_MIN_POINTS = 6  # fewer points cannot tell a logistic curve from an exponential one
FORECAST_HORIZON_DAYS = 365
FIT_MEMO_SIZE = 8192  # fits remembered per process (~2 KB each with the estimates that key them)


@dataclass(frozen=True)
class Point:
    at: datetime
    value: float
    lower: float | None
    upper: float | None
    kind: str  # "census"; "split" (after a split, out or in); "before-split" (for animal-days only)
    note: str = ""



@dataclass(frozen=True)
class Growth:
    fit: growth_curves.GrowthFit | None
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
    return fit_usable(usable_points(points, now, window_days), window_days)


def usable_points(points: list[Point], now: datetime, window_days: int = FIT_WINDOW_DAYS) -> tuple[Point, ...]:
    """The estimates a fit uses: the last `window_days` up to `now`, from the latest split on."""
    since = now - timedelta(days=window_days)
    usable = [p for p in points if p.kind != "before-split" and since <= p.at <= now]
    resets = [i for i, p in enumerate(usable) if p.kind == "split"]
    if resets:
        usable = usable[resets[-1]:]  # a split changes the culture: fit from the animals left after it
    return tuple(usable)


# (usable, window_days) -> Growth, oldest first: the oldest go first when it is full (a lookup does
# not reorder it: comparing a key's estimates twice per tank cost more than the order was worth).
_memo: dict = {}
_memo_lock = threading.Lock()  # one worker process may serve requests in threads


def remembered(usable: tuple[Point, ...], window_days: int = FIT_WINDOW_DAYS) -> Growth | None:
    """The fit of exactly these estimates if this process has made (or been given) it."""
    return _memo.get((usable, window_days))


def remember(usable: tuple[Point, ...], fitted: Growth, window_days: int = FIT_WINDOW_DAYS) -> None:
    with _memo_lock:
        _memo[(usable, window_days)] = fitted
        while len(_memo) > FIT_MEMO_SIZE:
            del _memo[next(iter(_memo))]


def forget() -> None:
    """Empty this process's fits, as a new worker process starts (the benchmark's cold cases)."""
    with _memo_lock:
        _memo.clear()


def fit_usable(usable: tuple[Point, ...], window_days: int = FIT_WINDOW_DAYS) -> Growth:
    """The fit of exactly these estimates, remembered by their values (a pure function of its
    arguments, so a remembered result is the result: any new, corrected or voided estimate changes
    the arguments)."""
    found = remembered(usable, window_days)
    if found is None:
        found = _fit(usable, window_days)
        remember(usable, found, window_days)
    return found


def _fit(usable: tuple[Point, ...], window_days: int) -> Growth:
    if len(usable) < 3:
        return Growth(None, None, len(usable),
                      f"needs at least 3 estimates in the last {window_days} days since the latest split; "
                      f"{len(usable)} available")
    t0 = usable[0].at
    days = [(p.at - t0).total_seconds() / 86400 for p in usable]
    counts = [p.value for p in usable]
    try:
        exponential = growth_curves.fit_growth(days, counts, "exponential")
    except ValueError as error:
        exponential, why = None, str(error)
    logistic = None
    if len(usable) >= LOGISTIC_MIN_POINTS:
        try:
            logistic = growth_curves.fit_growth(days, counts, "logistic")
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


def mortality(points: list[Point], deaths: int, start: datetime, end: datetime,
              started_at: datetime | None = None) -> Mortality:
    """Deaths per 1000 animal-days over [start, end]; exposure from the estimates (trapezoid rule,
    population.animal_days), from the tank's start (local midnight) if it started within the period."""
    if started_at is not None:
        start = max(start, started_at)
    series = {}
    for p in _around(points, start, end):
        series[(p.at - start).total_seconds() / 86400] = p.value
    if not series or end <= start:
        return Mortality(deaths, None, None, start, end)
    exposure = population.animal_days(sorted(series.items()), 0.0, (end - start).total_seconds() / 86400)
    rate = population.mortality_rate_per_1000_animal_days(deaths, exposure) if exposure > 0 else None
    return Mortality(deaths, exposure, rate, start, end)


def _around(points: list[Point], start: datetime, end: datetime) -> list[Point]:
    """The points (sorted by time) that animal-days over [start, end] depend on: those inside, and
    the nearest time at or before start and at or after end (population.animal_days interpolates
    linearly and holds the end values), so the result is the same as with every point."""
    before = [p for p in points if p.at <= start]
    after = [p for p in points if p.at >= end]
    inside = [p for p in points if start < p.at < end]
    return ([p for p in before if p.at == before[-1].at] if before else []) + inside + \
        ([p for p in after if p.at == after[0].at] if after else [])


@dataclass
class Summary:
    tank: object  # a Tank with its species loaded
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


def summarize(tank, points: list[Point], deaths: int, now: datetime, started_at: datetime | None = None,
              mortality_days: int = DEFAULT_MORTALITY_DAYS, fitted: Growth | None = None) -> Summary:
    """Everything the population panel shows, from loaded rows (no query; needs tank.species).
    `started_at` is the start of the tank's first day (mortality counts from there); `fitted`, the
    growth fit when the caller has it (e.g. from a cache keyed by the fit's inputs)."""
    current = [p for p in points if p.kind != "before-split" and p.at <= now]
    latest = current[-1] if current else None
    growth = fitted or fit_points(points, now)
    summary = Summary(tank, latest, growth,
                      mortality(points, deaths, now - timedelta(days=mortality_days), now, started_at))
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

