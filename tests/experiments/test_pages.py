"""Trials pages: booking, drawing, recording with refusals and overrides, study page, exports, ledger, cautions."""
import csv
import io

import pytest
from django.urls import reverse

from colonies.models import Deviation
from experiments import services
from experiments.models import Booking, Cohort, Override, Stimulus, Trial
from experiments.models import CAUTION_ELECTRICAL, CAUTION_UV
from experiments.reports import LEDGER_COLUMNS, TIDY_COLUMNS
from tests.experiments.builders import days_ago, make_cohort, make_stocked_tank, make_study, record, today
from colonies.roles import MANAGER
from tests.factories import make_user, page_text


def _post_trial(client, study, cohort, **overrides):
    """Claim the first open slot ("I will run slot N"; nothing new if the client's user holds it) and record it."""
    slot = next(s["slot"] for s in study.allocation
                if not Trial.objects.counting().filter(study=study, slot=s["slot"]).exists())
    client.post(reverse("experiments:slot-claim", args=[study.code, slot]))
    data = {"slot": str(slot),
            "cohort": str(cohort.pk), "run_at": days_ago(2).strftime("%Y-%m-%dT%H:%M"), "vessel": "glass Petri dish",
            "animals": "10", "kind": "uv", "wavelength_nm": "365", "irradiance_mw_cm2": "2", "duration_s": "10",
            "aggregate_s": "240", "disperse_s": "130", "clusters_text": "60 2 0.8\n300 7 0.2"}
    data.update(overrides)
    return client.post(reverse("experiments:trial-new", args=[study.code]), data)


# --- bookings ---------------------------------------------------------------------------------------
def _streamed(response) -> str:
    """A downloaded CSV: every export streams (colonies/exports.py)."""
    assert response.streaming and response.status_code == 200
    return b"".join(response.streaming_content).decode("utf-8")


def test_suggest_then_book_from_a_suggested_tank(client, researcher, protocol, tank):
    client.force_login(researcher)
    data = {"protocol": protocol.pk, "species": tank.species_id, "animals": 50, "needed_on": today().isoformat(),
            "action": "suggest"}
    response = client.post(reverse("experiments:booking-new"), data)
    assert response.status_code == 200
    assert "Book from LV-T1" in page_text(response) and ">900<" in response.content.decode()
    response = client.post(reverse("experiments:booking-new"), {**data, "action": "", "pick": tank.pk})
    booking = Booking.objects.get()
    assert response.status_code == 302 and response["Location"] == booking.get_absolute_url()
    assert (booking.tank, booking.animals, booking.booked_by) == (tank, 50, researcher)


def test_booking_more_than_available_shows_the_reason_and_saves_nothing(client, researcher, protocol, tank):
    client.force_login(researcher)
    response = client.post(reverse("experiments:booking-new"), {
        "protocol": protocol.pk, "species": tank.species_id, "animals": 901, "needed_on": today().isoformat(),
        "tank": tank.pk, "action": "book"})
    assert response.status_code == 409
    assert "Tank LV-T1 has only 900 animals available" in page_text(response)
    assert not Booking.objects.exists()


def test_draw_from_the_booking_page_makes_a_cohort(client, researcher, protocol, tank):
    booking = services.book(user=researcher, protocol=protocol, tank=tank, animals=12, needed_on=today())
    client.force_login(researcher)
    response = client.post(reverse("experiments:booking-draw", args=[booking.pk]), {"count": 12})
    cohort = Cohort.objects.get()
    assert response["Location"] == cohort.get_absolute_url()
    assert services.current_population(tank) == 988


def test_another_researcher_cannot_cancel_or_draw_my_booking(client, researcher, protocol, tank):
    from colonies.roles import RESEARCHER
    from tests.factories import make_user
    booking = services.book(user=researcher, protocol=protocol, tank=tank, animals=12, needed_on=today())
    client.force_login(make_user("rival", role=RESEARCHER))
    assert client.post(reverse("experiments:booking-cancel", args=[booking.pk]), {"reason": "x"}).status_code == 403
    assert client.post(reverse("experiments:booking-draw", args=[booking.pk]), {"count": 1}).status_code == 403
    booking.refresh_from_db()
    assert booking.is_active


