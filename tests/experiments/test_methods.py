"""The methods draft's composition (experiments/methods.py, pure): numbers against a small hand-computed fixture,
software versions from the installed packages, and nothing per condition while the study is blind.

ARRIVE 2.0 item numbers: Essential 10 items 1-10 and Recommended Set items 14 (ethical statement), 15 (housing
and husbandry), 16 (animal care and monitoring) as in Percie du Sert et al. 2020, PLoS Biol 18(7): e3000410,
Tables 1 and 2 (items 1-5 and 14-16 checked against the published author checklist; 6-9 from memory).
"""
from dataclasses import replace
from datetime import date, datetime
from importlib import metadata

import numpy as np
import pytest

from experiments import methods
from experiments.methods import Draft, Husbandry, Measuring, StudyFacts, TankFacts, TrialRow


def _at(day: int, hour: int = 9) -> datetime:
    return datetime(2026, 11, day, hour, 0)


STUDY = StudyFacts(
    code="gl-1", title="Glow study", question="", conditions=["Sable-sham", "Obsidian-glow"], reference="Sable-sham",
    replicates=2, slots=4, method="block", method_label="Permuted blocks", seed=777123, generator="Python random",
    allocated_at=_at(1), blinded=True, blind=False, unblinded_at=_at(9), unblinded_by="rhea",
    unblind_reason="All scored", scorer_not_operator=True, primary_outcome="Time to disperse (s)", window_s=600,
    exclusion_criteria="No clump formed within 10 min.", owner="rhea", protocol_reference="AWB-1",
    protocol_title="Aggregation", protocol_approver="Welfare body", protocol_approved_on=date(2026, 10, 1))

TRIALS = [
    TrialRow("AAAA", 1, "Sable-sham", 10, _at(3), "opal", "C-0001-D1", "C-0001", "LV-1", dish_animals=10, scored=True,
             scored_by="tess",
             mortality_24h=1, water_temp_c=20.0, arena_diameter_mm=90, stimulus="None", measured="accepted"),
    TrialRow("CCCC", 2, "Obsidian-glow", 8, _at(4), "opal", "C-0001-D1", "C-0001", "LV-1", dish_animals=10, scored=True,
             scored_by="opal", mortality_24h=0, water_temp_c=21.0, arena_diameter_mm=90,
             stimulus="UV 2.345 mW/cm²", overridden=True, override_reason="Nebula-override"),
    TrialRow("DDDD", 3, "Obsidian-glow", 12, _at(5), "opal", "C-0002-D1", "C-0002", "LV-2", dish_animals=12, scored=True,
             scored_by="tess", mortality_24h=None, water_temp_c=23.0, excluded=True,
             exclusion_reason="Clump split at the Obsidian-glow lamp", stimulus="UV 2.345 mW/cm²"),
    TrialRow("EEEE", 4, "Sable-sham", 10, _at(5), "opal", "C-0002-D2", "C-0002", "LV-2", voided=True,
             void_reason="Entered twice", stimulus="None"),
]
# LV-1: three checks, three feedings, two water changes, a census before the period and one in it.
HUSBANDRY = Husbandry(
    checks=[("LV-1", _at(2), {"temp_c": 20.0, "ph": 7.0, "do_mg_l": 8.0}),
            ("LV-1", _at(3), {"temp_c": 23.0, "ph": 7.2, "do_mg_l": 6.0}),
            ("LV-1", _at(4), {"temp_c": 21.0, "ph": None, "do_mg_l": 7.0})],
    feedings=[("LV-1", _at(2), "spirulina", 0.1, "g"), ("LV-1", _at(4), "spirulina", 0.3, "g"),
              ("LV-1", _at(7), "spirulina", 0.2, "g")],
    water_changes=[("LV-1", _at(2), 50.0, "aged tap water"), ("LV-1", _at(9), 30.0, "aged tap water")],
    censuses=[("LV-1", datetime(2026, 10, 20, 9), 1000.0), ("LV-1", _at(5), 800.0)],
    deaths=[("LV-1", _at(3), 2), ("LV-2", _at(4), 1)],
    deviations=[("LV-1", "Reading outside care target", "Minor"), ("", "Protocol limit overridden", "Major")])
