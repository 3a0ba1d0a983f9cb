"""Stored checks as columns, the one thing the record rules read (colonies/record_rules.py).

A rule judges a check against the checks of its tank in the HISTORY_DAYS before it. Whether the
rules run on the round just saved or on three years of records, they get the same CheckFrame: the
current checks of some tanks as numpy columns sorted by (tank, observed time, id), with the rows to
judge marked and the rest there as history. `frames()` reads them a WINDOW_DAYS slice of observed
time at a time and carries the last HISTORY_DAYS of one slice into the next, so memory stays bounded
over years and no row is read (or its derived values computed) twice.

Rows come through the DB-API cursor with the SQL the ORM writes, and observed times as text or whole
microseconds: Django's per-row converters (a datetime parsed in Python for every row, on SQLite and
PostgreSQL alike) cost more than the rules themselves.
"""
from collections.abc import Iterable, Iterator
from dataclasses import dataclass, field
from datetime import datetime, timedelta
from datetime import timezone as dt_timezone

import numpy as np
import pandas as pd
from django.db import connection
from django.db.models import BigIntegerField, Func, OuterRef, Subquery, TextField
from django.db.models.functions import Cast

from . import derived, parameters
from .flags import Target
from .models import Census, Check, DeadRemoval, Tank

HISTORY_DAYS = 35  # how far back record rules look for baselines
WINDOW_DAYS = 60  # checks are read in slices of this much observed time
EPOCH = datetime(1970, 1, 1, tzinfo=dt_timezone.utc)
MICROSECOND = timedelta(microseconds=1)
HISTORY_US = HISTORY_DAYS * 86_400_000_000


@dataclass(frozen=True)
class TankFacts:
    """What the rules know about a tank besides its checks (as in force now, for every check judged)."""

    targets: dict[str, Target]  # Tank.care_targets(): species targets with the tank's overrides on top
    habitat: str
    latest_estimate: float | None  # the tank's newest current census estimate


@dataclass
class CheckFrame:
    pk: np.ndarray  # int64
    tank: np.ndarray  # int64 tank ids; the rows of a tank are together
    at: np.ndarray  # int64, observed time in µs since the epoch (UTC)
    dead: np.ndarray  # int64, dead animals removed
    values: dict[str, np.ndarray]  # readings and derived values some tank has a target on; NaN = no value
    judge: np.ndarray  # bool: the rows the rules judge; the others are only history before them
    tanks: dict[int, TankFacts]
    # Dead animals removed outside the round (DeadRemoval) in the frame's span: per tank, the removal times
    # (µs, sorted) and running totals of their counts starting at 0. The mortality rule adds them to the
    # baseline; each death is counted once, by the record that removed it.
    removals: dict[int, tuple[np.ndarray, np.ndarray]] = field(default_factory=dict)
    row: np.ndarray = field(init=False)
    tank_ids: np.ndarray = field(init=False)  # the frame's tanks, sorted
    tank_index: np.ndarray = field(init=False)  # per row: its tank's place in tank_ids
    since: np.ndarray = field(init=False)  # per row: the first row of its tank within HISTORY_DAYS before it

    def __post_init__(self):
        self.row = np.arange(len(self.pk))
        self.tank_ids, self.tank_index = np.unique(self.tank, return_inverse=True)
        # One sorted key over all tanks (tank rank, then time), so a single searchsorted finds each
        # row's first check within HISTORY_DAYS in its own tank: a tank's span never reaches the next.
        new_tank = np.r_[True, self.tank[1:] != self.tank[:-1]] if len(self.pk) else np.zeros(0, bool)
        rank = np.cumsum(new_tank) - 1
        origin = self.at.min(initial=0)
        span = int(self.at.max(initial=0)) - int(origin) + HISTORY_US + 1
        if len(rank) and int(rank[-1]) * span >= 2**62:
            raise ValueError(f"a frame of {int(rank[-1]) + 1} tanks over {span} µs is too long for one sort key")
        key = rank * span + (self.at - origin)
        self.since = np.searchsorted(key, key - HISTORY_US, side="left")

    def __len__(self) -> int:
        return len(self.pk)

    def earliest(self, limit: int) -> np.ndarray:
        """Per row: the first of the at most `limit` checks of its tank just before it, within HISTORY_DAYS."""
        return np.maximum(self.since, self.row - limit)

    def removed_between(self, tank_id: int, start: int, end: int) -> int:
        """Animals in the tank's removals observed in [start, end) (µs since the epoch)."""
        times, totals = self.removals.get(tank_id, (None, None))
        if times is None:
            return 0
        return int(totals[np.searchsorted(times, end)] - totals[np.searchsorted(times, start)])

    def last_rows_before(self, tank_id: int, at: int, limit: int) -> tuple[int, int]:
        """[first, end): the at most `limit` rows of the tank observed before `at`, within HISTORY_DAYS of it."""
        rows = np.flatnonzero(self.tank == tank_id)
        if not len(rows):
            return 0, 0
        times = self.at[rows]
        end = int(np.searchsorted(times, at, side="left"))
        first = max(int(np.searchsorted(times, at - HISTORY_US, side="left")), end - limit)
        return int(rows[0]) + first, int(rows[0]) + end

    def observed_at(self, i: int) -> datetime:
        return EPOCH + int(self.at[i]) * MICROSECOND

    def target(self, i: int, key: str) -> Target | None:
        return self.tanks[int(self.tank[i])].targets.get(key)

    def limits(self, key: str) -> tuple[np.ndarray, np.ndarray]:
        """Per row: the low and high ends of its tank's target on `key` (NaN: open end or no target)."""
        return (self._per_tank(lambda t: _end(t.targets.get(key), "low")),
                self._per_tank(lambda t: _end(t.targets.get(key), "high")))

    def estimates(self) -> np.ndarray:
        """Per row: its tank's latest population estimate (NaN: none, or zero)."""
        return self._per_tank(lambda t: t.latest_estimate or np.nan)

    def _per_tank(self, value) -> np.ndarray:
        return np.array([value(self.tanks[int(t)]) for t in self.tank_ids], dtype=float)[self.tank_index]


