"""Reading the records for the period report: a fixed number of queries per section, whatever the
number of tanks, checks or trials, turned into the plain rows experiments/period_report/sections.py takes.
"""
from __future__ import annotations

from dataclasses import dataclass
from types import SimpleNamespace
from datetime import date, datetime, time, timedelta

from django.db.models import Exists, OuterRef, Q, Subquery
from django.utils import timezone

from colonies import derived, growth, health_series, parameters
from colonies.models import Census, Check, DeadRemoval, Deviation, Feeding, Room, Split, Tank, WaterChange

from .. import blinding, reports
from ..models import Cohort, Dish, PeriodReport, Protocol, Study, Trial
from . import sections

Scope = PeriodReport.Scope
TRIAL_RELATED = ("study", "cohort__origin_tank", "dish", "protocol", "protocol_version", "run_by", "scored_by",
                 "override__recorded_by")
HIDDEN_REASON = "(hidden while the study is blinded)"


def when(dt) -> str:
    return reports._when(dt)


@dataclass
class Period:
    first: date
    last: date

    @property
    def start(self) -> datetime:
        return timezone.make_aware(datetime.combine(self.first, time.min))

    @property
    def end(self) -> datetime:  # exclusive: the start of the day after the last
        return timezone.make_aware(datetime.combine(self.last + timedelta(days=1), time.min))

    def days(self, first: date | None = None):
        day = max(self.first, first or self.first)
        while day <= self.last:
            yield day
            day += timedelta(days=1)


@dataclass
class ReportScope:
    kind: str
    key: str
    label: str
    tanks: Q  # the tanks whose husbandry the report covers
    trials: Q  # the trials (exposures, corrections)
    cohorts: Q  # the cohorts whose animals count
    protocols: Q  # the protocols listed in the animals section
    deviations: Q  # deviations beyond those of the tanks (a protocol's overrides)


def resolve_scope(kind: str, key: str, period: Period) -> ReportScope:
    """The scope's filters; raises LookupError naming the field when the room, protocol or study is unknown."""
    in_force = Q(starts_on__lte=period.last, expires_on__gte=period.first)
    if kind == Scope.FACILITY:
        return ReportScope(kind, "", "Whole facility", Q(), Q(), Q(), in_force | Q(cohorts__drawn_at__lt=period.end),
                           Q())
    if kind == Scope.ROOM:
        room = Room.objects.filter(pk=int(key) if str(key).isdigit() else None).first()
        if room is None:
            raise LookupError(f"Room: '{key}' is not a room of this facility.")
        return ReportScope(kind, str(room.pk), f"Room {room.name}", Q(room=room),
                           Q(cohort__origin_tank__room=room), Q(origin_tank__room=room),
                           Q(cohorts__origin_tank__room=room), Q(pk__in=[]))
    if kind == Scope.PROTOCOL:
        protocol = Protocol.objects.filter(reference=key).first()
        if protocol is None:
            raise LookupError(f"Protocol: '{key}' is not a protocol reference.")
        return ReportScope(kind, protocol.reference, f"Protocol {protocol}",
                           Q(cohorts_drawn__protocol=protocol, cohorts_drawn__drawn_at__lt=period.end),
                           Q(protocol=protocol), Q(protocol=protocol), Q(pk=protocol.pk),
                           Q(pk__in=Trial.objects.filter(protocol=protocol, override__deviation__isnull=False)
                             .values("override__deviation")))
    if kind == Scope.STUDY:
        study = Study.objects.filter(code=key).first()
        if study is None:
            raise LookupError(f"Study: '{key}' is not a study code.")
        return ReportScope(kind, study.code, f"Study {study.code} · {study.title}",
                           Q(cohorts_drawn__trials__study=study), Q(study=study), Q(trials__study=study),
                           Q(pk=study.protocol_id),
                           Q(pk__in=Trial.objects.filter(study=study, override__deviation__isnull=False)
                             .values("override__deviation")))
    raise LookupError(f"Scope: '{kind}' is not one of {', '.join(Scope.values)}.")


def scope_tanks(scope: ReportScope, period: Period) -> list[Tank]:
    ids = Tank.objects.filter(scope.tanks, started_on__lte=period.last).values("pk")
    return list(Tank.objects.filter(pk__in=ids).select_related("species").order_by("code")
                .prefetch_related("species__targets", "target_overrides", "species__measurement_plans",
                                  "measurement_overrides"))


