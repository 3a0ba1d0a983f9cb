"""A methods draft for a study, composed from plain rows (pure Python, no Django): rows in, text out.

The checklist is ARRIVE 2.0 (Percie du Sert et al. 2020, PLoS Biol 18(7): e3000410): the Essential 10
(items 1-10) and, from the Recommended Set, items 14 (ethical statement), 15 (housing and husbandry)
and 16 (animal care and monitoring: adverse events). Item 10 (results) is the researcher's; the draft
names it only for the validity criteria. Every paragraph ends with a source line naming the records
its numbers come from, so that each number can be traced and checked.

Blinding: while the study is blind the draft holds pooled numbers only. Whatever describes the whole
study (husbandry of the source tanks, total dishes and animals, the allocation method, who was blinded,
how outcomes were measured) gives no trial's condition away, so the researcher can start writing while
trials run; the condition labels, the seed, numbers per condition, stimulus settings and the free-text
reasons for exclusions, voids and overrides (they may name the condition) wait for unblinding, as on
the study page (experiments/blinding.py). The caller passes rows with the condition already blanked.
"""
from __future__ import annotations

import platform
import statistics
from collections import Counter, defaultdict
from datetime import datetime
from importlib import metadata

from colonies import parameters

from .methods_rows import (Draft, Husbandry, Measuring, Section, StudyFacts, TankFacts,  # noqa: F401 (re-exported)
                           TrialRow)

WITHHELD = "[withheld while the study is blind]"
# The packages the analyses run on (experiments/analysis.py, dose_response.py, imaging.py); lifelines is a
# test reference only and is not used for any result, so it is not named.
ANALYSIS_PACKAGES = ("numpy", "scipy", "pandas", "statsmodels", "scikit-image")
TO_WRITE = "[to write: {}]"


def _n(count: int, word: str, plural: str | None = None) -> str:
    return f"{count} {word if count == 1 else (plural or word + 's')}"


def _num(value: float, decimals: int = 1) -> str:
    return f"{value:.{decimals}f}"


def _day(moment) -> str:
    return moment.date().isoformat() if isinstance(moment, datetime) else moment.isoformat()


def _period(d: Draft) -> str:
    if d.first_day is None:
        return "no trial recorded yet"
    return f"{d.first_day.isoformat()} to {d.last_day.isoformat()}"


def _median_range(values: list[float], decimals: int, unit: str = "") -> str:
    u = f" {unit}" if unit else ""
    return (f"median {_num(statistics.median(values), decimals)}{u} (range {_num(min(values), decimals)}–"
            f"{_num(max(values), decimals)}{u}, n = {len(values)})")


def _intervals_days(times: list[datetime]) -> list[float]:
    times = sorted(times)
    return [(b - a).total_seconds() / 86400 for a, b in zip(times, times[1:])]


def _counting(d: Draft) -> list[TrialRow]:
    return [t for t in d.trials if not t.voided]


def software_versions() -> dict[str, str]:
    """The versions installed in this environment, read at run time (not pinned copies)."""
    versions = {"Python": platform.python_version()}
    for name in ANALYSIS_PACKAGES:
        try:
            versions[name] = metadata.version(name)
        except metadata.PackageNotFoundError:
            versions[name] = "not installed"
    return versions


# --- the sections ----------------------------------------------------------------------------------
def study_design(d: Draft) -> Section:
    s = d.study
    k = len(s.conditions)
    if s.blind:
        groups = f"{_n(k, 'condition')} (labels {WITHHELD})"
    else:
        groups = f"{_n(k, 'condition')}: " + ", ".join(s.conditions)
        if s.reference:
            groups += f"; every condition was compared with the reference condition '{s.reference}'"
    text = (f"The study ({s.code}: {s.title}) compared {groups}. The experimental unit was the trial: one dish of "
            f"animals exposed to one condition and scored as one unit (a dish may be exposed in more than one trial; "
            f"item 2 says how often).")
    if s.question:
        text += f" Question, recorded before allocation: {s.question}"
    return Section("1", "Study design", [text], f"Study {s.code} (conditions, allocation of {s.slots} slots).")


