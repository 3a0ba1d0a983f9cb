"""The records behind a study's methods draft and validity results: a thin query layer over plain rows.

`draft_for(study)` reads everything the draft needs in a fixed number of queries (independent of the
number of trials, tanks and husbandry records) and hands plain rows to experiments/methods.py;
`validity_for(study, trials)` does the same for experiments/validity.py. While the study is blind the
rows carry no condition, stimulus or free-text reason (experiments/blinding.py: the allocation and
analyses by condition are hidden from everyone), so nothing per condition can reach the text.

The study period runs from the first lab day a cohort used by the study was drawn (or a trial run)
to the last lab day a trial was run; the husbandry of the source tanks is read over those days, and
stocking density also from the latest census in CENSUS_LOOKBACK_DAYS before them.
"""
from __future__ import annotations

from datetime import datetime, time, timedelta

from django.db import transaction
from django.db.models import Q
from django.utils import timezone

from colonies import derived, parameters
from colonies.models import Census, Check, DeadRemoval, Deviation, Feeding, WaterChange

from . import methods, services, validity
from .models import ImageMeasurement, Study, Trial

CENSUS_LOOKBACK_DAYS = 60
DRAFT_TRIAL_RELATED = ("cohort__origin_tank__species", "cohort__origin_tank__room", "dish", "run_by", "scored_by",
                       "override")
DO_PCT = derived.BY_KEY["do_pct_sat"]


def _local(moment: datetime) -> datetime:
    return timezone.localtime(moment)


def study_period(trials) -> tuple:
    """(first day, last day) as lab dates, or (None, None) before the first trial."""
    counting = [t for t in trials if not t.is_voided]
    if not counting:
        return None, None
    first = min(min(_local(t.run_at) for t in counting), min(_local(t.cohort.drawn_at) for t in counting))
    return first.date(), max(_local(t.run_at) for t in counting).date()


def _bounds(first_day, last_day) -> tuple[datetime, datetime]:
    tz = timezone.get_current_timezone()
    return (timezone.make_aware(datetime.combine(first_day, time.min), tz),
            timezone.make_aware(datetime.combine(last_day + timedelta(days=1), time.min), tz))


def _tanks(trials) -> dict:
    """Source tanks by id, in code order, from the trials' cohorts (loaded with select_related)."""
    tanks = {t.cohort.origin_tank_id: t.cohort.origin_tank for t in trials if not t.is_voided}
    return dict(sorted(tanks.items(), key=lambda kv: kv[1].code))


def _check_rows(tank_ids, start, end) -> list[tuple[str, datetime, dict]]:
    """One query: the current checks of the tanks in [start, end), with oxygen saturation derived."""
    rows = (Check.objects.current().filter(tank_id__in=tank_ids, observed_at__gte=start, observed_at__lt=end)
            .order_by("tank__code", "observed_at")
            .values("tank__code", "tank__species__habitat", "observed_at", "dead_removed", *parameters.KEYS))
    out = []
    for r in rows:
        readings = {k: r[k] for k in parameters.KEYS}
        readings["do_pct_sat"] = derived.value_of(DO_PCT, readings, r["tank__species__habitat"])
        readings["dead_removed"] = r["dead_removed"]
        out.append((r["tank__code"], _local(r["observed_at"]), readings))
    return out


def validity_for(study: Study, trials: list[Trial]) -> list[validity.Result]:
    """The study's declared criteria judged on its records; no query when none are declared, else one.

    `trials`: the study's trials with cohort__origin_tank loaded (the study page's list)."""
    if not study.validity_criteria:
        return []
    first, last = study_period(trials)
    tanks = _tanks(trials)
    checks = _check_rows(list(tanks), *_bounds(first, last)) if first else []
    return validity.validity_results(study.validity_criteria, _evidence(study, trials, tanks, checks, first, last))


def _evidence(study, trials, tanks, checks, first, last) -> validity.Evidence:
    blind = study.is_blind
    rows = [validity.TrialRow(code=t.code, condition="" if blind else t.condition, animals=t.animals,
                              mortality_24h=t.mortality_24h, voided=t.is_voided, water_temp_c=t.water_temp_c)
            for t in trials]
    check_rows = [validity.CheckRow(tank=c[0], observed_at=c[1], readings=c[2]) for c in checks]
    return validity.Evidence(blind=blind, reference="" if len(study.conditions) < 2 else study.reference_condition,
                             trials=rows, checks=check_rows, tanks=[t.code for t in tanks.values()],
                             first_day=first, last_day=last)


