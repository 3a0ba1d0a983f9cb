"""Attachments: allowed types told by content, the size limit while the upload streams, and when files are refused."""
import io

import pytest
from django.core.files.uploadedfile import SimpleUploadedFile
from django.core.files.uploadhandler import SkipFile
from django.test import RequestFactory
from django.urls import reverse

from experiments import filetypes, services
from experiments.models import Attachment
from experiments.uploads import SizeLimitUploadHandler
from tests.experiments.builders import days_ago, make_cohort, make_study, record

# Signatures from each format's specification (see experiments/filetypes.py for the documents).
SAMPLES = {
    "png": b"\x89PNG\r\n\x1a\n\x00\x00\x00\rIHDR",
    "jpeg": b"\xff\xd8\xff\xe0\x00\x10JFIF\x00",
    "tiff": b"II*\x00\x08\x00\x00\x00",
    "pdf": b"%PDF-1.7\n%\xe2\xe3\xcf\xd3\n",
    "mp4": b"\x00\x00\x00\x18ftypmp42\x00\x00\x00\x00",
    "avi": b"RIFF\x24\x00\x00\x00AVI LIST",
    "text": "time_s,clusters\n0,1\n30,4\n".encode(),
}


@pytest.mark.parametrize("key,head", SAMPLES.items())
def test_sniff_tells_each_allowed_type_by_its_first_bytes(key, head):
    assert filetypes.sniff(head) == key


@pytest.mark.parametrize("head", [b"MZ\x90\x00\x03\x00", b"\x7fELF\x02\x01", b"<html><script>x</script>",
                                  b"  <svg xmlns='http://www.w3.org/2000/svg'/>", b"PK\x03\x04zip", b"",
                                  b"text with a \x00 NUL", b"\x1b[31mescape"])
def test_sniff_refuses_other_content(head):
    assert filetypes.sniff(head) is None


def test_sniff_forgives_a_utf8_character_cut_at_the_end_of_the_sample():
    head = ("Trübung " * 10).encode()
    assert filetypes.sniff(head[:-1]) == "text"  # 'ü' is two bytes; the sample may end inside one


@pytest.fixture
def trial(researcher, protocol, settings, tmp_path):
    settings.MEDIA_ROOT = tmp_path
    cohort = make_cohort(user=researcher, protocol=protocol, at=days_ago(10))
    study = make_study(user=researcher, protocol=protocol, replicates=3)
    return record(study, cohort, researcher, at=days_ago(8)).trial


def _post(client, trial, name, body, kind):
    return client.post(reverse("experiments:attachment-add", args=[trial.pk]),
                       {"file": SimpleUploadedFile(name, body), "kind": kind}, follow=True)


@pytest.mark.parametrize("key,kind", [("png", "photo"), ("jpeg", "photo"), ("tiff", "photo"), ("mp4", "video"),
                                      ("avi", "video"), ("pdf", "other"), ("text", "other")])
def test_each_allowed_type_is_stored(client, researcher, trial, key, kind):
    client.force_login(researcher)
    response = _post(client, trial, f"file.{key}", SAMPLES[key] + b"\x00" * 32 if key != "text" else SAMPLES[key], kind)
    assert "stored (SHA-256" in response.content.decode()
    assert Attachment.objects.get().kind == kind


def test_a_program_renamed_to_png_is_refused_naming_the_file(client, researcher, trial):
    client.force_login(researcher)
    response = _post(client, trial, "dish.png", b"MZ\x90\x00" + b"\x00" * 64, "photo")
    page = response.content.decode()
    assert "Nothing was stored: File &#x27;dish.png&#x27; is not an allowed type" in page
    assert not Attachment.objects.exists()


def test_a_pdf_is_not_a_photo(client, researcher, trial):
    client.force_login(researcher)
    page = _post(client, trial, "report.pdf", SAMPLES["pdf"], "photo").content.decode()
    assert "Kind &#x27;Photo&#x27; does not fit a PDF document" in page
    assert not Attachment.objects.exists()


def test_an_oversized_upload_is_refused_while_streaming(client, researcher, trial, settings):
    settings.ATTACHMENT_MAX_BYTES = 1000
    client.force_login(researcher)
    page = _post(client, trial, "big.png", SAMPLES["png"] + b"\x00" * 5000, "photo").content.decode()
    assert "File &#x27;big.png&#x27; is larger than the limit of 0.001 MB; nothing was stored." in page
    assert not Attachment.objects.exists()


def test_the_upload_handler_stops_at_the_chunk_that_passes_the_limit(settings):
    settings.ATTACHMENT_MAX_BYTES = 2500
    request = RequestFactory().post("/")
    handler = SizeLimitUploadHandler(request)
    handler.new_file("file", "big.avi", "video/x-msvideo", None)
    chunks = iter([b"x" * 1000] * 10)
    passed = 0
    with pytest.raises(SkipFile):
        for chunk in chunks:
            assert handler.receive_data_chunk(chunk, passed) == chunk
            passed += len(chunk)
    assert passed == 2000  # the third chunk passed the limit; the other seven were never read
    assert len(list(chunks)) == 7
    assert request.upload_refusals["file"].startswith("File 'big.avi' is larger than the limit of 0.0025 MB")


def test_files_are_refused_on_a_voided_trial(client, researcher, trial):
    services.void_trial(user=researcher, trial=trial, reason="Entered under the wrong study")
    client.force_login(researcher)
    page = _post(client, trial, "a.png", SAMPLES["png"], "photo").content.decode()
    assert f"Nothing was stored. File: {trial} is voided" in page
    assert not Attachment.objects.exists()


def test_files_are_refused_on_a_study_with_locked_outcomes(client, researcher, trial):
    study = trial.study
    study.blinded = True
    study.save()
    services.unblind(user=researcher, study=study, reason="All scored", password="pw")
    client.force_login(researcher)
    page = _post(client, trial, "a.png", SAMPLES["png"], "photo").content.decode()
    assert f"Nothing was stored. File: study {study.code} has locked outcomes" in page
    assert not Attachment.objects.exists()


def test_a_download_carries_the_type_its_content_shows(client, researcher, trial):
    a = services.add_attachment(user=researcher, trial=trial, kind="other",
                                upload=SimpleUploadedFile("notes.html", b"dispersal looked slow\n"))
    client.force_login(researcher)
    response = client.get(reverse("experiments:attachment", args=[a.pk]))
    assert response["Content-Type"] == "text/plain; charset=utf-8"
    assert response["Content-Disposition"].startswith("attachment;")
    body = io.BytesIO(b"".join(response.streaming_content)).getvalue()
    assert body == b"dispersal looked slow\n"