def sample_size(d: Draft) -> Section:
    s = d.study
    trials = _counting(d)
    in_arenas = sum(t.animals for t in trials)
    dish_animals = {t.dish: t.dish_animals for t in trials}  # each dish's animals counted once
    cohorts = {t.cohort for t in trials}
    exposures = list(Counter(t.dish for t in trials).values())
    text = (f"{s.slots} trials were planned ({len(s.conditions)} conditions × {s.replicates} replicates), the trial "
            f"being the unit. {_n(len(trials), 'trial')} were recorded (voided trials not counted), on "
            f"{_n(len(dish_animals), 'dish', 'dishes')} holding {sum(dish_animals.values())} animals in all, from "
            f"{_n(len(cohorts), 'cohort')}.")
    if exposures:
        text += (f" Trials per dish: {_median_range(exposures, 1)}; the arenas held {in_arenas} animals summed over "
                 f"the trials (an animal exposed twice counts twice).")
    paragraphs = [text]
    if not s.blind and trials:
        per = defaultdict(lambda: [0, 0])
        for t in trials:
            per[t.condition][0] += 1
            per[t.condition][1] += t.animals
        paragraphs.append("Per condition: " + "; ".join(
            f"{c}: {_n(per[c][0], 'trial')}, {per[c][1]} animals in the arenas" for c in s.conditions) + ".")
    paragraphs.append(TO_WRITE.format("how the sample size was decided (a priori calculation, if any)"))
    return Section("2", "Sample size", paragraphs,
                   f"{_n(len(trials), 'trial record')} of study {s.code} (Trial.animals summed); dishes "
                   f"{', '.join(sorted(dish_animals)) or 'none'} (Dish.animals).")


def exclusions(d: Draft) -> Section:
    s = d.study
    trials = _counting(d)
    voided = [t for t in d.trials if t.voided]
    excluded = [t for t in trials if t.excluded]
    paragraphs = [f"Exclusion criteria, recorded with the study before allocation: {s.exclusion_criteria}"
                  if s.exclusion_criteria else "No exclusion criteria were recorded with the study before allocation."]
    if not excluded:
        paragraphs.append("No trial was excluded.")
    elif s.blind:
        paragraphs.append(f"{_n(len(excluded), 'trial')} excluded (which conditions and why {WITHHELD}).")
    else:
        paragraphs.append(f"{_n(len(excluded), 'trial')} excluded: " + "; ".join(
            f"{t.code} ({t.condition}): {t.exclusion_reason}" for t in excluded) + ".")
    if voided:
        reasons = WITHHELD if s.blind else "; ".join(f"{t.code}: {t.void_reason}" for t in voided)
        paragraphs.append(f"{_n(len(voided), 'trial')} voided as recorded in error (not exposures, not analysed): "
                          f"{reasons}.")
    analysed = [t for t in trials if not t.excluded and t.scored]
    if s.blind:
        paragraphs.append(f"{_n(len(analysed), 'scored trial')} available for analysis, all conditions pooled.")
    else:
        per = Counter(t.condition for t in analysed)
        paragraphs.append("Trials analysed (n per condition): " + ", ".join(f"{c} {per[c]}" for c in s.conditions)
                          + ".")
    return Section("3", "Inclusion and exclusion criteria", paragraphs,
                   f"Study {s.code}: {_n(len(d.trials), 'trial record')} ({len(excluded)} excluded, "
                   f"{len(voided)} voided, {len(analysed)} scored and analysable).")


def randomisation(d: Draft) -> Section:
    s = d.study
    how = ("the run order of all condition × replicate pairs was shuffled together (simple randomisation)"
           if s.method == "simple" else
           "the run order was randomised in permuted blocks: each block held one trial per condition in random "
           "order, so every condition ran once before any ran again")
    seed = WITHHELD if s.blind else str(s.seed)
    when = f" on {_day(s.allocated_at)}" if s.allocated_at else ""
    text = (f"Trials were allocated to conditions at random: {how}. The sequence was generated{when} by "
            f"{s.generator or 'the generator recorded with the study'} with seed {seed}, and the realised "
            f"allocation list of {s.slots} slots was stored with the study.")
    return Section("4", "Randomisation", [text],
                   f"Study {s.code}: method, generator, seed and allocation list (Study.method, seed, generator).")