def _measuring(study) -> tuple[dict[int, str], methods.Measuring]:
    """The scorer's decision per trial (from the measurement shown when it was scored) and the settings used."""
    rows = list(ImageMeasurement.objects.done().filter(trial__study=study).order_by("trial_id", "requested_at", "pk")
                .values("trial_id", "decision", "settings", "threshold"))
    decision = {r["trial_id"]: r["decision"] for r in rows if r["decision"]}
    seen: dict[str, set] = {}
    skimage = set()
    for r in rows:
        s = r["settings"] or {}
        flat = {**(s.get("segmentation") or {}), "threshold": r["threshold"], "interval_s": s.get("interval_s")}
        for key, value in flat.items():
            if value is not None and not isinstance(value, (list, dict)):
                seen.setdefault(key, set()).add(str(value))
        versions = s.get("versions") or {}
        if isinstance(versions, dict) and versions.get("scikit-image"):
            skimage.add(str(versions["scikit-image"]))
    settings = {k: (next(iter(v)) if len(v) == 1 else "varied: " + ", ".join(sorted(v))) for k, v in seen.items()}
    return decision, methods.Measuring(count=len(rows), settings=settings, skimage=", ".join(sorted(skimage)))


def _trial_row(t: Trial, blind: bool, decision: dict) -> methods.TrialRow:
    override = getattr(t, "override", None)  # the reverse one-to-one raises AttributeError when there is none
    return methods.TrialRow(
        code=t.code, slot=t.slot, condition="" if blind else t.condition, animals=t.animals,
        run_at=_local(t.run_at), run_by=t.run_by.get_username(), dish=t.dish.label, cohort=t.cohort.label,
        tank=t.cohort.origin_tank.code, dish_animals=t.dish.animals, voided=t.is_voided,
        void_reason="" if blind else t.void_reason,
        excluded=t.is_excluded, exclusion_reason="" if blind else t.exclusion_reason, scored=t.is_scored,
        censored=t.censored, scored_by=t.scored_by.get_username() if t.scored_by else "",
        mortality_24h=t.mortality_24h, vessel=t.vessel, arena_diameter_mm=t.arena_diameter_mm,
        water_volume_ml=t.water_volume_ml, water_temp_c=t.water_temp_c, light_lux=t.light_lux,
        acclimation_min=t.acclimation_min, stimulus="" if blind else t.stimulus_text(),
        measured=decision.get(t.pk, ""), overridden=override is not None,
        override_reason="" if blind or override is None else override.reason)


def _husbandry(tanks: dict, dish_ids, first, last):
    start, end = _bounds(first, last)
    ids = list(tanks)
    window = {"tank_id__in": ids, "observed_at__gte": start, "observed_at__lt": end}
    checks = _check_rows(ids, start, end)
    feedings = [(r["tank__code"], _local(r["observed_at"]), r["food"], r["amount"], r["unit"]) for r in
                Feeding.objects.current().filter(**window).order_by("tank__code", "observed_at")
                .values("tank__code", "observed_at", "food", "amount", "unit")]
    changes = [(r["tank__code"], _local(r["observed_at"]), r["percent"], r["source_water"]) for r in
               WaterChange.objects.current().filter(**window).order_by("tank__code", "observed_at")
               .values("tank__code", "observed_at", "percent", "source_water")]
    censuses, before = [], {}
    for r in (Census.objects.current().filter(tank_id__in=ids, estimate__isnull=False, observed_at__lt=end,
                                              observed_at__gte=start - timedelta(days=CENSUS_LOOKBACK_DAYS))
              .order_by("tank__code", "observed_at").values("tank__code", "observed_at", "estimate")):
        row = (r["tank__code"], _local(r["observed_at"]), r["estimate"])
        if r["observed_at"] < start:
            before[r["tank__code"]] = row  # ordered by time: the last one before the period wins
        else:
            censuses.append(row)
    deaths = [(c[0], c[1], c[2]["dead_removed"]) for c in checks if c[2]["dead_removed"]]
    deaths += [(r["tank__code"], _local(r["observed_at"]), r["count"]) for r in
               DeadRemoval.objects.current().filter(**window).values("tank__code", "observed_at", "count")]
    subjects = [f"dish:{pk}" for pk in dish_ids]
    deviations = [(r["tank__code"] or "", Deviation.Rule(r["rule"]).label, Deviation.Severity(r["severity"]).label)
                  # the tanks' deviations of the period; the dishes' whenever opened (an override's may come later)
                  for r in Deviation.objects.filter(Q(tank_id__in=ids, opened_at__gte=start, opened_at__lt=end)
                                                    | Q(subject__in=subjects))
                  .order_by("opened_at", "pk").values("tank__code", "rule", "severity")]
    return methods.Husbandry(checks=checks, feedings=feedings, water_changes=changes,
                             censuses=sorted(censuses + list(before.values())), deaths=deaths,
                             deviations=deviations)