def _end(target: Target | None, end: str) -> float:
    value = None if target is None else getattr(target, end)
    return np.nan if value is None else value


# ---------------------------------------------------------------------------------------------
# Reading frames from the database
# ---------------------------------------------------------------------------------------------
def tank_facts(tank_ids: Iterable[int] | None = None) -> dict[int, TankFacts]:
    """Targets, habitat and latest estimate of the given tanks (every tank when None), three queries."""
    tanks = (Tank.objects.select_related("species").prefetch_related("species__targets", "target_overrides")
             .annotate(latest_estimate=Subquery(Census.objects.current().filter(tank=OuterRef("pk"))
                                                .order_by("-observed_at").values("estimate")[:1])))
    if tank_ids is not None:
        tanks = tanks.filter(pk__in=list(tank_ids))
    return {t.pk: TankFacts(t.care_targets(), t.species.habitat, t.latest_estimate) for t in tanks}


def frames(*, start: datetime, stop: datetime, tank_ids: Iterable[int] | None = None,
           only: Iterable[int] | None = None) -> Iterator[CheckFrame]:
    """Frames that judge the current checks observed from `start` to `stop` inclusive (of `only` those ids,
    when given), WINDOW_DAYS of observed time each, every judged check with HISTORY_DAYS of history."""
    tank_ids = None if tank_ids is None else sorted(set(tank_ids))
    tanks = tank_facts(tank_ids)
    keys = [k for k in (*parameters.KEYS, *derived.KEYS) if any(k in t.targets for t in tanks.values())]
    checks = Check.objects.current().filter(observed_at__lte=stop)
    if tank_ids is not None:
        checks = checks.filter(tank_id__in=tank_ids)
    only = None if only is None else np.array(sorted(set(only)), dtype=np.int64)
    first_judged, last_judged = _micros([start, stop])
    carried = None
    lower, upper = start - timedelta(days=HISTORY_DAYS), start
    while upper <= stop:
        upper = upper + timedelta(days=WINDOW_DAYS)
        read = _read(checks.filter(observed_at__gte=lower, observed_at__lt=upper), keys, tanks)
        lower = upper
        columns = read if carried is None else _concat(carried, read)
        if not len(columns["pk"]):
            continue
        judge = np.zeros(len(columns["pk"]), bool)
        judge[len(columns["pk"]) - len(read["pk"]):] = True  # the rows just read; the carried ones were judged
        judge &= (columns["at"] >= first_judged) & (columns["at"] <= last_judged)
        if only is not None:
            judge &= np.isin(columns["pk"], only)
        order = np.lexsort((columns["pk"], columns["at"], columns["tank"]))
        columns = {name: column[order] for name, column in columns.items()}
        if judge[order].any():
            yield CheckFrame(columns["pk"], columns["tank"], columns["at"], columns["dead"],
                             {k: columns[k] for k in keys}, judge[order], tanks,
                             removals=read_removals(set(columns["tank"].tolist()), int(columns["at"].min()),
                                                    int(columns["at"].max())))
        kept = columns["at"] >= _micros([upper])[0] - HISTORY_US
        carried = {name: column[kept] for name, column in columns.items()}


def history_frame(tank_ids: Iterable[int], *, start: datetime, stop: datetime) -> CheckFrame:
    """A frame that judges nothing: the current checks and removals of these tanks observed from `start` to
    `stop` inclusive, the history a record other than a check is judged against (a dead-animal removal)."""
    tank_ids = sorted(set(tank_ids))
    tanks = tank_facts(tank_ids)
    checks = Check.objects.current().filter(tank_id__in=tank_ids, observed_at__gte=start, observed_at__lte=stop)
    columns = _read(checks, [], tanks)
    order = np.lexsort((columns["pk"], columns["at"], columns["tank"]))
    columns = {name: column[order] for name, column in columns.items()}
    first, last = _micros([start, stop])
    return CheckFrame(columns["pk"], columns["tank"], columns["at"], columns["dead"], {}, np.zeros(len(order), bool),
                      tanks, removals=read_removals(tank_ids, int(first), int(last)))


