"""Study tables and statistics: trials to tidy rows, rows to summaries, curves and fits.

The views pick the trials (a fixed number of queries); everything here works on the rows, except the
streamed CSV tables at the end, which read their trials a chunk at a time.
"""
from __future__ import annotations

import csv
import json
from collections.abc import Iterator
from dataclasses import dataclass, field
from datetime import timedelta

import numpy as np
import pandas as pd
from django.utils import timezone

from colonies import exports

from . import analysis, blinding, dose_response
from .charts import KM_TABLE_COLUMNS
from .models import LATE_OUTCOME_FIELDS, Trial

# Tidy export: one row per trial, every setting, derived value and outcome. Units in the names.
TIDY_COLUMNS = [
    "study", "slot", "code", "condition", "replicate", "status", "exclusion_reason", "cohort", "dish", "origin_tank",
    "protocol", "run_at", "run_by", "vessel", "arena_diameter_mm", "water_volume_ml", "water_temp_c", "light_lux",
    "acclimation_min", "animals", "stimulus", "wavelength_nm", "irradiance_mw_cm2", "duration_s", "dose_mj_cm2",
    "voltage_v", "electrode_gap_cm", "field_v_cm", "pulse_width_ms", "pulse_count", "pulse_frequency_hz",
    "pulse_on_s", "train_s", "temp_step_c", "temp_rate_c_min", "substance", "concentration_um", "mechanical_note",
    "aggregate_s", "observation_window_s", "disperse_s", "censored", "dispersed", "clusters", "mortality_24h",
    "mortality_24h_entered_at", "mortality_24h_after_unblinding", "scored_by", "scored_at", "override_reason",
]
# What a row of a trial whose condition the reader may not see leaves out (experiments/blinding.py).
BLINDED_COLUMNS = [c for c in TIDY_COLUMNS if c in blinding.HIDDEN_TRIAL_FIELDS or c in ("stimulus", "override_reason")]
NUMERIC = ("arena_diameter_mm", "water_volume_ml", "water_temp_c", "light_lux", "acclimation_min", "wavelength_nm",
           "irradiance_mw_cm2", "duration_s", "dose_mj_cm2", "voltage_v", "electrode_gap_cm", "field_v_cm",
           "pulse_width_ms", "pulse_count", "pulse_frequency_hz", "pulse_on_s", "train_s", "temp_step_c",
           "temp_rate_c_min", "concentration_um", "aggregate_s", "disperse_s", "mortality_24h")


def _when(dt) -> str:
    return timezone.localtime(dt).strftime("%Y-%m-%d %H:%M") if dt else ""


def trial_status(t: Trial) -> str:
    if t.is_voided:
        return "voided"
    if t.is_excluded:
        return "excluded"
    return "scored" if t.is_scored else "awaiting score"


def tidy_frame(trials: list[Trial], user=None) -> pd.DataFrame:
    """One row per trial; trials need study, cohort__origin_tank, dish, protocol, run_by, scored_by and
    override loaded (select_related) so that this runs no query.

    With `user`, a trial whose condition that user may not see has BLINDED_COLUMNS blanked (the
    condition and stimulus columns say "blinded"): the table as that person may read it.
    """
    rows = []
    for t in trials:
        override = getattr(t, "override", None) if _has_override(t) else None
        row = {
            "study": t.study.code, "slot": t.slot, "code": t.code, "condition": t.condition, "replicate": t.replicate,
            "status": trial_status(t), "exclusion_reason": t.exclusion_reason or t.void_reason,
            "cohort": t.cohort.label, "dish": t.dish.label, "origin_tank": t.cohort.origin_tank.code,
            "protocol": t.protocol.reference,
            "run_at": _when(t.run_at), "run_by": t.run_by.get_username(), "vessel": t.vessel, "animals": t.animals,
            "stimulus": t.kind, "substance": t.substance, "mechanical_note": t.mechanical_note,
            "observation_window_s": t.observation_window_s,
            "censored": t.censored if t.is_scored else None, "dispersed": t.dispersed,
            "clusters": json.dumps(t.clusters) if t.clusters else "",
            "scored_by": t.scored_by.get_username() if t.scored_by_id else "", "scored_at": _when(t.scored_at),
            "override_reason": override.reason if override else "",
        }
        row.update({name: getattr(t, name) for name in NUMERIC})
        for name in LATE_OUTCOME_FIELDS:
            row[f"{name}_entered_at"] = _when(getattr(t, f"{name}_entered_at"))
            row[f"{name}_after_unblinding"] = getattr(t, f"{name}_after_unblinding")
        if user is not None and not blinding.may_see_condition(user, t):
            row.update({column: None for column in BLINDED_COLUMNS},
                       condition=blinding.BLINDED, stimulus=blinding.BLINDED)
        rows.append(row)
    return pd.DataFrame(rows, columns=TIDY_COLUMNS)


