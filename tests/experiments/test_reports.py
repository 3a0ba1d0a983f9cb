"""The streamed study and ledger CSVs (experiments/reports.py): read a chunk of trials at a time, the same
text as the whole table written at once."""
import pandas as pd
import pytest

from colonies import exports
from colonies.exports import frame_csv
from experiments import reports
from experiments.models import Trial
from experiments.views import TRIAL_RELATED
from tests.experiments.builders import days_ago, make_cohort, make_study, record


@pytest.fixture
def exposures(researcher, protocol, tank):
    """Three cohorts (one dish each) with one to three exposures each, in one study."""
    study = make_study(user=researcher, protocol=protocol, replicates=3, code="chunked")
    slots = iter(entry["slot"] for entry in study.allocation)
    for n in (3, 1, 2):
        cohort = make_cohort(user=researcher, protocol=protocol, tank=tank, at=days_ago(20))
        for i in range(n):
            record(study, cohort, researcher, slot=next(slots), at=days_ago(15 - i), irradiance=2.0 + i, duration=10)
    return study


def test_tidy_csv_in_chunks_equals_the_whole_table(exposures, monkeypatch):
    # common practice: the streamed text is judged against the table written at once
    monkeypatch.setattr(exports, "CHUNK", 2)
    trials = exposures.trials.select_related(*TRIAL_RELATED).order_by("slot", "pk")

    text = "".join(reports.tidy_csv(trials, exposures.owner))

    assert text == frame_csv(reports.tidy_frame(list(trials), exposures.owner), **reports.CSV_OPTIONS)
    assert text.count("\r\n") == 1 + 6


def test_ledger_csv_in_chunks_keeps_each_dish_s_running_totals(exposures, manager, monkeypatch):
    monkeypatch.setattr(exports, "CHUNK", 2)  # a dish's exposures fall in two chunks
    shown = Trial.objects.counting().select_related(*TRIAL_RELATED).order_by("cohort_id", "dish__number", "run_at",
                                                                             "pk")

    text = "".join(reports.ledger_csv(shown, manager))

    every = reports.every_exposure({t.dish_id for t in shown})
    rows = reports.ledger_rows(list(shown), every, manager)
    frame = pd.DataFrame([{k: r[k] for k in reports.LEDGER_COLUMNS} for r in rows], columns=reports.LEDGER_COLUMNS)
    assert text == frame_csv(frame, **reports.CSV_OPTIONS)
    assert [r["exposure_number"] for r in rows] == [1, 2, 3, 1, 1, 2]
    assert [r["cumulative_dose_mj_cm2"] for r in rows] == [20.0, 50.0, 90.0, 20.0, 20.0, 50.0]  # 2, 3, 4 mW/cm² x 10 s


def test_csv_of_no_trials_is_the_header(db, manager):
    assert "".join(reports.tidy_csv(Trial.objects.none(), manager)) == ",".join(reports.TIDY_COLUMNS) + "\r\n"
    assert "".join(reports.ledger_csv(Trial.objects.none(), manager)) == ",".join(reports.LEDGER_COLUMNS) + "\r\n"