def read_removals(tank_ids, first: int, last: int) -> dict[int, tuple[np.ndarray, np.ndarray]]:
    """The current dead-animal removals of these tanks observed from `first` to `last` µs (one query)."""
    lower, upper = (EPOCH + int(x) * MICROSECOND for x in (first, last))
    removals = (DeadRemoval.objects.current().filter(tank_id__in=list(tank_ids), observed_at__gte=lower,
                                                    observed_at__lte=upper)
                .annotate(at=_observed_micros()).order_by().values_list("tank_id", "at", "count"))
    sql, params = removals.query.sql_with_params()
    with connection.cursor() as cursor:
        cursor.execute(sql, params)
        rows = cursor.fetchall()
    if not rows:
        return {}
    tank = np.array([r[0] for r in rows], dtype=np.int64)
    raw = np.array([r[1] for r in rows], dtype=object)
    at = np.array(raw, dtype="datetime64[us]").astype(np.int64) if isinstance(rows[0][1], str) else raw.astype(np.int64)
    count = np.array([r[2] for r in rows], dtype=np.int64)
    order = np.lexsort((at, tank))
    tank, at, count = tank[order], at[order], count[order]
    out = {}
    for t in np.unique(tank).tolist():
        mine = tank == t
        out[t] = (at[mine], np.r_[0, np.cumsum(count[mine])])
    return out


def _read(checks, keys: list[str], tanks: dict[int, TankFacts]) -> dict[str, np.ndarray]:
    """Columns of the checks in the order the database finds them (frames() sorts them; an ORDER BY
    made PostgreSQL sort every window: 96 of its 125 ms)."""
    fields = ["id", "tank_id", "at", "dead_removed", *parameters.KEYS]
    sql, params = checks.annotate(at=_observed_micros()).order_by().values_list(*fields).query.sql_with_params()
    with connection.cursor() as cursor:
        cursor.execute(sql, params)
        rows = pd.DataFrame.from_records(cursor.fetchall(), columns=fields, coerce_float=True)
    at = rows["at"].to_numpy()
    columns = {
        "pk": rows["id"].to_numpy(np.int64), "tank": rows["tank_id"].to_numpy(np.int64),
        "at": np.array(at, dtype="datetime64[us]").astype(np.int64) if at.dtype == object else at.astype(np.int64),
        "dead": rows["dead_removed"].to_numpy(np.int64),
        **{k: rows[k].to_numpy(float, na_value=np.nan) for k in parameters.KEYS},
    }
    columns.update(_derive([derived.BY_KEY[k] for k in keys if k in derived.BY_KEY], columns, tanks))
    return columns


class _EpochMicros(Func):
    """PostgreSQL: a timestamp as whole µs since the epoch (EXTRACT gives an exact numeric since version 14)."""

    template = "(EXTRACT(EPOCH FROM %(expressions)s) * 1000000)::bigint"
    output_field = BigIntegerField()


def _observed_micros():
    """The observed time in the form each database hands over fastest, with no datetime object per row:
    SQLite's stored UTC text, which numpy parses in C ('YYYY-MM-DD HH:MM:SS[.ffffff]'), or the epoch in µs."""
    if connection.vendor == "sqlite":
        return Cast("observed_at", TextField())
    return _EpochMicros("observed_at")


def _derive(wanted: list, columns: dict[str, np.ndarray], tanks: dict[int, TankFacts]) -> dict[str, np.ndarray]:
    """Each wanted derived value per row, for the tanks with a target on it, by `derived.derive_arrays` (the
    registry's own formulas on arrays: the same number bit for bit as on the tank page and in the flags),
    computed once per tank for all of them."""
    out = {d.key: np.full(len(columns["pk"]), np.nan) for d in wanted}
    for tank_id, facts in tanks.items():
        mine = [d for d in wanted if d.key in facts.targets and d.applies_to(facts.habitat)]
        rows = np.flatnonzero(columns["tank"] == tank_id) if mine else ()
        if len(rows):
            values = derived.derive_arrays({k: columns[k][rows] for k in derived.INPUTS}, [facts.habitat] * len(rows))
            for d in mine:
                out[d.key][rows] = values[d.key]
    return out


def _concat(a: dict[str, np.ndarray], b: dict[str, np.ndarray]) -> dict[str, np.ndarray]:
    return {name: np.concatenate([a[name], b[name]]) for name in a}


def _micros(moments) -> np.ndarray:
    """Aware datetimes as whole µs since the epoch (exact: no float seconds in between)."""
    return np.array([(m - EPOCH) // MICROSECOND for m in moments], dtype=np.int64)
