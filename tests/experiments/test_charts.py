"""Chart functions (experiments/charts.py): pure, tables in, SVG/PNG bytes out."""
import re

import pandas as pd
import pytest

from experiments import analysis, charts, dose_response


def _km_table(groups: dict[str, tuple[list[float], list[bool]]]) -> pd.DataFrame:
    parts = []
    for name, (times, events) in groups.items():
        km = analysis.kaplan_meier(times, events)
        km.insert(0, "condition", name)
        parts.append(km)
    return pd.concat(parts, ignore_index=True)


TWO = _km_table({"sham": ([600, 600, 420, 600], [False, False, True, False]),
                 "UV": ([90, 150, 240, 600], [True, True, True, False])})
FIVE = _km_table({f"c{i}": ([100 + 50 * i, 300, 600], [True, True, False]) for i in range(5)})


def test_km_chart_svg_has_axis_labels_with_units_and_okabe_ito_colours():
    svg = charts.km_chart(TWO, window_s=600, title="Test", fmt="svg").decode()
    assert svg.startswith("<?xml")
    assert "Time after stimulus (s)" in svg and "Fraction still clumped" in svg
    assert "#0072b2" in svg.lower() and "#d55e00" in svg.lower()  # Okabe & Ito (2008) blue and vermillion
    assert "sham (n = 4)" in svg


def test_km_chart_with_many_conditions_uses_one_panel_each():
    svg = charts.km_chart(FIVE, window_s=600, reference="c0", fmt="svg").decode()
    assert svg.count("Fraction still clumped") == 2  # the left column of a 2 × 3 grid
    assert "Grey line: the reference condition, c0." in svg.replace("\n", " ") or "reference" in svg


def test_km_panels_without_the_reference_draw_no_other_condition_in_its_place():
    # The reference has no curve: no grey line at all (never c0 standing in for it), and the note says why.
    with_reference = charts.km_chart(FIVE, window_s=600, reference="c0", fmt="svg").decode()
    without = charts.km_chart(FIVE[FIVE["condition"] != "c9"], window_s=600, reference="c9", fmt="svg").decode()
    assert with_reference.count("#9a9a9a") >= 4  # the grey reference line in each of the other four panels
    assert "#9a9a9a" not in without
    text = " ".join(re.findall(r"<!-- (.*?) -->", without))  # matplotlib writes each line of text as a comment
    assert "The reference condition, c9, has no analysable trials yet." in text


def test_charts_are_deterministic_and_png_is_png():
    assert charts.km_chart(TWO, fmt="svg") == charts.km_chart(TWO, fmt="svg")
    png = charts.km_chart(TWO, fmt="png")
    assert png[:8] == b"\x89PNG\r\n\x1a\n"


def test_dose_response_chart_draws_fit_and_ec50():
    groups = pd.DataFrame({"dose": [0.0, 5.0, 10.0, 20.0, 40.0], "n_responding": [1, 1, 3, 4, 5],
                           "n_total": [6, 6, 6, 6, 6]})
    positive = groups[groups["dose"] > 0]
    fit = dose_response.fit_dose_response(positive["dose"], positive["n_responding"], positive["n_total"])
    assert fit.has_ec50
    curve = pd.DataFrame({"dose": [2.0, 10.0, 80.0], "fitted": fit.predict([2.0, 10.0, 80.0])})
    svg = charts.dose_response_chart(groups, curve=curve, ec50=fit.ec50, ec50_lower=fit.ec50_lower,
                                     ec50_upper=fit.ec50_upper, control=(1, 6), fmt="svg",
                                     curve_label=f"Fitted curve, {fit.link_label}").decode()
    assert "Light dose per exposure (mJ/cm², log scale)" in svg
    assert f"EC50 = {fit.ec50:.3g} mJ/cm²" in svg
    assert f"Fitted curve, {fit.link_label}" in svg
    assert "Sham, no light (1/6)" in svg


def test_dose_response_chart_without_a_trend_draws_the_points_only():
    groups = pd.DataFrame({"dose": [5.0, 10.0, 20.0], "n_responding": [3, 3, 3], "n_total": [6, 6, 6]})
    svg = charts.dose_response_chart(groups, note="No dose trend: ...", fmt="svg").decode()
    assert "Observed fraction" in svg
    assert "Fitted curve" not in svg and "EC50" not in svg and "95 % interval" not in svg


def test_empty_inputs_give_a_readable_placeholder():
    empty = pd.DataFrame(columns=list(charts.KM_TABLE_COLUMNS))
    assert "No scored trials yet." in charts.km_chart(empty, fmt="svg").decode()
    no_dose = pd.DataFrame({"dose": [0.0], "n_responding": [0], "n_total": [3]})
    assert "No trials with a positive dose" in charts.dose_response_chart(no_dose, fmt="svg").decode()


def test_unknown_format_is_refused():
    with pytest.raises(ValueError, match="Unknown chart format"):
        charts.km_chart(TWO, fmt="gif")