def test_calendar_shows_bookings_of_the_week_by_room(client, technician, researcher, protocol, tank):
    services.book(user=researcher, protocol=protocol, tank=tank, animals=12, needed_on=today())
    client.force_login(technician)
    response = client.get(reverse("experiments:calendar"), {"room": tank.room.code, "view": "week"})
    assert "LV-T1" in page_text(response) and "12 animals booked or drawn" in page_text(response)
    response = client.get(reverse("experiments:calendar"), {"view": "month"})
    assert response.status_code == 200 and "LV-T1" in page_text(response)


# --- trials -----------------------------------------------------------------------------------------
@pytest.fixture
def bench(researcher, protocol, tank):
    cohort = make_cohort(user=researcher, protocol=protocol, tank=tank, at=days_ago(10))
    study = make_study(user=researcher, protocol=protocol, code="bench-study", replicates=3)
    return cohort, study


def test_recording_a_trial_through_the_form(client, researcher, bench):
    cohort, study = bench
    client.force_login(researcher)
    response = _post_trial(client, study, cohort)
    trial = Trial.objects.get()
    assert response.status_code == 302 and response["Location"] == trial.get_absolute_url()
    assert (trial.dish.cohort, trial.dish.number, trial.dish.animals) == (cohort, 1, 10)  # a new dish, same step
    assert trial.dose_mj_cm2 == 20 and trial.clusters == [
        {"t_s": 60.0, "clusters": 2, "largest_fraction": 0.8}, {"t_s": 300.0, "clusters": 7, "largest_fraction": 0.2}]


def test_impossible_value_in_the_form_is_named_with_its_range(client, researcher, bench):
    cohort, study = bench
    client.force_login(researcher)
    response = _post_trial(client, study, cohort, water_temp_c="80", clusters_text="60 2 1.4")
    assert response.status_code == 400
    text = page_text(response)
    assert "Water temperature 80 °C is not possible here: allowed range 0–45 °C." in text
    assert "Largest-cluster fraction 1.4 is not possible here: allowed range 0–1." in text
    assert not Trial.objects.exists()


def test_missing_stimulus_settings_are_asked_for(client, researcher, bench):
    cohort, study = bench
    client.force_login(researcher)
    response = _post_trial(client, study, cohort, kind="electrical", voltage_v="")
    assert response.status_code == 400
    assert "Required for a electrical stimulus." in page_text(response)


def test_limit_refusal_lists_the_breach_and_a_manager_overrides_it(client, researcher, manager, bench):
    cohort, study = bench
    client.force_login(researcher)
    assert _post_trial(client, study, cohort).status_code == 302
    dish = Trial.objects.get().dish
    response = _post_trial(client, study, cohort, dish=str(dish.pk), run_at=days_ago(1.9).strftime("%Y-%m-%dT%H:%M"))
    assert response.status_code == 409
    text = page_text(response)
    assert f"Rest since the last exposure of dish {dish.label}" in text
    assert "Only a manager may record an override" in text
    assert Trial.objects.count() == 1
    client.force_login(manager)
    slot = 2  # the slot the researcher claimed and could not run (slot 1 has its trial)
    released = client.post(reverse("experiments:slot-release", args=[study.code, slot]),
                           {"reason": "Needs a manager's override; I run it"})
    assert released.status_code == 302
    response = _post_trial(client, study, cohort, dish=str(dish.pk), run_at=days_ago(1.9).strftime("%Y-%m-%dT%H:%M"),
                           override_reason="Second dish of the same pair; agreed with the welfare officer")
    assert response.status_code == 302
    override = Override.objects.get()
    assert override.deviation.rule == Deviation.Rule.PROTOCOL_LIMIT
    assert override.deviation.subject == f"dish:{dish.pk}"
    detail = page_text(client.get(response["Location"]))
    assert "agreed with the welfare officer" in detail and f"deviation #{override.deviation.pk}" in detail


def test_cautions_appear_where_uv_or_electrical_stimulus_is_configured(client, researcher, bench):
    cohort, study = bench
    client.force_login(researcher)
    form_page = page_text(client.get(reverse("experiments:trial-new", args=[study.code])))
    assert CAUTION_UV in form_page and CAUTION_ELECTRICAL in form_page
    assert "take precedence over anything shown here" in form_page
    uv = record(study, cohort, researcher, at=days_ago(9)).trial
    assert CAUTION_UV in page_text(client.get(uv.get_absolute_url()))
    assert CAUTION_ELECTRICAL in page_text(client.get(study.protocol.get_absolute_url()))