def _has_override(trial: Trial) -> bool:
    try:
        trial.override
    except Trial.override.RelatedObjectDoesNotExist:
        return False
    return True


def analysable(frame: pd.DataFrame) -> pd.DataFrame:
    """Scored trials that are neither voided nor excluded."""
    return frame[frame["status"] == "scored"]


@dataclass
class ConditionRow:
    condition: str
    summary: dict
    logrank: dict | None = None  # vs the reference condition: statistic, p, or error


@dataclass
class StudyAnalysis:
    conditions: list[ConditionRow]
    reference: str
    km_table: pd.DataFrame
    no_comparison: str = ""  # why there is no comparison with the reference (it has no analysable trials)
    dose_groups: pd.DataFrame | None = None
    dose_fit: dose_response.DoseResponseFit | None = None
    dose_curve: pd.DataFrame | None = None
    dose_error: str = ""
    control: tuple[int, int] | None = None
    notes: list[str] = field(default_factory=list)

    @property
    def varies_dose(self) -> bool:
        return self.dose_groups is not None


def km_table(frame: pd.DataFrame, order: list[str]) -> pd.DataFrame:
    parts = []
    for condition in order:
        rows = frame[frame["condition"] == condition]
        if rows.empty:
            continue
        km = analysis.kaplan_meier(rows["disperse_s"].astype(float), rows["dispersed"].astype(bool))
        km.insert(0, "condition", condition)
        parts.append(km)
    if not parts:
        return pd.DataFrame(columns=list(KM_TABLE_COLUMNS))
    return pd.concat(parts, ignore_index=True)


def analyse(frame: pd.DataFrame, conditions: list[str], *, reference: str) -> StudyAnalysis:
    """Summaries by condition, each compared with `reference` (the study's explicit reference condition).

    When the reference has no analysable trial there is no comparison, and `no_comparison` says
    so; the comparison never moves to another condition.
    """
    data = analysable(frame)
    seen = set(data["condition"])
    order = [reference] if reference in seen else []
    order += [c for c in conditions if c in seen and c != reference] + \
        [c for c in dict.fromkeys(data["condition"]) if c not in conditions and c != reference]
    ref_rows = data[data["condition"] == reference]
    no_comparison = ""
    if reference and ref_rows.empty and len(seen - {reference}):
        no_comparison = f"reference condition '{reference}' has no analysable trials yet; no comparison"
    rows = []
    for condition in conditions + [c for c in order if c not in conditions]:
        sub = data[data["condition"] == condition]
        summary = analysis.condition_summary(sub["disperse_s"].astype(float).to_numpy(),
                                             sub["dispersed"].astype(bool).to_numpy())
        row = ConditionRow(condition, dict(summary))
        if condition != reference and not sub.empty and not ref_rows.empty:
            try:
                stat, p = analysis.logrank_test(sub["disperse_s"].astype(float), sub["dispersed"].astype(bool),
                                                ref_rows["disperse_s"].astype(float), ref_rows["dispersed"].astype(bool))
                row.logrank = {"statistic": stat, "p": p}
            except ValueError as error:
                row.logrank = {"error": str(error)}
        rows.append(row)
    result = StudyAnalysis(rows, reference, km_table(data, order), no_comparison=no_comparison)
    _dose_response(data, result)
    return result


