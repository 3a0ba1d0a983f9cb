"""Image measurements through the screens: upload → measure → propose → accept or override, per role and blind.

The expected dispersal times come from the drawn frames (tests/experiments/dish_pictures.py): the ring of
worms is drawn touching until a known frame and apart from it on.
"""
import hashlib
import io
from datetime import timedelta

import pytest
from django.core.files.uploadedfile import SimpleUploadedFile
from django.urls import reverse
from django.utils import timezone

from experiments import agreement, measuring
from experiments.models import Attachment, ImageMeasurement, Trial
from tests.experiments.builders import days_ago, make_cohort, make_study, record
from tests.experiments.dish_pictures import mp4, png, ring
from tests.factories import make_user
from colonies.roles import RESEARCHER

SPREADS = [1, 1, 1, 2.2, 2.6, 3]  # one clump for 3 frames, apart from the 4th: at 60 s apart dispersed at 180 s


def photos(spreads=SPREADS, prefix="dish"):
    return [SimpleUploadedFile(f"{prefix}-{i:02d}.png", png(ring(s)), content_type="image/png")
            for i, s in enumerate(spreads)]


@pytest.fixture
def media(settings, tmp_path):
    settings.MEDIA_ROOT = tmp_path
    return tmp_path


@pytest.fixture
def bench(researcher, protocol, media):
    cohort = make_cohort(user=researcher, protocol=protocol, at=days_ago(10))
    study = make_study(user=researcher, protocol=protocol, replicates=3, blinded=True)
    return cohort, study


def scored_trials(study, researcher, protocol, outcomes):
    """One trial per (disperse_s, censored), three per cohort on three days (the protocol's rest and exposure limits)."""
    trials = []
    for k, (disperse_s, censored) in enumerate(outcomes):
        if k % 3 == 0:
            cohort = make_cohort(user=researcher, protocol=protocol, at=days_ago(10))
        trials.append(record(study, cohort, researcher, at=days_ago(8 - k % 3), disperse_s=disperse_s,
                             censored=censored).trial)
    return trials


@pytest.fixture
def trial(bench, researcher):
    cohort, study = bench
    return record(study, cohort, researcher, at=days_ago(8), disperse_s=None, censored=False).trial


def upload(client, trial, files, **fields):
    data = {"files": files, "interval_s": 60, "stimulus_at_s": 0, "threshold": 0.5, "polarity": "dark",
            "min_area_px": 12, "background_px": 40, **fields}
    return client.post(reverse("experiments:measurement-new", args=[trial.pk]), data)


def page(response) -> str:
    return response.content.decode()


def test_photos_are_stored_with_their_sha256_and_measured(client, researcher, trial):
    client.force_login(researcher)
    files = photos()
    bodies = [f.read() for f in files]
    for f in files:
        f.seek(0)
    response = upload(client, trial, files)
    assert response.status_code == 302
    m = ImageMeasurement.objects.get()
    assert m.status == ImageMeasurement.Status.DONE
    assert (m.dispersal_time_s, m.censored) == (180, False)
    assert [r["clusters"] for r in m.frames] == [1, 1, 1, 8, 8, 8]
    stored = list(Attachment.objects.filter(trial=trial).order_by("pk"))
    # SHA-256 of the bytes as uploaded, by hashlib (FIPS 180-4), for each photo and for the series.
    assert [a.sha256 for a in stored] == [hashlib.sha256(b).hexdigest() for b in bodies]
    assert [f["sha256"] for f in m.files] == [a.sha256 for a in stored]
    assert m.sha256 == hashlib.sha256("".join(a.sha256 for a in stored).encode()).hexdigest()
    assert m.settings["segmentation"]["min_area_px"] == 12 and m.settings["times_s"] == [0, 60, 120, 180, 240, 300]
    assert m.settings["versions"]["scikit-image"]
    assert m.history.first().history_change_reason == "Measured: dispersed at 180 s"


def test_a_video_is_measured_and_its_sha256_stored(client, researcher, trial):
    client.force_login(researcher)
    body = mp4([1, 1, 1, 2.5, 3])  # clumped for the first 15 s, apart from 15 s
    response = upload(client, trial, [SimpleUploadedFile("dish.mp4", body, content_type="video/mp4")], interval_s=5)
    assert response.status_code == 302
    m = ImageMeasurement.objects.get()
    assert m.source == ImageMeasurement.Source.VIDEO
    assert m.sha256 == hashlib.sha256(body).hexdigest()
    assert (m.dispersal_time_s, m.censored) == (15, False)