# --- the study page ---------------------------------------------------------------------------------
def _filled_study(researcher, protocol, tank, n_cohorts: int, code="full-study", disperses=None):
    """`disperses(dose, replicate)` decides each trial's outcome; by default more disperse at higher doses."""
    study = make_study(user=researcher, protocol=protocol, code=code, replicates=n_cohorts,
                       conditions=("sham", "UV 10", "UV 20", "UV 40"))
    doses = {"sham": 0, "UV 10": 10, "UV 20": 20, "UV 40": 40}
    for i in range(2 * n_cohorts):  # two exposures per cohort, a day apart (the protocol allows three)
        cohort = make_cohort(user=researcher, protocol=protocol, tank=tank, at=days_ago(30))
        for j, entry in enumerate(study.allocation[2 * i:2 * i + 2]):
            dose = doses[entry["condition"]]
            dispersed = disperses(dose, entry["replicate"]) if disperses else (entry["replicate"] + j) % 4 < (dose // 10)
            values = {"slot": entry["slot"], "at": days_ago(29 - j),
                      "disperse_s": 100.0 + 10 * entry["replicate"] if dispersed else None, "censored": not dispersed}
            if dose:
                record(study, cohort, researcher, irradiance=2.0, duration=dose / 2, **values)
            else:
                record(study, cohort, researcher, kind=Stimulus.NONE, wavelength=None, irradiance=None,
                       duration=None, **values)
    return study


def test_study_page_shows_summaries_curves_and_dose_response(client, technician, researcher, protocol, tank):
    study = _filled_study(researcher, protocol, tank, 4)
    client.force_login(technician)
    response = client.get(study.get_absolute_url())
    text = page_text(response)
    assert "Log-rank vs sham" in text and "EC50" in text
    assert reverse("experiments:study-chart", args=[study.code, "km", "png"]) in text
    assert reverse("experiments:study-chart-csv", args=[study.code, "dose"]) in text
    for kind in ("km", "dose"):
        svg = client.get(reverse("experiments:study-chart", args=[study.code, kind, "svg"]))
        assert svg["Content-Type"] == "image/svg+xml" and svg.content.startswith(b"<?xml")
        png = client.get(reverse("experiments:study-chart", args=[study.code, kind, "png"]) + "?download=1")
        assert png.content[:8] == b"\x89PNG\r\n\x1a\n"
        assert png["Content-Disposition"] == f'attachment; filename="{study.code}-{kind}.png"'


def _dose_csv(client, study) -> list[dict]:
    return list(csv.DictReader(io.StringIO(_streamed(client.get(
        reverse("experiments:study-chart-csv", args=[study.code, "dose"]))))))


def test_study_page_states_the_dose_response_decisions_and_the_link_comparison(client, researcher, protocol, tank):
    # 1 of 4, 2 of 4 and 4 of 4 trials disperse at 10, 20 and 40 mJ/cm²: a trend, no separation.
    study = _filled_study(researcher, protocol, tank, 4, code="graded", disperses=lambda dose, rep: rep <= dose // 10)
    client.force_login(researcher)
    response = client.get(study.get_absolute_url())
    fit = response.context["result"].dose_fit
    text = page_text(response)
    assert fit.has_ec50 and f"EC50 <strong>{fit.ec50:.3g} mJ/cm²</strong>" in text
    assert "Fieller's theorem" in text or "profile likelihood" in text
    assert "Dose trend" in text and "likelihood-ratio" in text and "heterogeneity factor χ²/df" in text
    table = response.content.decode().split('id="dose-links"')[1].split("</table>")[0]
    assert table.count("<tr>") == 4 and table.count(">chosen<") == 1  # header and three links
    rows = _dose_csv(client, study)
    assert {"status", "link", "ec50_mj_cm2", "interval_method", "heterogeneity_factor", "heterogeneity_applied",
            "trend_p", "aic_logit", "aic_probit", "aic_cloglog", "fitted_fraction"} <= set(rows[0])
    assert rows[0]["status"] == "ec50" and rows[0]["link"] == fit.link


def test_flat_dose_response_shows_no_dose_trend_instead_of_crashing(client, researcher, protocol, tank):
    # Half the trials disperse at every dose: the fitted slope is exactly 0 (this page used to fail).
    study = _filled_study(researcher, protocol, tank, 4, code="flat", disperses=lambda dose, rep: rep % 2 == 0)
    client.force_login(researcher)
    response = client.get(study.get_absolute_url())
    assert response.status_code == 200
    text = page_text(response)
    assert "No dose trend: the slope is not distinguishable from zero" in text
    assert "EC50 " not in text.split("No dose trend")[0].split("Dose-response")[-1]
    svg = client.get(reverse("experiments:study-chart", args=[study.code, "dose", "svg"])).content.decode()
    assert "No dose trend" in svg and "Fitted curve" not in svg and "EC50 =" not in svg
    rows = _dose_csv(client, study)
    assert {r["status"] for r in rows} == {"no_trend"} and {r["ec50_mj_cm2"] for r in rows} == {""}
    assert "fitted_fraction" not in rows[0]


def test_separated_dose_response_says_where_the_response_jumps(client, researcher, protocol, tank):
    study = _filled_study(researcher, protocol, tank, 4, code="steep", disperses=lambda dose, rep: dose >= 20)
    client.force_login(researcher)
    text = page_text(client.get(study.get_absolute_url()))
    assert "Complete separation: none responded at 10 or below and all at 20 or above" in text
    svg = client.get(reverse("experiments:study-chart", args=[study.code, "dose", "svg"])).content.decode()
    assert "Fitted curve" not in svg and "EC50 =" not in svg
    assert {r["status"] for r in _dose_csv(client, study)} == {"separation"}


def test_tidy_csv_has_one_row_per_trial_with_settings_derived_values_and_outcomes(client, researcher, protocol, tank):
    study = _filled_study(researcher, protocol, tank, 2)
    client.force_login(researcher)
    response = client.get(reverse("experiments:study-csv", args=[study.code]))
    rows = list(csv.DictReader(io.StringIO(_streamed(response))))
    assert list(rows[0]) == TIDY_COLUMNS
    assert len(rows) == 8
    uv40 = next(r for r in rows if r["condition"] == "UV 40")
    assert (uv40["irradiance_mw_cm2"], uv40["duration_s"], uv40["dose_mj_cm2"]) == ("2", "20", "40")
    km = _streamed(client.get(reverse("experiments:study-chart-csv", args=[study.code, "km"])))
    assert km.splitlines()[0] == "condition,time,at_risk,events,censored,survival,lower,upper"


def test_blinded_study_shows_codes_not_conditions_to_all_but_the_operator_until_unblinded(
        client, researcher, manager, bench):
    # The owner (researcher) is blinded too; the manager ran the trial and sees its condition.
    cohort, study = bench
    study.blinded = True
    study.save()
    trial = record(study, cohort, manager, at=days_ago(9)).trial
    client.force_login(researcher)
    page = page_text(client.get(study.get_absolute_url()))
    assert trial.code in page and trial.condition not in page and "all trials pooled" in page
    assert trial.condition not in page_text(client.get(trial.get_absolute_url()))
    rows = list(csv.DictReader(io.StringIO(_streamed(client.get(reverse("experiments:study-csv", args=[study.code]))))))
    assert (rows[0]["code"], rows[0]["condition"], rows[0]["stimulus"], rows[0]["dose_mj_cm2"]) == \
        (trial.code, "blinded", "blinded", "")
    score = page_text(client.get(reverse("experiments:trial-score", args=[trial.pk])))
    assert trial.code in score and trial.condition not in score
    client.force_login(manager)
    assert trial.condition in page_text(client.get(trial.get_absolute_url()))
    client.force_login(researcher)
    client.post(reverse("experiments:study-unblind", args=[study.code]), {"reason": "All dishes scored", "password": "pw"})
    assert trial.condition in page_text(client.get(study.get_absolute_url()))


# --- the ledger -------------------------------------------------------------------------------------
def test_ledger_shows_running_totals_overrides_and_filters(client, researcher, manager, bench):
    cohort, study = bench
    record(study, cohort, researcher, at=days_ago(9), irradiance=5, duration=10)
    record(study, cohort, researcher, at=days_ago(8), irradiance=5, duration=10)
    record(study, cohort, manager, at=days_ago(7.5), irradiance=5, duration=10, override_reason="Dish cracked; rerun")
    client.force_login(manager)
    text = page_text(client.get(reverse("experiments:ledger")))
    assert "3 of 3" in text and "150 of 150" in text and "Dish cracked; rerun" in text and "▲ over: rest" in text
    response = client.get(reverse("experiments:ledger-csv"), {"overridden": "on"})
    rows = list(csv.DictReader(io.StringIO(_streamed(response))))
    assert list(rows[0]) == LEDGER_COLUMNS and len(rows) == 1
    assert (rows[0]["exposure_number"], rows[0]["cumulative_dose_mj_cm2"], rows[0]["over_limit"]) == ("3", "150", "rest")


def test_ledger_csv_has_every_exposure_where_the_page_shows_the_first(client, researcher, manager, bench, monkeypatch):
    from experiments import views

    cohort, study = bench
    for day in (9, 8, 7):
        record(study, cohort, researcher, at=days_ago(day), irradiance=2, duration=10)
    monkeypatch.setattr(views, "LEDGER_PAGE_ROWS", 2)
    client.force_login(manager)

    page = client.get(reverse("experiments:ledger"))
    rows = list(csv.DictReader(io.StringIO(_streamed(client.get(reverse("experiments:ledger-csv"))))))

    assert len(page.context["rows"]) == 2
    assert [r["exposure_number"] for r in rows] == ["1", "2", "3"]


# --- query counts stay constant ---------------------------------------------------------------------
@pytest.mark.parametrize("n", [1, 4])
def test_page_query_counts_do_not_grow_with_the_data(client, content_types_cached, manager, researcher, protocol, technician,
                                                     django_assert_max_num_queries, n):
    tank = make_stocked_tank(estimate=5000, reserve=0, user=technician)
    study = _filled_study(researcher, protocol, tank, n, code=f"q-{n}")
    for _ in range(n):
        services.book(user=researcher, protocol=protocol, tank=tank, animals=5, needed_on=today())
    cohort = Cohort.objects.first()
    client.force_login(manager)
    booking = Booking.objects.first()
    # Counts include the session, the user and the role lookup.
    pages = {
        reverse("experiments:index"): 8, study.get_absolute_url(): 7,  # 7: with image agreement and signatures
        reverse("experiments:study-csv", args=[study.code]): 5,
        reverse("experiments:study-chart", args=[study.code, "km", "svg"]): 5,
        reverse("experiments:ledger"): 7, reverse("experiments:ledger-csv"): 5,
        reverse("experiments:calendar"): 6, cohort.get_absolute_url(): 7,
        booking.get_absolute_url(): 8, protocol.get_absolute_url(): 9,  # 9: with its versions and signatures
    }
    for url, limit in pages.items():
        with django_assert_max_num_queries(limit):
            response = client.get(url)
            assert response.status_code == 200
            b"".join(response.streaming_content) if response.streaming else response.content  # a CSV reads as it streams


@pytest.mark.parametrize("n", [1, 4])
def test_blinded_page_query_counts_do_not_grow_with_the_data(client, manager, researcher, protocol, technician,
                                                             django_assert_max_num_queries, n):
    # The pooled preview, the masked CSV and the pooled chart ask the blinding rule per trial without a query.
    tank = make_stocked_tank(estimate=5000, reserve=0, user=technician)
    study = _filled_study(researcher, protocol, tank, n, code=f"qb-{n}")
    study.blinded = True
    study.save()
    client.force_login(manager)
    pages = {study.get_absolute_url(): 7,  # 7: the image-vs-scorer agreement reads the measurements; signatures
             reverse("experiments:study-csv", args=[study.code]): 5,
             reverse("experiments:study-chart", args=[study.code, "km", "svg"]): 5,
             reverse("experiments:study-chart-csv", args=[study.code, "km"]): 5,
             Trial.objects.filter(study=study).first().get_absolute_url(): 7}
    for url, limit in pages.items():
        with django_assert_max_num_queries(limit):
            response = client.get(url)
            assert response.status_code == 200, url
            b"".join(response.streaming_content) if response.streaming else response.content


def test_booking_form_names_an_impossible_number(client, researcher, protocol, tank):
    client.force_login(researcher)
    response = client.post(reverse("experiments:booking-new"), {
        "protocol": protocol.pk, "species": tank.species_id, "animals": 0, "needed_on": today().isoformat(),
        "tank": tank.pk, "action": "book"})
    assert response.status_code == 400
    assert "Animals 0 is not possible: allowed range 1–100000." in page_text(response)


def test_back_office_lists_protocols_but_adds_and_deletes_nothing(client, superuser, researcher, bench):
    cohort, study = bench
    record(study, cohort, researcher, at=days_ago(9))
    client.force_login(superuser)
    for model in ("protocol", "booking", "cohort", "dish", "study", "trial", "override", "attachment"):
        assert client.get(reverse(f"admin:experiments_{model}_changelist")).status_code == 200
    # Protocols are entered, amended and approved (signed) in the app's pages: the back office only shows them.
    assert client.get(reverse("admin:experiments_protocol_add")).status_code == 403
    assert client.get(reverse("admin:experiments_protocol_delete", args=[study.protocol_id])).status_code == 403


# --- review fixes: blinding outside the study page, who may end or set aside, draw time, corrections, CSV --------
def test_cohort_page_ledger_and_trial_page_hide_blinded_settings_doses_and_override_reasons(
        client, researcher, manager, technician, bench):
    cohort, study = bench
    study.blinded = True
    study.save()
    trial = record(study, cohort, manager, at=days_ago(9), irradiance=6, duration=5,
                   override_reason="Higher irradiance for the UV arm").trial
    settings = trial.stimulus_text()  # "Ultraviolet light: 365 nm 6 mW/cm² × 5 s = 30 mJ/cm²"
    other_manager = make_user("mara", role=MANAGER)
    for user in (technician, researcher, other_manager):  # the owner too: only the operator (manager) sees
        client.force_login(user)
        page = page_text(client.get(cohort.get_absolute_url()))
        assert trial.code in page and "blinded" in page
        assert settings not in page and "365 nm" not in page and "<strong>30</strong>" not in page
        assert "Higher irradiance" not in page
        trial_page = page_text(client.get(trial.get_absolute_url()))
        assert "Higher irradiance" not in trial_page and "Irradiance 6" not in trial_page
    ledger = page_text(client.get(reverse("experiments:ledger")))
    assert trial.code in ledger and settings not in ledger and "Higher irradiance" not in ledger
    [row] = csv.DictReader(io.StringIO(_streamed(client.get(reverse("experiments:ledger-csv")))))
    assert (row["stimulus"], row["settings"], row["dose_mj_cm2"], row["cumulative_dose_mj_cm2"]) == \
        ("blinded", f"blinded: code {trial.code}", "", "")
    assert row["exposure_number"] == "1" and row["over_limit"] == ""
    client.force_login(manager)  # the operator sees the trial they ran
    page = page_text(client.get(cohort.get_absolute_url()))
    assert settings in page and "Higher irradiance" in page and "<strong>30</strong>" in page


def test_ledger_stimulus_filter_does_not_pick_out_blinded_trials(client, researcher, manager, bench):
    cohort, study = bench
    study.blinded = True
    study.save()
    trial = record(study, cohort, researcher, at=days_ago(9)).trial  # an ultraviolet exposure the manager did not run
    client.force_login(manager)
    everything = client.get(reverse("experiments:ledger"))
    assert [r["trial"] for r in everything.context["rows"]] == [trial]  # the exposure is in the ledger...
    by_kind = client.get(reverse("experiments:ledger"), {"kind": trial.kind})
    assert by_kind.context["rows"] == []  # ...but filtering by its stimulus would reveal the condition
    services.unblind(user=study.owner, study=study, reason="analysis done", password="pw")
    by_kind = client.get(reverse("experiments:ledger"), {"kind": trial.kind})
    assert [r["trial"] for r in by_kind.context["rows"]] == [trial]


def test_only_the_drawer_or_a_manager_may_end_a_cohort(client, researcher, manager, bench):
    from colonies.roles import RESEARCHER
    from tests.factories import make_user
    cohort, _ = bench
    rival = make_user("rival", role=RESEARCHER)
    client.force_login(rival)
    assert "End this cohort" not in page_text(client.get(cohort.get_absolute_url()))
    response = client.post(reverse("experiments:cohort-end", args=[cohort.pk]), {"end": Cohort.End.DIED})
    assert response.status_code == 403
    cohort.refresh_from_db()
    assert cohort.is_active
    client.force_login(manager)
    assert client.post(reverse("experiments:cohort-end", args=[cohort.pk]), {"end": Cohort.End.DIED}).status_code == 302
    cohort.refresh_from_db()
    assert cohort.end == Cohort.End.DIED and cohort.ended_by == manager


@pytest.mark.parametrize("action", ["exclude", "void"])
def test_only_the_study_owner_or_a_manager_may_set_a_trial_aside(client, researcher, manager, bench, action):
    from colonies.roles import RESEARCHER
    from tests.factories import make_user
    cohort, study = bench
    trial = record(study, cohort, researcher, at=days_ago(9)).trial
    url = reverse("experiments:trial-set-aside", args=[trial.pk, action])
    client.force_login(make_user("rival", role=RESEARCHER))
    assert "Set aside" not in page_text(client.get(trial.get_absolute_url()))
    response = client.post(url, {"reason": "Not my study"})
    assert response.status_code == 403
    trial.refresh_from_db()
    assert not trial.is_excluded and not trial.is_voided
    client.force_login(manager)
    assert client.post(url, {"reason": "Clump never formed"}).status_code == 302
    trial.refresh_from_db()
    assert trial.is_excluded or trial.is_voided


@pytest.mark.parametrize("offset,ok", [(-120, False), (60, False), (0, True)])
def test_draw_time_must_lie_between_booking_and_now(client, researcher, protocol, tank, offset, ok):
    from datetime import timedelta

    from django.utils import timezone
    booking = services.book(user=researcher, protocol=protocol, tank=tank, animals=12, needed_on=today())
    typed = timezone.localtime(booking.booked_at + timedelta(minutes=offset)).strftime("%Y-%m-%dT%H:%M")
    client.force_login(researcher)
    response = client.post(reverse("experiments:booking-draw", args=[booking.pk]),
                           {"count": 12, "drawn_at": typed}, follow=True)
    assert Cohort.objects.exists() is ok
    if not ok:
        text = page_text(response)
        assert f"Drawn at {typed.replace('T', ' ')} is not possible: allowed range" in text
        assert "(when it was booked)" in text


def test_correcting_a_score_needs_a_reason_kept_in_the_history(client, researcher, bench):
    cohort, study = bench
    trial = record(study, cohort, researcher, at=days_ago(9)).trial  # scored on entry: 120 s
    client.force_login(researcher)
    url = reverse("experiments:trial-score", args=[trial.pk])
    response = client.post(url, {"disperse_s": "150", "aggregate_s": "200"})
    assert response.status_code == 400 and "Give a reason for correcting the score." in page_text(response)
    trial.refresh_from_db()
    assert trial.disperse_s == 120
    assert client.post(url, {"disperse_s": "150", "aggregate_s": "200", "reason": "Misread the timer"}).status_code == 302
    trial.refresh_from_db()
    assert trial.disperse_s == 150
    assert trial.history.first().history_change_reason == "Outcome corrected: Misread the timer"


def test_csv_exports_defuse_formula_text_and_keep_negative_numbers(client, researcher, manager, protocol, tank):
    cohort = make_cohort(user=researcher, protocol=protocol, tank=tank, at=days_ago(10))
    study = make_study(user=researcher, protocol=protocol, code="csv-study", conditions=("sham", "-2 °C step"))
    cold = next(s["slot"] for s in study.allocation if s["condition"] == "-2 °C step")
    trial = record(study, cohort, researcher, slot=cold, at=days_ago(9), kind=Stimulus.THERMAL, wavelength=None,
                   irradiance=None, duration=None, temp_step_c=-2.0).trial
    services.exclude_trial(user=researcher, trial=trial, reason="=HYPERLINK(\"http://x\")")
    record(study, make_cohort(user=researcher, protocol=protocol, tank=tank, at=days_ago(10)), manager,
           at=days_ago(9), irradiance=6, duration=5, override_reason="+dish cracked")
    client.force_login(researcher)
    rows = list(csv.DictReader(io.StringIO(_streamed(client.get(reverse("experiments:study-csv", args=[study.code]))))))
    row = next(r for r in rows if r["code"] == trial.code)
    assert (row["condition"], row["exclusion_reason"], row["temp_step_c"]) == \
        ("'-2 °C step", "'=HYPERLINK(\"http://x\")", "-2")
    assert next(r for r in rows if r["code"] != trial.code)["override_reason"] == "'+dish cracked"
    client.force_login(manager)
    ledger = list(csv.DictReader(io.StringIO(_streamed(client.get(reverse("experiments:ledger-csv"))))))
    assert {r["override_reason"] for r in ledger} == {"", "'+dish cracked"}
