"""The facility's colony-health overview: every tank in use ranked worst first, per-room mortality,
and the tidy rows behind its figure and CSV. A fixed number of queries whatever the number of
tanks; growth fits are remembered by their inputs (colonies/growth.py), so they are exact.
"""
import statistics
from datetime import datetime, timedelta

from django.db.models import Count, OuterRef, Subquery
from django.utils import timezone

from . import charts, growth, population
from .health_series import check_counts, fits, load_points, summarize
from .models import Deviation, Tank

MORTALITY_WATCH_FACTOR = 2.0  # overview: "watch" a tank dying at twice its species' median rate (lab setting)
FLAGGED_WATCH_PCT = 20.0  # overview: "watch" when a fifth of the checks had a value outside target (lab setting)
STATUS_ORDER = {"attention": 0, "watch": 1, "ok": 2}
PAGE_TANKS = 24  # tanks per page of the overview (table and figure): six rows of four panels


def overview(days: int = growth.DEFAULT_MORTALITY_DAYS, now: datetime | None = None) -> dict:
    """Per tank in use and per room: estimate, density, growth, mortality and flags over the last
    `days` days, worst first. Seven queries whatever the number of tanks and records."""
    now = now or timezone.now()
    start = now - timedelta(days=days)
    tanks = list(Tank.objects.in_use().select_related("room", "species").order_by("room__code", "code"))
    ids = [t.pk for t in tanks]
    # Only the points the page uses: its trend and fit window (and mortality's, within it) and the
    # estimate before them (health_series.load_points).
    points = load_points(ids, since=now - timedelta(days=max(days, growth.FIT_WINDOW_DAYS)))
    fitted = fits({pk: growth.usable_points(points[pk], now) for pk in ids})
    checks = check_counts(ids, start, now)
    worst = {r["tank_id"]: r for r in Deviation.objects.unresolved().filter(tank_id__in=ids).values("tank_id")
             .annotate(n=Count("id"), worst=Subquery(
                 Deviation.objects.unresolved().filter(tank_id=OuterRef("tank_id")).order_by("-severity")
                 .values("severity")[:1]))}
    rows = []
    for tank in tanks:
        c = checks.get(tank.pk, {})
        s = summarize(tank, points[tank.pk], c.get("dead") or 0, now, days, fitted[tank.pk])
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


def overview_rows(data: dict, trend_start: datetime, rows: list[dict] | None = None) -> list[dict]:
    """The tidy rows behind the overview figure and its CSV (charts.OVERVIEW_COLUMNS), for `rows`
    (a selection of data["rows"]; all of them by default)."""
    out = []
    end = data["end"]
    zone = timezone.get_current_timezone()  # once: the CSV of a facility has thousands of times
    end_local = end.astimezone(zone)
    for r in data["rows"] if rows is None else rows:
        tank, s = r["tank"], r["summary"]
        base = {"tank": tank.code, "room": tank.room.code, "species": tank.species.scientific_name, "rank": r["rank"]}
        for p in r["points"]:
            if p.kind != "before-split" and trend_start <= p.at <= end:
                out.append({**base, "series": "population", "at": p.at.astimezone(zone), "value": p.value,
                            "lower": p.lower, "upper": p.upper, "unit": "animals", "note": p.kind})
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
            out.append({**base, "series": name, "at": end_local, "value": value,
                        "unit": charts.OVERVIEW_METRICS.get(name, "animals"), "note": note})
    return out



def select(data: dict, room: str = "", page: int | None = 1) -> dict:
    """The tanks a person looks at together: one room (by code) or all rooms, in rank order (worst
    first), PAGE_TANKS at a time (`page` from 1; None for all). The ranks stay the facility's.

    Raises ValueError naming the field and its allowed values when the room or page does not exist.
    """
    codes = sorted({r["tank"].room.code for r in data["rows"]})
    if room and room not in codes:
        raise ValueError(f"Room: '{room}' is not a room with tanks in use; choose one of {', '.join(codes)}.")
    rows = [r for r in data["rows"] if not room or r["tank"].room.code == room]
    pages = max(1, -(-len(rows) // PAGE_TANKS))
    if page is not None and not 1 <= page <= pages:
        raise ValueError(f"Page: {page} is not between 1 and {pages}.")
    shown = rows if page is None else rows[(page - 1) * PAGE_TANKS:page * PAGE_TANKS]
    where = f"room {room}" if room else "all rooms"
    label = where if page is None or pages == 1 else f"{where}, page {page} of {pages}"
    return {"rows": shown, "room": room, "page": page, "pages": pages, "page_numbers": range(1, pages + 1),
            "rooms_with_tanks": codes, "label": label, "total": len(rows),
            "first_rank": shown[0]["rank"] if shown else None, "per_page": PAGE_TANKS}
