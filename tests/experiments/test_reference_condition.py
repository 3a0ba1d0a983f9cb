"""An explicit reference condition (Study.reference_condition): required with two or more conditions, one
of them; every comparison is against it, and when it has no analysable trial the page says so instead of
comparing with another condition."""
import re

import numpy as np
import pandas as pd
import pytest
from django.core.exceptions import ValidationError
from django.urls import reverse
from statsmodels.duration.survfunc import survdiff

from experiments import reports, services
from experiments.models import Study
from tests.experiments.builders import days_ago, make_cohort, make_study, record
from tests.factories import page_text


def _study_form(**overrides) -> dict:
    data = {"code": "ref-study", "title": "Reference", "conditions": "sham\nUV low\nUV high", "replicates": 2,
            "method": "block", "observation_window_s": 600, "blinded": "on"}
    data.update(overrides)
    return data


@pytest.mark.parametrize("reference,message", [
    ("", "Reference condition: required with 3 conditions; allowed values: 'sham', 'UV low', 'UV high'."),
    ("UV medium", "Reference condition 'UV medium' is not one of the study's conditions; allowed values: 'sham', "
                  "'UV low', 'UV high'."),
])
def test_the_form_requires_a_reference_among_the_conditions_and_names_the_allowed_values(
        client, researcher, protocol, reference, message):
    client.force_login(researcher)
    response = client.post(reverse("experiments:study-new"),
                           _study_form(protocol=protocol.pk, reference_condition=reference))
    assert response.status_code == 400
    assert message in page_text(response)
    assert not Study.objects.exists()


def test_the_chosen_reference_is_stored(client, researcher, protocol):
    client.force_login(researcher)
    response = client.post(reverse("experiments:study-new"),
                           _study_form(protocol=protocol.pk, reference_condition="UV low"))
    assert response.status_code == 302
    assert Study.objects.get().reference_condition == "UV low"


def test_the_service_refuses_a_study_without_a_reference(researcher, protocol):
    with pytest.raises(ValidationError) as error:
        services.create_study(user=researcher, code="no-ref", title="x", protocol=protocol, conditions=["a", "b"],
                              replicates=2, method="block", seed=1)
    assert error.value.message_dict == {"reference_condition": [
        "Reference condition: required with 2 conditions; allowed values: 'a', 'b'."]}
    assert not Study.objects.exists()


def _frame(rows) -> pd.DataFrame:
    """Tidy rows (condition, time, dispersed) as reports.tidy_frame makes them, all scored."""
    return pd.DataFrame([{"condition": c, "disperse_s": t, "dispersed": d, "censored": not d, "status": "scored",
                          "stimulus": "none", "dose_mj_cm2": None} for c, t, d in rows])


# Two small groups and a control; times in s, True = dispersed, False = still clumped at 600 s (censored).
ROWS = [("sham", 600, False), ("sham", 420, True), ("sham", 600, False), ("sham", 510, True),
        ("UV low", 300, True), ("UV low", 600, False), ("UV low", 240, True), ("UV low", 450, True),
        ("UV high", 90, True), ("UV high", 150, True), ("UV high", 200, True), ("UV high", 600, False)]


def test_each_condition_is_compared_with_the_chosen_reference(db):
    result = reports.analyse(_frame(ROWS), ["sham", "UV low", "UV high"], reference="UV low")
    assert result.reference == "UV low" and result.no_comparison == ""
    by = {r.condition: r for r in result.conditions}
    assert by["UV low"].logrank is None
    for other in ("sham", "UV high"):
        # statsmodels' two-group log-rank test (statsmodels.duration.survfunc.survdiff) as the outside reference
        pair = [r for r in ROWS if r[0] in (other, "UV low")]
        chi2, p = survdiff(np.array([r[1] for r in pair], float), np.array([r[2] for r in pair], int),
                           np.array([r[0] == "UV low" for r in pair], int))
        assert by[other].logrank["statistic"] == pytest.approx(chi2, rel=1e-9)
        assert by[other].logrank["p"] == pytest.approx(p, rel=1e-9)
    assert list(dict.fromkeys(result.km_table["condition"]))[0] == "UV low"  # the reference's curve first


def test_a_reference_without_analysable_trials_gives_no_comparison_instead_of_another_one(db):
    rows = [r for r in ROWS if r[0] != "sham"]
    result = reports.analyse(_frame(rows), ["sham", "UV low", "UV high"], reference="sham")
    assert result.reference == "sham"
    assert result.no_comparison == "reference condition 'sham' has no analysable trials yet; no comparison"
    assert all(r.logrank is None for r in result.conditions)  # not "UV high vs UV low"


def test_the_study_page_and_chart_say_there_is_no_comparison(client, researcher, protocol):
    cohort = make_cohort(user=researcher, protocol=protocol, at=days_ago(10))
    study = make_study(user=researcher, protocol=protocol, conditions=("sham", "UV low", "UV high"), replicates=1)
    for entry in study.allocation:
        if entry["condition"] != "sham":
            record(study, cohort, researcher, slot=entry["slot"], at=days_ago(9 - entry["slot"]))
    client.force_login(researcher)
    page = page_text(client.get(study.get_absolute_url()))
    assert "The reference condition 'sham' has no analysable trials yet; no comparison." in page
    svg = client.get(reverse("experiments:study-chart", args=[study.code, "km", "svg"])).content.decode()
    title = " ".join(re.findall(r"<!-- (.*?) -->", svg))
    assert "no comparison: reference condition 'sham' has no analysable trials yet" in title
    assert "log-rank vs" not in title
