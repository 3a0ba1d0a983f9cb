"""The background path of image measurements, with real database connections: the worker thread writes, the
page and the progress view read, each on its own connection.

A gate (threading.Event) holds the worker before its third frame, so the test sees it mid-way whatever the
machine's speed; nothing of the database or the measurement is replaced.
"""
import threading
import time

import pytest
from django.core.files.uploadedfile import SimpleUploadedFile
from django.urls import reverse

from experiments import imaging, measuring
from experiments.models import ImageMeasurement
from tests.experiments.builders import days_ago, make_cohort, make_protocol, make_study, record
from tests.experiments.dish_pictures import png, ring
from tests.factories import make_user
from colonies.roles import RESEARCHER

WAIT_S = 60  # far longer than the work; the loop ends as soon as the worker is done


def _wait_until(check, what: str):
    deadline = time.monotonic() + WAIT_S
    while time.monotonic() < deadline:
        if check():
            return
        time.sleep(0.05)
    raise AssertionError(f"Timed out waiting for {what}.")


@pytest.mark.django_db(transaction=True)
def test_a_large_upload_is_measured_in_the_background_with_a_progress_bar(client, settings, tmp_path, monkeypatch):
    settings.MEDIA_ROOT = tmp_path
    settings.IMAGING_SYNC_MAX_PIXELS = 0  # every measurement counts as large
    owner = make_user("rhea", role=RESEARCHER)
    protocol = make_protocol()
    cohort = make_cohort(user=owner, protocol=protocol, at=days_ago(10))
    trial = record(make_study(user=owner, protocol=protocol), cohort, owner, at=days_ago(8), disperse_s=None).trial

    gate, reached = threading.Event(), threading.Event()
    calls = []
    measure = imaging.measure_frame

    def held(image, **kwargs):
        calls.append(threading.current_thread().name)
        if len(calls) == 3:
            reached.set()
            gate.wait(WAIT_S)
        return measure(image, **kwargs)

    monkeypatch.setattr(imaging, "measure_frame", held)
    client.force_login(owner)
    spreads = [1, 1, 1, 2.2, 2.6, 3]
    files = [SimpleUploadedFile(f"dish-{i}.png", png(ring(s))) for i, s in enumerate(spreads)]
    response = client.post(reverse("experiments:measurement-new", args=[trial.pk]),
                           {"files": files, "interval_s": 60, "threshold": 0.5, "polarity": "dark", "min_area_px": 12})
    assert response.status_code == 302
    m = ImageMeasurement.objects.get()
    assert reached.wait(WAIT_S), "the worker never reached the third frame"

    progress_url = reverse("experiments:measurement-progress", args=[m.pk])
    _wait_until(lambda: client.get(progress_url).json()["done"] == 2, "the progress of two frames")
    mid = client.get(progress_url).json()
    assert (mid["status"], mid["total"], mid["in_progress"]) == ("running", 6, True)
    page = client.get(trial.get_absolute_url()).content.decode()
    assert f'<progress max="6" value="2">' in page and "measurement_progress.js" in page

    gate.set()
    _wait_until(lambda: not client.get(progress_url).json()["in_progress"], "the end of the measurement")
    m.refresh_from_db()
    assert (m.status, m.frames_done, m.dispersal_time_s) == (ImageMeasurement.Status.DONE, 6, 180)
    assert m.worker == measuring.WORKER and m.heartbeat_at is not None
    assert all(name.startswith("vermilog-measure") for name in calls)  # never the request's thread
    assert "measurement_progress.js" not in client.get(trial.get_absolute_url()).content.decode()