def blinding_section(d: Draft) -> Section:
    s = d.study
    trials = _counting(d)
    if not s.blinded:
        text = "The study was not blinded: conditions were known to everyone who ran, scored and analysed it."
    else:
        text = ("Each dish carried a four-letter code. Until unblinding, the condition of a trial was shown only "
                "to its operator (the person who applied the stimulus); the study's owner, the scorers, the "
                "other researchers and the managers saw codes, and the analyses by condition were hidden from "
                "everyone.")
        if s.unblinded_at:
            text += (f" Outcomes were locked and the study unblinded on {_day(s.unblinded_at)} by {s.unblinded_by} "
                     f"(reason recorded: {s.unblind_reason}).")
        else:
            text += " The study is still blind."
    scored = [t for t in trials if t.scored and t.scored_by]
    other = sum(1 for t in scored if t.scored_by != t.run_by)
    rule = " (required for this study)" if s.scorer_not_operator else ""
    score_text = (f"{other} of {_n(len(scored), 'scored trial')} were scored by someone other than their "
                  f"operator{rule}.")
    return Section("5", "Blinding", [text, score_text],
                   f"Study {s.code} (blinded, unblinded_at, scorer rule); trials' run_by and scored_by.")


def outcome_measures(d: Draft) -> Section:
    s = d.study
    trials = [t for t in _counting(d) if t.scored]
    accepted = sum(1 for t in trials if t.measured == "accepted")
    overridden = sum(1 for t in trials if t.measured == "overridden")
    manual = len(trials) - accepted - overridden
    text = (f"Primary outcome: {s.primary_outcome}. A clump still together when the {s.window_s} s observation "
            f"window ended was recorded as censored at {s.window_s} s. Secondary outcome: animals dead 24 h after "
            f"the trial.")
    how = (f"Of {_n(len(trials), 'scored trial')}, {manual} were scored by eye (no image measurement used), "
           f"{accepted} took the time measured from the dish's images as proposed and {overridden} were measured "
           f"from images and corrected by the scorer.")
    paragraphs = [text, how]
    if d.measuring.count:
        settings = "; ".join(f"{k} {v}" for k, v in sorted(d.measuring.settings.items()))
        paragraphs.append(
            f"Image measurement ({_n(d.measuring.count, 'measurement')}, scikit-image "
            f"{d.measuring.skimage or d.versions.get('scikit-image', '?')}): each frame was thresholded (Otsu, "
            f"with a floor), 8-connected clusters counted and the largest cluster's share of the worm area "
            f"followed; dispersal was the first frame after which that share stayed below the threshold. "
            f"Settings: {settings}.")
    return Section("6", "Outcome measures", paragraphs,
                   f"Study {s.code}: {_n(len(trials), 'scored trial')}; {_n(d.measuring.count, 'image measurement')} "
                   f"(their stored settings and the scorer's decision).")


def statistical_methods(d: Draft) -> Section:
    v = d.versions
    text = ("Times to disperse were analysed as right-censored data: Kaplan-Meier estimates per condition with "
            "Greenwood's variance and a pointwise 95 % band on the log(-log) scale; median and quartiles read "
            "off the curve (not reached when the curve stays above the level).")
    if len(d.study.conditions) > 1:
        text += (" Each condition was compared with the reference condition by a log-rank test (1 degree of "
                 "freedom, no correction for multiple comparisons).")
    dose = ("Where conditions differed in light dose, the share of dishes dispersed within the window was "
            "fitted against log10 dose by binomial generalised linear models (logit, probit and complementary "
            "log-log links, the lowest AIC kept; Finney's heterogeneity factor when Pearson's X² was significant "
            "at 5 %) and the EC50 given with Fieller's or the profile-likelihood 95 % interval.")
    software = (f"Software: Vermilog's analysis modules on Python {v.get('Python', '?')}, NumPy "
                f"{v.get('numpy', '?')}, SciPy {v.get('scipy', '?')}, pandas {v.get('pandas', '?')} and "
                f"statsmodels {v.get('statsmodels', '?')} (dose-response fits).")
    return Section("7", "Statistical methods", [text, dose, software],
                   "experiments/analysis.py and dose_response.py; versions read from the installed packages.")