def test_the_trial_page_shows_the_figure_and_the_frames_download(client, researcher, technician, trial):
    client.force_login(researcher)
    upload(client, trial, photos())
    m = ImageMeasurement.objects.get()
    client.force_login(technician)
    text = page(client.get(trial.get_absolute_url()))
    assert reverse("experiments:measurement-chart", args=[m.pk, "svg"]) in text and "dispersed at <strong>180 s" in text
    chart = client.get(reverse("experiments:measurement-chart", args=[m.pk, "svg"]))
    assert chart.status_code == 200 and chart["Content-Type"] == "image/svg+xml" and b"Threshold 0.5" in chart.content
    csv_text = b"".join(client.get(reverse("experiments:measurement-csv", args=[m.pk])).streaming_content).decode()
    assert csv_text.splitlines()[0].startswith("t_s,clusters,largest_fraction")
    assert len(csv_text.splitlines()) == 7


# --- the proposal on the scoring form -------------------------------------------------------------
@pytest.fixture
def measured(client, researcher, trial):
    client.force_login(researcher)
    upload(client, trial, photos())
    return ImageMeasurement.objects.get()


def test_the_scoring_form_is_filled_in_with_the_measured_values(client, researcher, trial, measured):
    response = client.get(reverse("experiments:trial-score", args=[trial.pk]))
    form = response.context["form"]
    assert form["disperse_s"].value() == 180 and not form["censored"].value()
    assert "120 1 1\n180 8 0.1" in form["clusters_text"].value()
    assert "Proposed from the images" in page(response)


def test_accepting_the_proposal_is_recorded(client, researcher, trial, measured):
    response = client.post(reverse("experiments:trial-score", args=[trial.pk]),
                           {"disperse_s": 180, "aggregate_s": 300, "measurement": measured.pk})
    assert response.status_code == 302
    trial.refresh_from_db()
    measured.refresh_from_db()
    assert trial.disperse_s == 180 and not trial.censored
    assert measured.decision == ImageMeasurement.Decision.ACCEPTED and measured.decided_by == researcher
    assert trial.history.first().history_change_reason == \
        f"Outcome scored (proposed by image measurement #{measured.pk}, accepted)"


def test_overriding_the_proposal_is_recorded_with_both_values(client, researcher, trial, measured):
    client.post(reverse("experiments:trial-score", args=[trial.pk]),
                {"disperse_s": 150, "aggregate_s": 300, "measurement": measured.pk})
    trial.refresh_from_db()
    measured.refresh_from_db()
    assert measured.decision == ImageMeasurement.Decision.OVERRIDDEN
    assert (measured.scored_disperse_s, measured.dispersal_time_s, measured.override_difference_s) == (150, 180, -30)
    assert "scored 150 s (-30 s from the measured time)" in page(client.get(trial.get_absolute_url()))
    assert "image measurement #%d proposed dispersal at 180 s; overridden" % measured.pk in \
        trial.history.first().history_change_reason


def test_a_proposal_newer_than_the_form_refuses_the_score(client, researcher, trial, measured):
    upload(client, trial, photos([1, 1, 1, 1, 2.5, 3], prefix="again"))
    response = client.post(reverse("experiments:trial-score", args=[trial.pk]),
                           {"disperse_s": 180, "aggregate_s": 300, "measurement": measured.pk})
    assert response.status_code == 400 and "a newer image measurement" in page(response)
    trial.refresh_from_db()
    assert not trial.is_scored


def test_a_blinded_scorer_sees_the_proposal_but_not_the_condition(client, researcher, trial, measured):
    scorer = make_user("sam", role=RESEARCHER)
    client.force_login(scorer)
    for url in (reverse("experiments:trial-score", args=[trial.pk]), trial.get_absolute_url(),
                reverse("experiments:measurement-progress", args=[measured.pk])):
        response = client.get(url)
        assert response.status_code == 200
        assert trial.condition not in page(response)
    response = client.post(reverse("experiments:trial-score", args=[trial.pk]),
                           {"disperse_s": 180, "aggregate_s": 300, "measurement": measured.pk})
    assert response.status_code == 302
    measured.refresh_from_db()
    assert measured.decided_by == scorer


# --- who may measure --------------------------------------------------------------------------------
@pytest.mark.parametrize("who,status", [("technician", 403), ("other_researcher", 403), ("manager", 302),
                                        ("researcher", 302)])
def test_only_the_owner_or_a_manager_measures(client, request, trial, who, status):
    user = make_user("rex", role=RESEARCHER) if who == "other_researcher" else request.getfixturevalue(who)
    client.force_login(user)
    assert upload(client, trial, photos()).status_code == status
    assert ImageMeasurement.objects.count() == (1 if status == 302 else 0)


def test_anonymous_is_sent_to_login_and_get_is_not_allowed(client, researcher, trial):
    url = reverse("experiments:measurement-new", args=[trial.pk])
    assert client.post(url).status_code == 302 and "login" in client.post(url)["Location"]
    client.force_login(researcher)
    assert client.get(url).status_code == 405