POOLED = "all trials (pooled)"


@dataclass
class PooledPreview:
    """What a blinded study shows before unblinding: counts and one Kaplan-Meier curve over every
    analysable trial, conditions pooled, so nothing depends on which trial had which condition."""
    n_recorded: int
    n_voided: int
    n_excluded: int
    n_awaiting: int
    summary: dict
    km_table: pd.DataFrame


def pooled_preview(frame: pd.DataFrame) -> PooledPreview:
    data = analysable(frame)
    status = frame["status"]
    summary = analysis.condition_summary(data["disperse_s"].astype(float).to_numpy(),
                                         data["dispersed"].astype(bool).to_numpy())
    table = km_table(data.assign(condition=POOLED), [POOLED])
    return PooledPreview(n_recorded=int((status != "voided").sum()), n_voided=int((status == "voided").sum()),
                         n_excluded=int((status == "excluded").sum()), n_awaiting=int((status == "awaiting score").sum()),
                         summary=dict(summary), km_table=table)


def dose_groups(data: pd.DataFrame) -> pd.DataFrame:
    light = data[data["stimulus"].isin(["light", "uv"]) & data["dose_mj_cm2"].notna()]
    rounded = light.assign(dose=light["dose_mj_cm2"].astype(float).round(6))
    grouped = rounded.groupby("dose").agg(n_responding=("dispersed", "sum"), n_total=("dispersed", "size"))
    out = grouped.reset_index()
    out["n_responding"] = out["n_responding"].astype(int)
    return out


def _dose_response(data: pd.DataFrame, result: StudyAnalysis) -> None:
    """Fit when the study varies the light dose over at least three positive levels."""
    if data.empty:
        return
    groups = dose_groups(data)
    positive = groups[groups["dose"] > 0]
    if len(positive) < 3:
        return
    result.dose_groups = groups
    zero = groups[groups["dose"] == 0]
    sham = data[data["stimulus"] == "none"]
    n_ctrl = int(zero["n_total"].sum()) + len(sham)
    if n_ctrl:
        result.control = (int(zero["n_responding"].sum()) + int(sham["dispersed"].sum()), n_ctrl)
    try:
        fit = dose_response.fit_dose_response(positive["dose"], positive["n_responding"], positive["n_total"])
    except ValueError as error:
        result.dose_error = str(error)
        return
    result.dose_fit = fit
    if fit.has_ec50:  # no curve without a dose trend: a flat line would read as a result
        grid = np.logspace(np.log10(positive["dose"].min() / 3), np.log10(positive["dose"].max() * 3), 200)
        result.dose_curve = pd.DataFrame({"dose": grid, "fitted": fit.predict(grid)})


# Fit-level columns of the dose-response CSV, the same on every row (the page states them once).
DOSE_FIT_COLUMNS = ("status", "reason", "link", "chosen_by", "ec50_mj_cm2", "ec50_lower", "ec50_upper",
                    "interval_method", "extrapolated", "trend_test", "trend_statistic", "trend_p", "pearson_chi2",
                    "df_resid", "gof_p", "heterogeneity_factor", "heterogeneity_applied", "method")


def dose_table(result: StudyAnalysis) -> pd.DataFrame:
    """The data behind the dose-response chart: groups with observed fractions, each link's fitted
    fraction, deviance and AIC, and the fit's decisions (status, link, EC50 and interval, tests)."""
    groups = result.dose_groups.copy()
    groups["observed_fraction"] = groups["n_responding"] / groups["n_total"]
    fit = result.dose_fit
    if fit is None:
        return groups.rename(columns={"dose": "dose_mj_cm2"})
    positive = groups["dose"] > 0
    if fit.has_ec50:
        groups["fitted_fraction"] = np.where(positive, fit.predict(groups["dose"]), np.nan)
    for link in fit.links:
        groups[f"fitted_{link.link}"] = np.where(positive, link.predict(groups["dose"]), np.nan)
    for link in fit.links:
        groups[f"deviance_{link.link}"] = link.deviance
        groups[f"aic_{link.link}"] = link.aic
    values = {"heterogeneity_factor": fit.heterogeneity, "ec50_mj_cm2": fit.ec50}
    for column in DOSE_FIT_COLUMNS:
        groups[column] = values[column] if column in values else getattr(fit, column)
    return groups.rename(columns={"dose": "dose_mj_cm2"})