def experimental_animals(d: Draft) -> Section:
    species = sorted({t.species for t in d.tanks})
    drawn = sum(t.animals_drawn for t in d.tanks)
    sources = "; ".join(f"{t.code} ({t.room}): {_n(t.cohorts, 'cohort')}, {t.animals_drawn} animals"
                        for t in d.tanks)
    text = (f"Species: {', '.join(species) or 'none recorded'}. Animals came from the lab's culture "
            f"{'tank' if len(d.tanks) == 1 else 'tanks'} {sources or 'none'}; {drawn} animals were drawn in all.")
    return Section("8", "Experimental animals", [text, TO_WRITE.format("strain or origin of the culture, "
                                                                       "size or developmental state")],
                   f"Cohorts of study {d.study.code}'s trials (Cohort.size, origin tank).")


def procedures(d: Draft) -> Section:
    trials = _counting(d)
    parts = []
    vessels = Counter(t.vessel for t in trials if t.vessel)
    if vessels:
        parts.append("vessel " + ", ".join(f"{v} ({n})" for v, n in vessels.most_common()))
    for name, label, unit, decimals in (("arena_diameter_mm", "arena diameter", "mm", 0),
                                        ("water_volume_ml", "water", "mL", 0),
                                        ("water_temp_c", "water temperature", "°C", 1),
                                        ("light_lux", "ambient light", "lx", 0),
                                        ("acclimation_min", "acclimation", "min", 0)):
        values = [getattr(t, name) for t in trials if getattr(t, name) is not None]
        if values:
            parts.append(f"{label} {_median_range(values, decimals, unit)}")
    text = f"Trials ({_n(len(trials), 'trial')}, {_period(d)}): " + ("; ".join(parts) or "no arena recorded") + "."
    paragraphs = [text]
    if d.study.blind:
        paragraphs.append(f"Stimulus per condition: {WITHHELD}.")
    else:
        per = defaultdict(Counter)
        for t in trials:
            per[t.condition][t.stimulus] += 1
        paragraphs.append("Stimulus per condition: " + "; ".join(
            f"{c}: " + ", ".join(f"{st} ({n})" for st, n in per[c].most_common()) for c in d.study.conditions
            if per[c]) + ".")
    return Section("9", "Experimental procedures", paragraphs,
                   f"{_n(len(trials), 'trial record')} of study {d.study.code} (arena and stimulus fields).")


def ethics(d: Draft) -> Section:
    s = d.study
    approved = f" on {s.protocol_approved_on.isoformat()}" if s.protocol_approved_on else ""
    text = (f"The work was done under protocol {s.protocol_reference} ('{s.protocol_title}'), approved by "
            f"{s.protocol_approver}{approved}.")
    return Section("14", "Ethical statement", [text], f"Protocol {s.protocol_reference}.")


def husbandry(d: Draft) -> Section:
    h = d.husbandry
    paragraphs, source = [], []
    for tank in d.tanks:
        checks = [c for c in h.checks if c[0] == tank.code]
        feeds = [f for f in h.feedings if f[0] == tank.code]
        changes = [w for w in h.water_changes if w[0] == tank.code]
        censuses = [c for c in h.censuses if c[0] == tank.code]
        water = []
        for p in parameters.PARAMETERS:
            values = [c[2][p.key] for c in checks if c[2].get(p.key) is not None]
            if values:
                name = "pH" if p.key == "ph" else p.label.lower()
                water.append(f"{name} {_median_range(values, p.decimals, p.unit)}")
        text = (f"Tank {tank.code} ({tank.species}; {tank.room}; {_num(tank.volume_l, 1)} L, {tank.system}"
                f"{', ' + tank.substrate if tank.substrate else ''}): ")
        text += ("water " + "; ".join(water) + ". ") if water else "no water reading in the period. "
        if feeds:
            foods = Counter(f[2] for f in feeds)
            gaps = _intervals_days([f[1] for f in feeds])
            units = Counter(f[4] for f in feeds).most_common(1)[0][0]
            amounts = _median_range([f[3] for f in feeds], 2, units)
            text += (f"Fed {_n(len(feeds), 'time')} ({', '.join(foods)}; amount {amounts}"
                     + (f"; every {_median_range(gaps, 1, 'days')}" if gaps else "") + "). ")
        else:
            text += "No feeding recorded in the period. "
        if changes:
            pcts = [w[2] for w in changes if w[2] is not None]
            gaps = _intervals_days([w[1] for w in changes])
            waters = sorted({w[3] for w in changes if w[3]})
            text += (f"{_n(len(changes), 'water change')}"
                     + (f" of {_median_range(pcts, 0, '%')}" if pcts else "")
                     + (f", every {_median_range(gaps, 1, 'days')}" if gaps else "")
                     + (f", with {', '.join(waters)}" if waters else "") + ". ")
        else:
            text += "No water change recorded in the period. "
        if censuses:
            densities = [c[2] / tank.volume_l for c in censuses]
            text += (f"Stocking density from {_n(len(censuses), 'census', 'censuses')}: "
                     f"{_median_range(densities, 0, 'animals/L')}.")
        else:
            text += "No census: stocking density unknown."
        paragraphs.append(text)
        source.append(f"tank {tank.code}: {_n(len(checks), 'check')}, {_n(len(feeds), 'feeding')}, "
                      f"{_n(len(changes), 'water change')}, {_n(len(censuses), 'census', 'censuses')}")
    if not d.tanks:
        paragraphs.append("No source tank: no trial recorded yet.")
    return Section("15", "Housing and husbandry", paragraphs,
                   f"Records observed {_period(d)} (censuses: also the latest before it): " + "; ".join(source) + ".")