# --- refused uploads: a clear message, nothing stored ------------------------------------------------
def _refused(response, words):
    assert response.status_code == 400
    assert words in page(response)
    assert not ImageMeasurement.objects.exists() and not Attachment.objects.exists()


def test_a_pdf_is_refused_by_content(client, researcher, trial):
    client.force_login(researcher)
    _refused(upload(client, trial, [SimpleUploadedFile("dish.png", b"%PDF-1.7\n%\xe2\xe3")]),
             "File &#x27;dish.png&#x27; is not a photo or a video that can be measured")


def test_a_video_with_photos_is_refused(client, researcher, trial):
    client.force_login(researcher)
    files = photos([1]) + [SimpleUploadedFile("dish.mp4", mp4([1]), content_type="video/mp4")]
    _refused(upload(client, trial, files), "a video is measured on its own")


def test_photos_of_two_sizes_are_refused_naming_the_photo(client, researcher, trial):
    client.force_login(researcher)
    files = photos([1]) + [SimpleUploadedFile("dish-99.png", png(ring(1)[:100, :100]))]
    _refused(upload(client, trial, files), "Photo &#x27;dish-99.png&#x27; is 100×100 px but the first is 200×200 px")


def test_an_interval_out_of_range_is_refused_with_the_range(client, researcher, trial):
    client.force_login(researcher)
    _refused(upload(client, trial, photos(), interval_s=0), "Seconds between frames: 0.0 s is not possible; "
                                                             "allowed range 0.04–3600 s.")


def test_no_file_is_refused_naming_the_field(client, researcher, trial):
    client.force_login(researcher)
    _refused(upload(client, trial, []), "Photos or video")


def test_an_oversized_file_is_refused_with_the_limit(client, researcher, trial, settings):
    settings.ATTACHMENT_MAX_BYTES = 500  # each photo is about 750 bytes
    client.force_login(researcher)
    _refused(upload(client, trial, photos()), "larger than the limit of 0.0005 MB")


def test_a_study_with_locked_outcomes_takes_no_more_measurements(client, researcher, trial):
    trial.study.outcomes_locked_at = timezone.now()
    trial.study.save()
    client.force_login(researcher)
    _refused(upload(client, trial, photos()), "has locked outcomes")


# --- failures, interruptions, re-runs, voids -------------------------------------------------------
def test_a_file_changed_after_storage_fails_the_measurement_with_a_message(client, researcher, trial, measured):
    m = measured
    attachment = Attachment.objects.get(pk=m.files[0]["attachment"])
    with open(attachment.file.path, "ab") as fh:
        fh.write(b"tampered")
    ImageMeasurement.objects.filter(pk=m.pk).update(status=ImageMeasurement.Status.QUEUED)
    measuring.run(m.pk)
    m.refresh_from_db()
    assert m.status == ImageMeasurement.Status.FAILED
    # named by the trial's code (the stored error is shown to blinded viewers), not by the uploaded name
    assert f"File '{attachment.trial.code}-file-{attachment.pk}.png' changed since it was stored" in m.error
    assert attachment.name not in m.error


def test_a_row_left_running_by_a_stopped_process_shows_interrupted_and_runs_again(
        client, researcher, trial, measured, django_capture_on_commit_callbacks):
    ImageMeasurement.objects.filter(pk=measured.pk).update(
        status=ImageMeasurement.Status.RUNNING, heartbeat_at=timezone.now() - timedelta(minutes=10))
    text = page(client.get(trial.get_absolute_url()))
    assert "Interrupted" in text and "Measure #%d again" % measured.pk in text
    with django_capture_on_commit_callbacks(execute=False) as callbacks:
        response = client.post(reverse("experiments:measurement-rerun", args=[measured.pk]))
    assert response.status_code == 302 and len(callbacks) == 1  # handed to the background worker on commit
    old, new = ImageMeasurement.objects.order_by("pk")
    assert old.status == ImageMeasurement.Status.INTERRUPTED
    assert (new.status, new.files, new.settings) == (ImageMeasurement.Status.QUEUED, old.files, old.settings)
    measuring.run(new.pk)  # what the worker does
    new.refresh_from_db()
    assert (new.status, new.dispersal_time_s) == (ImageMeasurement.Status.DONE, 180)


def test_a_finished_measurement_is_not_run_again(client, researcher, measured):
    response = client.post(reverse("experiments:measurement-rerun", args=[measured.pk]), follow=True)
    assert "only a failed or interrupted measurement is measured again" in page(response)
    assert ImageMeasurement.objects.count() == 1