# ---------------------------------------------------------------------------------------------
# Exposure ledger
# ---------------------------------------------------------------------------------------------
LEDGER_COLUMNS = ["cohort", "dish", "origin_tank", "protocol", "protocol_version", "run_at", "study", "slot", "stimulus", "settings",
                  "animals",
                  "dose_mj_cm2", "exposure_number", "max_exposures", "cumulative_dose_mj_cm2",
                  "max_cumulative_dose_mj_cm2", "rest_h", "min_rest_h", "over_limit", "override_reason",
                  "override_by", "deviation"]


def ledger_rows(shown: list[Trial], every: list[Trial], user) -> list[dict]:
    """Rows for the shown exposures, with running totals over *all* exposures of their dishes.

    A dish is the group of animals the protocol's limits count, so totals run per dish (cohort,
    dish). `every` holds every counting trial of the dishes in `shown` (so a date filter does not
    restart the count); both need study loaded, `shown` also cohort, dish, protocol and override.
    A trial whose condition `user` may not see (experiments/blinding.py) shows its code, not its
    stimulus, settings, dose or override reason; its dish's cumulative dose is hidden too, since
    differences of running totals (or the total less the visible doses) would give the hidden dose
    back.
    """
    blind = {t.pk for t in [*every, *shown] if not blinding.may_see_condition(user, t)}
    blind_dishes = {t.dish_id for t in [*every, *shown] if t.pk in blind}
    running: dict[int, dict] = {}
    by_trial: dict[int, dict] = {}
    for t in sorted(every, key=lambda t: (t.dish_id, t.run_at, t.pk)):
        state = running.setdefault(t.dish_id, {"n": 0, "dose": 0.0, "last": None})
        state["n"] += 1
        state["dose"] += t.dose_mj_cm2 or 0.0
        rest = (t.run_at - state["last"]).total_seconds() / 3600 if state["last"] else None
        state["last"] = t.run_at
        by_trial[t.pk] = {"n": state["n"], "dose": state["dose"], "rest": rest}
    rows = []
    for t in shown:
        totals = by_trial.get(t.pk, {"n": None, "dose": None, "rest": None})
        # The terms in force when the trial ran (a later amendment does not change them); needs protocol_version
        # loaded. A trial saved outside the services has none and is read against the protocol as it is.
        p = t.protocol_version or t.protocol
        override = t.override if _has_override(t) else None
        over = []
        if totals["n"] is not None and totals["n"] > p.max_exposures_per_group:
            over.append("exposures")
        if p.max_cumulative_dose_mj_cm2 is not None and totals["dose"] and totals["dose"] > p.max_cumulative_dose_mj_cm2:
            over.append("cumulative dose")
        if totals["rest"] is not None and totals["rest"] < p.min_rest_hours:
            over.append("rest")
        rows.append({
            "trial": t, "cohort": t.cohort.label, "dish": t.dish.label, "origin_tank": t.cohort.origin_tank.code,
            "protocol": t.protocol.reference, "protocol_version": t.protocol_version.number if t.protocol_version else None,
            "run_at": _when(t.run_at), "study": t.study.code, "slot": t.slot,
            "stimulus": t.get_kind_display(), "settings": t.stimulus_text(), "animals": t.animals,
            "dose_mj_cm2": t.dose_mj_cm2, "exposure_number": totals["n"], "max_exposures": p.max_exposures_per_group,
            "cumulative_dose_mj_cm2": totals["dose"], "max_cumulative_dose_mj_cm2": p.max_cumulative_dose_mj_cm2,
            "rest_h": None if totals["rest"] is None else round(totals["rest"], 1), "min_rest_h": p.min_rest_hours,
            "over_limit": ", ".join(over), "override_reason": override.reason if override else "",
            "override_by": override.recorded_by.get_username() if override else "",
            "deviation": override.deviation_id if override else None, "blinded": t.pk in blind,
        })
        if t.pk in blind:
            rows[-1].update(stimulus="blinded", settings=f"blinded: code {t.code}", dose_mj_cm2=None,
                            override_reason="(hidden while the study is blinded)" if override else "")
        if t.dish_id in blind_dishes:
            rows[-1]["cumulative_dose_mj_cm2"] = None
    return rows