def draft_for(study: Study) -> methods.Draft:
    """Every row of the methods draft; a constant number of queries (tests/experiments/test_methods_pages.py)."""
    trials = list(study.trials.select_related(*DRAFT_TRIAL_RELATED).order_by("slot", "pk"))
    blind = study.is_blind
    decision, measuring = _measuring(study)
    first, last = study_period(trials)
    tanks = _tanks(trials)
    counting = [t for t in trials if not t.is_voided]
    dish_ids = {t.dish_id for t in counting}
    husbandry = _husbandry(tanks, dish_ids, first, last) if first else methods.Husbandry()
    validity_checks = [(c[0], c[1], c[2]) for c in husbandry.checks]
    cohorts = {t.cohort_id: t.cohort for t in counting}
    tank_facts = [methods.TankFacts(
        code=tank.code, species=tank.species.scientific_name + (f" ({tank.species.common_name})"
                                                                if tank.species.common_name else ""),
        room=tank.room.name, volume_l=tank.volume_l, system=tank.get_system_display().lower(),
        substrate=tank.substrate, cohorts=sum(1 for c in cohorts.values() if c.origin_tank_id == tank_id),
        animals_drawn=sum(c.size for c in cohorts.values() if c.origin_tank_id == tank_id))
        for tank_id, tank in tanks.items()]
    results = validity.validity_results(study.validity_criteria or [],
                                        _evidence(study, trials, tanks, validity_checks, first, last))
    facts = methods.StudyFacts(
        code=study.code, title=study.title, question=study.question, conditions=list(study.conditions),
        reference=study.reference_condition, replicates=study.replicates, slots=len(study.allocation),
        method=study.method, method_label=study.get_method_display(), seed=study.seed, generator=study.generator,
        allocated_at=_local(study.allocated_at) if study.allocated_at else None, blinded=study.blinded, blind=blind,
        unblinded_at=_local(study.unblinded_at) if study.unblinded_at else None,
        unblinded_by=study.unblinded_by.get_username() if study.unblinded_by_id else "",
        unblind_reason=study.unblind_reason, scorer_not_operator=study.scorer_not_operator,
        primary_outcome=study.primary_outcome, window_s=study.observation_window_s,
        exclusion_criteria=study.exclusion_criteria, owner=study.owner.get_username(),
        protocol_reference=study.protocol.reference, protocol_title=study.protocol.title,
        protocol_approver=study.protocol.approver, protocol_approved_on=study.protocol.approved_on)
    return methods.Draft(study=facts, trials=[_trial_row(t, blind, decision) for t in trials], tanks=tank_facts,
                         husbandry=husbandry, measuring=measuring, versions=methods.software_versions(),
                         first_day=first, last_day=last, validity=results,
                         dishes_died=len({t.dish_id for t in counting if t.dish.end == "died"}))


def set_validity_criteria(*, user, study: Study, criteria: list[dict]) -> Study:
    """The owner (or a manager) declares the criteria before unblinding; the history keeps each version."""
    clean = validity.clean_criteria(criteria)
    with transaction.atomic():
        study = Study.objects.select_for_update().get(pk=study.pk)
        services.require_study_owner(user, study, "change the validity criteria")
        if study.unblinded_at is not None or study.is_locked:
            raise services.Refused("Validity criteria: fixed once outcomes are locked or the study is unblinded; "
                                   "nothing was changed.")
        study.validity_criteria = clean
        return services._save(study, user, "Validity criteria declared")