TANKS = [TankFacts("LV-1", "Lumbriculus variegatus", "Wet lab", 2.0, "static renewal", "", cohorts=1, animals_drawn=30),
         TankFacts("LV-2", "Lumbriculus variegatus", "Wet lab", 4.0, "static renewal", "", cohorts=1, animals_drawn=25)]


def _draft(**overrides) -> Draft:
    fields = dict(study=STUDY, trials=TRIALS, tanks=TANKS, husbandry=HUSBANDRY,
                  measuring=Measuring(1, {"threshold": "0.5"}, "0.24.0"),
                  versions=methods.software_versions(), first_day=date(2026, 11, 2), last_day=date(2026, 11, 5))
    fields.update(overrides)
    return Draft(**fields)


def _sections(draft) -> dict[str, methods.Section]:
    return {s.item or "validity": s for s in methods.compose(draft)}


def test_sections_follow_the_arrive_numbering():
    items = [(s.item, s.title) for s in methods.compose(_draft())]
    assert items == [("1", "Study design"), ("2", "Sample size"), ("3", "Inclusion and exclusion criteria"),
                     ("4", "Randomisation"), ("5", "Blinding"), ("6", "Outcome measures"),
                     ("7", "Statistical methods"), ("8", "Experimental animals"), ("9", "Experimental procedures"),
                     ("14", "Ethical statement"), ("15", "Housing and husbandry"),
                     ("16", "Animal care and monitoring (adverse events)")]


def test_husbandry_numbers_equal_those_computed_from_the_rows():
    text = " ".join(_sections(_draft())["15"].paragraphs)
    temps, dos = [20.0, 23.0, 21.0], [8.0, 6.0, 7.0]
    # Hand-computed: temperature median 21.0 (range 20.0-23.0, n = 3); numpy agrees.
    assert np.median(temps) == 21.0
    assert "temperature median 21.0 °C (range 20.0–23.0 °C, n = 3)" in text
    # pH: two readings 7.00 and 7.20, median their mean 7.10.
    assert "pH median 7.10 (range 7.00–7.20, n = 2)" in text
    assert np.median(dos) == 7.0 and "dissolved oxygen median 7.00 mg/L (range 6.00–8.00 mg/L, n = 3)" in text
    # Feedings on 2, 4 and 7 Nov: intervals 2 and 3 days, median 2.5; amounts 0.1, 0.3, 0.2 g, median 0.2.
    assert "Fed 3 times (spirulina; amount median 0.20 g (range 0.10–0.30 g, n = 3); every median 2.5 days " \
           "(range 2.0–3.0 days, n = 2))" in text
    # Water changes of 50 % and 30 % a week apart: median 40 %, interval 7.0 days.
    assert "2 water changes of median 40 % (range 30–50 %, n = 2), every median 7.0 days" in text
    # Stocking density: 1000/2 L = 500 and 800/2 L = 400 animals/L, median 450.
    assert "median 450 animals/L (range 400–500 animals/L, n = 2)" in text
    assert "LV-2" in text and "No census: stocking density unknown" in text
    assert _sections(_draft())["15"].source == (
        "Records observed 2026-11-02 to 2026-11-05 (censuses: also the latest before it): tank LV-1: 3 checks, "
        "3 feedings, 2 water changes, 2 censuses; tank LV-2: 0 checks, 0 feedings, 0 water changes, 0 censuses.")