def test_a_measurement_is_voided_with_a_reason_and_kept(client, researcher, trial, measured):
    url = reverse("experiments:measurement-void", args=[measured.pk])
    client.post(url, {"reason": ""})
    measured.refresh_from_db()
    assert not measured.is_voided
    client.post(url, {"reason": "Wrong dish filmed"})
    measured.refresh_from_db()
    assert measured.is_voided and measured.void_reason == "Wrong dish filmed"
    assert measuring.latest_done(trial) is None
    assert "Proposed from the images" not in page(client.get(reverse("experiments:trial-score", args=[trial.pk])))


# --- study agreement ---------------------------------------------------------------------------------
def _measure_directly(trial, user, dispersal, censored, decision=""):
    return ImageMeasurement.objects.create(
        trial=trial, source="photos", sha256="0" * 64, threshold=0.5, window_s=600, frames_total=10, frames_done=10,
        status="done", dispersal_time_s=dispersal, censored=censored, observed_until_s=600, requested_by=user,
        finished_at=timezone.now(), decision=decision)


def test_the_study_page_reports_agreement_checked_against_the_pure_module(client, researcher, protocol, bench):
    _cohort, study = bench
    human = [(120, False), (200, False), (600, True), (300, False), (600, True), (90, False)]
    image = [(110, False), (230, False), (None, True), (280, False), (540, False), (90, False)]
    for t, (i, ic) in zip(scored_trials(study, researcher, protocol, human), image):
        _measure_directly(t, researcher, i, ic)
    client.force_login(make_user("sam", role=RESEARCHER))  # blinded: pooled figures only
    response = client.get(study.get_absolute_url())
    result = response.context["image_agreement"]
    row = result.rows[0]
    both = [(i, h) for (h, hc), (i, ic) in zip(human, image) if not hc and not ic]
    expected = agreement.bland_altman([i for i, _h in both], [h for _i, h in both])
    assert (row.n_pairs, row.n_both_dispersed, row.n_censored_any) == (6, 4, 2)
    assert (row.bland_altman.bias, row.bland_altman.lower) == pytest.approx((expected.bias, expected.lower))
    # dispersed within the window: image yes,yes,no,yes,yes,yes; scorer yes,yes,no,yes,no,yes
    assert row.kappa.table == ((4, 1), (0, 1))
    text = page(response)
    assert "Image measurement vs. scorer" in text and f"{expected.bias:.1f}" in text
    assert all(c not in text for c in study.conditions)


def test_accepted_proposals_are_counted_and_left_out_of_the_second_row(client, researcher, protocol, bench):
    _cohort, study = bench
    rows = [(120, 120, "accepted"), (200, 230, "overridden"), (300, 280, ""), (100, 130, "")]
    for t, (_h, i, decision) in zip(scored_trials(study, researcher, protocol, [(h, False) for h, _i, _d in rows]), rows):
        _measure_directly(t, researcher, i, False, decision)
    client.force_login(researcher)
    result = client.get(study.get_absolute_url()).context["image_agreement"]
    assert result.n_accepted == 1
    assert [r.n_pairs for r in result.rows] == [4, 3]
    assert result.rows[1].bland_altman.bias == pytest.approx((30 - 20 + 30) / 3)


def test_a_study_without_measurements_has_no_agreement_section(client, researcher, trial):
    client.force_login(researcher)
    response = client.get(trial.study.get_absolute_url())
    assert response.context["image_agreement"] is None and "Image measurement vs. scorer" not in page(response)


# --- query counts stay constant ----------------------------------------------------------------------
@pytest.mark.parametrize("n", [1, 4])
def test_trial_and_study_pages_do_not_grow_with_measurements(client, content_types_cached, researcher, protocol, bench,
                                                            django_assert_max_num_queries, n):
    _cohort, study = bench
    trials = scored_trials(study, researcher, protocol, [(100 + 10 * k, False) for k in range(min(n, 3))])
    for k in range(n):
        _measure_directly(trials[k % len(trials)], researcher, 100 + 5 * k, False, "accepted" if k % 2 else "")
    client.force_login(researcher)
    # Counts include the session, the user and the role lookup.
    for url, limit in ((trials[0].get_absolute_url(), 6), (study.get_absolute_url(), 7),  # 7: with its signatures
                       (reverse("experiments:trial-score", args=[trials[0].pk]), 5)):
        with django_assert_max_num_queries(limit):
            assert client.get(url).status_code == 200


def test_the_back_office_lists_measurements_read_only(client, superuser, measured):
    client.force_login(superuser)
    assert client.get(reverse("admin:experiments_imagemeasurement_changelist")).status_code == 200
    change = client.get(reverse("admin:experiments_imagemeasurement_change", args=[measured.pk]))
    assert change.status_code == 200 and measured.trial.condition not in page(change)