# ---------------------------------------------------------------------------------------------
# 1. Compliance and plans
# ---------------------------------------------------------------------------------------------
def care(tanks: list[Tank], period: Period) -> tuple[list[dict], list[dict]]:
    start, end = period.start, period.end
    ids = [t.pk for t in tanks]
    zone = timezone.get_current_timezone()
    keys = parameters.KEYS
    checks: dict[int, list[dict]] = {pk: [] for pk in ids}
    for row in (Check.objects.current().filter(tank_id__in=ids, observed_at__gte=start, observed_at__lt=end)
                .order_by("tank_id", "observed_at", "pk").values("tank_id", "observed_at", "flags", *keys)):
        checks[row["tank_id"]].append(row)
    before = {f"last_{k}": Subquery(Check.objects.current().filter(tank=OuterRef("pk"), observed_at__lt=start,
                                                                    **{f"{k}__isnull": False})
                                    .order_by("-observed_at").values("observed_at")[:1]) for k in keys}
    before["last_water"] = Subquery(WaterChange.objects.current().filter(tank=OuterRef("pk"), observed_at__lt=start)
                                    .order_by("-observed_at").values("observed_at")[:1])
    last = {r["pk"]: r for r in Tank.objects.filter(pk__in=ids).annotate(**before).values("pk", *before)}
    waters: dict[int, list[datetime]] = {pk: [] for pk in ids}
    for tank_id, at in (WaterChange.objects.current().filter(tank_id__in=ids, observed_at__gte=start, observed_at__lt=end)
                        .order_by("tank_id", "observed_at").values_list("tank_id", "observed_at")):
        waters[tank_id].append(at)
    devs: dict[tuple[int, str], list] = {}
    for tank_id, key, opened, closed in (Deviation.objects.filter(tank_id__in=ids, opened_at__lt=end).exclude(parameter="")
                                         .filter(Q(closed_at__isnull=True) | Q(closed_at__gt=start))
                                         .values_list("tank_id", "parameter", "opened_at", "closed_at")):
        for measured in derived.measured_keys(key):
            devs.setdefault((tank_id, measured), []).append((opened, closed))
    day_starts = {d: timezone.make_aware(datetime.combine(d, time.min)) for d in period.days()}
    compliance, plans = [], []
    for tank in tanks:
        rows = checks[tank.pk]
        values = [{**{k: r[k] for k in keys}, **derived.derive({k: r[k] for k in keys}, tank.species.habitat)}
                  for r in rows]
        for key, target in tank.care_targets().items():
            if target.low is None and target.high is None:
                continue
            entry = derived.label_for(key)
            compliance.append(sections.TankParameter(
                tank.code, key, entry.label_with_unit, target.text(entry.unit),
                [sections.Reading(r["observed_at"], r["observed_at"].astimezone(zone).date(), v.get(key), key in r["flags"])
                 for r, v in zip(rows, values)]))
        water_before = last[tank.pk]["last_water"]
        for key, plan in tank.plans().items():
            last_at = last[tank.pk][f"last_{key}"]
            plans.append(sections.PlanInput(
                tank.code, key, parameters.BY_KEY[key].label_with_unit, plan, max(period.first, tank.started_on),
                period.last, day_starts, last_at, last_at.astimezone(zone).date() if last_at else None,
                [(r["observed_at"], r["observed_at"].astimezone(zone).date()) for r in rows if r[key] is not None],
                ([water_before] if water_before else []) + waters[tank.pk], devs.get((tank.pk, key), [])))
    return sections.compliance(compliance, end), sections.missed_days(plans)


# ---------------------------------------------------------------------------------------------
# 2. Deviations
# ---------------------------------------------------------------------------------------------
def deviations(scope: ReportScope, tank_ids: list[int], period: Period) -> tuple[list[dict], list[dict]]:
    start, end = period.start, period.end
    touching = (Q(opened_at__gte=start, opened_at__lt=end) | Q(closed_at__gte=start, closed_at__lt=end)
                | (Q(opened_at__lt=end) & (Q(closed_at__isnull=True) | Q(closed_at__gte=end))))
    qs = Deviation.objects.filter(touching).select_related("tank", "closed_by")
    if scope.kind != Scope.FACILITY:
        qs = qs.filter(Q(tank_id__in=tank_ids) | scope.deviations)
    rows = [sections.DeviationRow(d.pk, d.tank.code if d.tank_id else d.subject, d.get_rule_display(), d.severity,
                                  d.get_severity_display(), d.opened_at, d.closed_at, d.summary, d.corrective_action,
                                  d.closed_by.get_username() if d.closed_by_id else "")
            for d in qs.order_by("opened_at", "pk")]
    return sections.deviation_summary(rows, start, end), sections.deviation_list(rows, start, end, when)