def dish_rows(dishes: list, trials: list[Trial], protocol, user) -> list[dict]:
    """One row per dish of a cohort page: its exposures against the protocol, its 24 h outcome and its end.

    `trials` are the cohort's counting trials with study loaded; no query. Dead at 24 h adds up the
    counts recorded on its trials (each counts its own arena); alive is what was put in less those.
    The cumulative dose is hidden while a study with a trial on the dish is blinded to `user`.
    """
    by_dish: dict[int, list[Trial]] = {}
    for t in sorted(trials, key=lambda t: (t.run_at, t.pk)):
        by_dish.setdefault(t.dish_id, []).append(t)
    rows = []
    for d in dishes:
        mine = by_dish.get(d.pk, [])
        last = mine[-1].run_at if mine else None
        recorded = [t.mortality_24h for t in mine if t.mortality_24h is not None]
        blinded = any(not blinding.may_see_condition(user, t) for t in mine)
        rows.append({
            "dish": d, "exposures": len(mine), "max_exposures": protocol.max_exposures_per_group, "last": last,
            "next_allowed": last + timedelta(hours=protocol.min_rest_hours) if last and d.is_open else None,
            "cumulative_dose_mj_cm2": None if blinded else sum(t.dose_mj_cm2 or 0.0 for t in mine),
            "max_cumulative_dose_mj_cm2": protocol.max_cumulative_dose_mj_cm2, "blinded": blinded,
            "dead_24h": sum(recorded), "mortality_recorded": len(recorded),
            "alive": max(0, d.animals - sum(recorded)),
        })
    return rows


# ---------------------------------------------------------------------------------------------
# CSV downloads: streamed, a chunk of trials at a time (colonies/exports.py)
# ---------------------------------------------------------------------------------------------
# Text cells (labels, reasons, notes) that a spreadsheet would run as a formula get an apostrophe;
# numbers, negative ones included, are written as they are, to six significant digits.
CSV_OPTIONS = {"quoting": csv.QUOTE_MINIMAL, "float_format": "%.6g"}


def tidy_csv(trials, user) -> Iterator[str]:
    """The tidy table of a queryset of trials (ordered; TRIAL_RELATED loaded), CHUNK trials at a time, as
    `user` may read it (tidy_frame)."""
    frames = (tidy_frame(chunk, user) for chunk in exports.batches(trials.iterator(chunk_size=exports.CHUNK)))
    return exports.frames_text(frames, TIDY_COLUMNS, **CSV_OPTIONS)


def every_exposure(dish_ids) -> list[Trial]:
    """Every counting trial of the dishes, as `ledger_rows` needs them for running totals."""
    return list(Trial.objects.counting().filter(dish_id__in=dish_ids).select_related("study")
                .only("pk", "cohort_id", "dish_id", "run_at", "run_by_id", "dose_mj_cm2", "study__blinded",
                      "study__unblinded_at"))


def ledger_csv(shown, user) -> Iterator[str]:
    """Every exposure of the queryset `shown` (ordered by cohort, dish and time), with running totals over
    all exposures of its dish: a chunk of exposures and their dishes' exposures at a time."""
    frames = (pd.DataFrame([{k: r[k] for k in LEDGER_COLUMNS}
                            for r in ledger_rows(chunk, every_exposure({t.dish_id for t in chunk}), user)],
                           columns=LEDGER_COLUMNS)
              for chunk in exports.batches(shown.iterator(chunk_size=exports.CHUNK)))
    return exports.frames_text(frames, LEDGER_COLUMNS, **CSV_OPTIONS)