def adverse_events(d: Draft) -> Section:
    trials = _counting(d)
    counted = [t for t in trials if t.mortality_24h is not None]
    dead = sum(t.mortality_24h for t in counted)
    animals = sum(t.animals for t in counted)
    text = (f"Dead 24 h after a trial: {dead} in {_n(len(counted), 'trial')} with a count, whose arenas held "
            f"{animals} animals ({_n(len(trials) - len(counted), 'trial')} without a count)")
    text += f"; {_n(d.dishes_died, 'dish', 'dishes')} ended as died." if d.dishes_died else "."
    tank_deaths = sum(n for _t, _at, n in d.husbandry.deaths)
    paragraphs = [text, f"Dead animals removed from the source tanks in the period: {tank_deaths}."]
    rules = Counter((r, sev) for _tank, r, sev in d.husbandry.deviations)
    if rules:
        paragraphs.append(f"{_n(len(d.husbandry.deviations), 'deviation')} on the source tanks or the study's "
                          f"dishes: " + "; ".join(
            f"{r} ({sev.lower()}) × {n}" for (r, sev), n in sorted(rules.items())) + ".")
    else:
        paragraphs.append("No deviation was opened on the source tanks or the study's dishes in the period.")
    overrides = [t for t in trials if t.overridden]
    if overrides:
        reasons = WITHHELD if d.study.blind else "; ".join(f"{t.code}: {t.override_reason}" for t in overrides)
        paragraphs.append(f"{_n(len(overrides), 'trial')} went beyond a protocol limit with a manager's override "
                          f"(reasons: {reasons}).")
    return Section("16", "Animal care and monitoring (adverse events)", paragraphs,
                   f"Trials' 24 h counts and dish ends; checks, dead-removal records and deviations of the source "
                   f"tanks {_period(d)}; deviations about the study's dishes.")


def validity_section(d: Draft) -> Section | None:
    if not d.validity:
        return None
    return Section("", "Validity criteria", [f"{r.label} ({r.requirement}): {r.status.upper()}. {r.evidence} "
                                             f"{r.guideline}." for r in d.validity],
                   "The study's declared criteria (Study.validity_criteria), judged on the records above.")


def compose(d: Draft) -> list[Section]:
    sections = [study_design(d), sample_size(d), exclusions(d), randomisation(d), blinding_section(d),
                outcome_measures(d), statistical_methods(d), experimental_animals(d), procedures(d), ethics(d),
                husbandry(d), adverse_events(d)]
    validity = validity_section(d)
    return sections + ([validity] if validity else [])


def to_markdown(d: Draft, sections: list[Section], generated: str) -> str:
    s = d.study
    lines = [f"# Methods draft: {s.code} · {s.title}", "",
             f"Drafted by Vermilog from the records on {generated}; checklist ARRIVE 2.0 (Percie du Sert et al. "
             f"2020). Edit freely; each paragraph's source line says which records its numbers come from.", ""]
    if s.blind:
        lines += [f"> The study is blind: numbers are pooled; condition labels, the seed, numbers per condition, "
                  f"stimuli and free-text reasons are {WITHHELD[1:-1]}.", ""]
    for sec in sections:
        lines += [f"## {sec.heading}", ""]
        for p in sec.paragraphs:
            lines += [p, ""]
        lines += [f"*Source: {sec.source}*", ""]
    return "\n".join(lines)