# ---------------------------------------------------------------------------------------------
# 3. Mortality
# ---------------------------------------------------------------------------------------------
def mortality(tanks: list[Tank], period: Period) -> list[dict]:
    ids = [t.pk for t in tanks]
    points = health_series.load_points(ids, since=period.start)
    # check_counts takes a closed interval: end less a microsecond keeps the next day's midnight out.
    counts = health_series.check_counts(ids, period.start, period.end - timedelta(microseconds=1))
    rows = []
    for tank in tanks:
        deaths = int((counts.get(tank.pk) or {}).get("dead") or 0)
        m = growth.mortality(points.get(tank.pk, []), deaths, period.start, period.end,
                             started_at=health_series.started_at(tank))
        rows.append((tank.code, deaths, m.animal_days))
    return sections.mortality(rows)


# ---------------------------------------------------------------------------------------------
# 4. Animals per protocol
# ---------------------------------------------------------------------------------------------
def animals(scope: ReportScope, period: Period) -> list[dict]:
    start, end = period.start, period.end
    protocols = list(Protocol.objects.filter(scope.protocols).distinct().order_by("reference")
                     .values("pk", "reference", "title", "max_animals_total"))
    totals = {p["pk"]: {"drawn": 0, "to_end": 0, "used": 0, "returned": 0} for p in protocols}
    cohorts = Cohort.objects.filter(scope.cohorts, protocol_id__in=totals).distinct()
    for pk, protocol_id, size, drawn_at, returned, ended_at in cohorts.values_list(
            "pk", "protocol_id", "size", "drawn_at", "returned_count", "ended_at").filter(drawn_at__lt=end):
        t = totals[protocol_id]
        t["to_end"] += size
        t["drawn"] += size if drawn_at >= start else 0
        t["returned"] += (returned or 0) if ended_at and start <= ended_at < end else 0
    exposed = Exists(Trial.objects.counting().filter(dish=OuterRef("pk")))
    for protocol_id, animals_in, set_up_at, returned, ended_at, was_exposed in (
            Dish.objects.current().filter(cohort__in=cohorts.values("pk")).annotate(exposed=exposed)
            .values_list("cohort__protocol_id", "animals", "set_up_at", "returned_count", "ended_at", "exposed")):
        t = totals[protocol_id]
        t["used"] += animals_in if was_exposed and start <= set_up_at < end else 0
        t["returned"] += (returned or 0) if ended_at and start <= ended_at < end else 0
    return sections.animals(sections.ProtocolAnimals(p["reference"], p["title"], p["max_animals_total"],
                                                     totals[p["pk"]]["drawn"], totals[p["pk"]]["to_end"],
                                                     totals[p["pk"]]["used"], totals[p["pk"]]["returned"])
                            for p in protocols)


# ---------------------------------------------------------------------------------------------
# 5. Exposures
# ---------------------------------------------------------------------------------------------
def exposures(scope: ReportScope, period: Period, user) -> tuple[list[dict], list[dict]]:
    shown = list(Trial.objects.counting().filter(scope.trials, run_at__gte=period.start, run_at__lt=period.end)
                 .select_related(*TRIAL_RELATED).order_by("dish_id", "run_at", "pk"))
    every = reports.every_exposure({t.dish_id for t in shown})
    ledger = reports.ledger_rows(shown, every, user)
    for row in ledger:
        t = row["trial"]
        override = t.override if reports._has_override(t) else None
        row["override_breaches"] = "; ".join(override.breaches) if override and not row["blinded"] else ""
        if override and row["blinded"]:
            row["override_breaches"] = HIDDEN_REASON
    rows = sections.exposures(ledger)
    return sections.exposure_summary(rows), rows


# ---------------------------------------------------------------------------------------------
# 6. Corrections and voids
# ---------------------------------------------------------------------------------------------
HUSBANDRY = ((Check, "Check"), (Feeding, "Feeding"), (WaterChange, "Water change"), (Census, "Census"),
             (DeadRemoval, "Dead removed"))
TRIAL_CORRECTIONS = ("Voided:", "Outcome corrected", "Excluded:")


def _action(reason: str) -> str:
    return "voided" if reason.startswith("Voided:") else "excluded" if reason.startswith("Excluded:") else "corrected"