def test_sample_size_exclusions_and_adverse_events_count_the_trials():
    s = _sections(_draft())
    # Not voided: AAAA, CCCC, DDDD -> 3 trials on dishes C-0001-D1 (10 animals, 2 trials) and C-0002-D1 (12 animals,
    # 1 trial): 22 distinct animals; trials per dish median (1 + 2) / 2 = 1.5; arenas 10 + 8 + 12 = 30.
    assert "4 trials were planned (2 conditions × 2 replicates), the trial being the unit. 3 trials were recorded " \
           "(voided trials not counted), on 2 dishes holding 22 animals in all, from 2 cohorts. Trials per dish: " \
           "median 1.5 (range 1.0–2.0, n = 2); the arenas held 30 animals summed over the trials" in s["2"].paragraphs[0]
    assert "Per condition: Sable-sham: 1 trial, 10 animals in the arenas; Obsidian-glow: 2 trials, 20 animals in the " \
           "arenas." in s["2"].paragraphs
    exclusions = " ".join(s["3"].paragraphs)
    assert "1 trial excluded: DDDD (Obsidian-glow): Clump split" in exclusions
    assert "1 trial voided as recorded in error (not exposures, not analysed): EEEE: Entered twice." in exclusions
    assert "Trials analysed (n per condition): Sable-sham 1, Obsidian-glow 1." in exclusions
    adverse = " ".join(s["16"].paragraphs)
    # 24 h counts on AAAA (1 dead of 10) and CCCC (0 of 8); DDDD has none.
    assert "Dead 24 h after a trial: 1 in 2 trials with a count, whose arenas held 18 animals (1 trial without a " \
           "count)" in adverse
    assert "Dead animals removed from the source tanks in the period: 3." in adverse
    assert "2 deviations on the source tanks or the study's dishes: Protocol limit overridden (major) × 1; " \
        "Reading outside care target (minor) × 1." in adverse and "CCCC: Nebula-override" in adverse
    # Scored trials AAAA (opal ran, tess scored), CCCC (opal both), DDDD (tess): 2 of 3 by another person.
    assert "2 of 3 scored trials were scored by someone other than their operator (required for this study)." \
        in s["5"].paragraphs


def test_outcome_measures_say_how_each_score_was_made():
    text = " ".join(_sections(_draft())["6"].paragraphs)
    assert "Of 3 scored trials, 2 were scored by eye (no image measurement used), 1 took the time measured from the dish's images" in text
    assert "scikit-image 0.24.0" in text and "threshold 0.5" in text


def test_software_versions_come_from_the_installed_packages():
    text = " ".join(_sections(_draft())["7"].paragraphs)
    for name, label in (("scipy", "SciPy"), ("statsmodels", "statsmodels"), ("numpy", "NumPy"), ("pandas", "pandas")):
        assert f"{label} {metadata.version(name)}" in text  # the installed distribution's own metadata


def test_randomisation_names_method_generator_and_seed():
    text = _sections(_draft())["4"].paragraphs[0]
    assert "permuted blocks" in text and "Python random with seed 777123" in text


BLIND_SECRETS = ("Sable-sham", "Obsidian-glow", "2.345", "Nebula-override", "777123", "Entered twice",
                 "Clump split")


def test_nothing_per_condition_reaches_the_text_while_blind():
    # The query layer blanks conditions, stimuli and reasons; the composition must also hold back the labels and
    # the seed that the study facts still carry.
    blind_trials = [replace(t, condition="", stimulus="", exclusion_reason="", void_reason="", override_reason="")
                    for t in TRIALS]
    draft = _draft(study=replace(STUDY, blind=True, unblinded_at=None), trials=blind_trials)
    text = methods.to_markdown(draft, methods.compose(draft), generated="05 Dec 2026 09:00")
    for secret in BLIND_SECRETS:
        assert secret not in text, secret
    assert "2 conditions (labels [withheld while the study is blind])" in text
    assert "3 trials were recorded" in text and "holding 22 animals" in text  # pooled numbers stay
    assert "1 trial went beyond a protocol limit with a manager's override (reasons: [withheld" in text


def test_markdown_has_a_heading_and_a_source_line_per_section():
    draft = _draft()
    sections = methods.compose(draft)
    text = methods.to_markdown(draft, sections, generated="05 Dec 2026 09:00")
    assert text.startswith("# Methods draft: gl-1 · Glow study\n")
    assert text.count("\n*Source: ") == len(sections)
    assert "## Housing and husbandry (ARRIVE 2.0 item 15)" in text


@pytest.mark.parametrize("package", methods.ANALYSIS_PACKAGES)
def test_every_analysis_package_reports_a_version(package):
    assert methods.software_versions()[package] == metadata.version(package)