def changes(scope: ReportScope, tanks: list[Tank], period: Period, user) -> list[dict]:
    """Corrections and voids with a reason in the period: one query per kind of record."""
    in_period = {"history_type": "~", "history_date__gte": period.start, "history_date__lt": period.end}
    codes = {t.pk: t.code for t in tanks}
    out = []
    sources = [(model.history.filter(tank_id__in=list(codes), **in_period), "tank_id", label) for model, label in HUSBANDRY]
    sources.append((Split.history.filter(source_id__in=list(codes), **in_period), "source_id", "Split"))
    for history, tank_field, label in sources:
        for pk, tank_id, at, who, reason in history.values_list("id", tank_field, "history_date",
                                                                "history_user__username", "history_change_reason"):
            reason = reason or ""
            out.append(sections.Change(at, who or "", f"{label} #{pk} · {codes[tank_id]}", _action(reason), reason))
    corrections = Q()
    for prefix in TRIAL_CORRECTIONS:
        corrections |= Q(history_change_reason__startswith=prefix)
    trials = (Trial.history.filter(corrections, id__in=Trial.objects.filter(scope.trials).values("pk"), **in_period)
              .values_list("history_date", "history_user__username", "code", "run_by_id", "history_change_reason",
                           "study__code", "study__blinded", "study__unblinded_at"))
    for at, who, code, run_by_id, reason, study, blinded, unblinded_at in trials:
        reason = reason or ""
        # experiments/blinding.py decides, on the few fields it reads: while the study is blind, only the trial's
        # operator may read why it changed (a reason may name the condition).
        trial = SimpleNamespace(run_by_id=run_by_id, study=SimpleNamespace(blinded=blinded, unblinded_at=unblinded_at))
        seen = blinding.may_see_condition(user, trial)
        out.append(sections.Change(at, who or "", f"Trial {code} · study {study}", _action(reason),
                                   reason if seen else f"{reason.split(':')[0]}: {HIDDEN_REASON}"))
    dishes = Dish.objects.filter(cohort__in=Cohort.objects.filter(scope.cohorts)).values("pk")
    for pk, at, who, reason in (Dish.history.filter(id__in=dishes, history_change_reason__startswith="Voided:", **in_period)
                                .values_list("id", "history_date", "history_user__username", "history_change_reason")):
        out.append(sections.Change(at, who or "", f"Dish #{pk}", "voided", reason or ""))
    return sections.changes(out, when)


# ---------------------------------------------------------------------------------------------
# The whole report
# ---------------------------------------------------------------------------------------------
@dataclass
class Report:
    period: Period
    scope: ReportScope
    sections: list  # render.Section, in the page's order

    def section(self, number: str):
        return next(s for s in self.sections if s.number == number)


def build(kind: str, key: str, period: Period, user) -> Report:
    """Every section as `user` may see it (experiments/blinding.py); the pages pass None, so that no one's
    view of a blind study (its operators see their own trials' conditions) changes the files. A fixed
    number of queries."""
    from .render import Section

    scope = resolve_scope(kind, key, period)
    tanks = scope_tanks(scope, period)
    ids = [t.pk for t in tanks]
    compliance, plans = care(tanks, period)
    dev_summary, dev_list = deviations(scope, ids, period)
    exp_summary, exp_rows = exposures(scope, period, user)
    return Report(period, scope, [
        Section("1a", "care-targets", "Care-target compliance per tank and parameter", compliance, sections.COLUMNS["1a"]),
        Section("1b", "measurement-plans", "Measurements due and missed against each plan", plans, sections.COLUMNS["1b"]),
        Section("2a", "deviations-by-rule", "Deviations by rule and severity", dev_summary, sections.COLUMNS["2a"]),
        Section("2b", "deviations", "Deviations opened, closed or open in the period", dev_list, sections.COLUMNS["2b"]),
        Section("3", "mortality", "Mortality per 1,000 animal-days", mortality(tanks, period), sections.COLUMNS["3"]),
        Section("4", "animals", "Animals drawn and used per protocol", animals(scope, period), sections.COLUMNS["4"]),
        Section("5a", "exposures-by-dish", "Exposures per dish", exp_summary, sections.COLUMNS["5a"]),
        Section("5b", "exposures", "Every exposure against its protocol's limits", exp_rows, sections.COLUMNS["5b"]),
        Section("6", "corrections", "Corrections and voids", changes(scope, tanks, period, user), sections.COLUMNS["6"]),
    ] + ([Section("7", "validity", "Validity checks of the study", validity(scope), sections.COLUMNS["7"])]
         if scope.kind == "study" else []))


def validity(scope: ReportScope) -> list[dict]:
    """The study's declared validity criteria judged on its records, as its page shows them (two queries)."""
    from ..methods_records import validity_for

    study = Study.objects.get(code=scope.key)
    trials = list(Trial.objects.filter(study=study).select_related("cohort__origin_tank").order_by("pk"))
    return [{"criterion": r.label, "requirement": r.requirement, "result": r.status, "evidence": r.evidence,
             "modelled_on": r.guideline} for r in validity_for(study, trials)]
