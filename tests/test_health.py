"""GET /healthz/: no login, one cheap query, a cache round trip; 503 naming the part that failed,
with no error text in the body."""
import json
import os
import subprocess
import sys
from pathlib import Path

from django.contrib.sessions.models import Session
from django.urls import reverse

BASE_DIR = Path(__file__).resolve().parent.parent


def test_healthz_answers_anonymous_with_one_query_and_writes_no_session(client, db, django_assert_num_queries):
    with django_assert_num_queries(1):  # SELECT 1; the default file cache is no query
        response = client.get(reverse("healthz"))

    assert response.status_code == 200
    assert response.json() == {"status": "ok", "database": "ok", "cache": "ok"}
    assert "no-cache" in response["Cache-Control"] and "no-store" in response["Cache-Control"]
    assert not response.cookies and Session.objects.count() == 0


def test_healthz_answers_head_and_refuses_post(client, db):
    assert client.head(reverse("healthz")).status_code == 200
    assert client.post(reverse("healthz")).status_code == 405


def test_healthz_names_a_broken_cache_and_leaks_no_path(client, db, settings, tmp_path):
    not_a_folder = tmp_path / "secret-cache-place"
    not_a_folder.write_text("a file where the cache folder should be")
    settings.CACHES = {"default": {"BACKEND": "django.core.cache.backends.filebased.FileBasedCache",
                                   "LOCATION": str(not_a_folder)}}

    response = client.get(reverse("healthz"))

    assert response.status_code == 503
    assert response.json() == {"status": "fail", "database": "ok", "cache": "fail"}
    assert b"secret-cache-place" not in response.content


PROBE = """
import django, json
django.setup()
from django.test import Client
c = Client()
health, login = c.get("/healthz/"), c.get("/accounts/login/")
print(json.dumps({"status": health.status_code, "body": health.content.decode(),
                  "login": login.status_code, "login_to": login.get("Location", "")}))
"""


def _probe(**env) -> dict:
    environ = {k: v for k, v in os.environ.items() if k not in {"DEBUG", "SECRET_KEY", "ALLOWED_HOSTS"}}
    environ.update(DJANGO_SETTINGS_MODULE="vermilog.settings", ALLOWED_HOSTS="testserver", **env)
    done = subprocess.run([sys.executable, "-c", PROBE], cwd=BASE_DIR, env=environ, capture_output=True, text=True,
                          timeout=120)
    assert done.returncode == 0, done.stderr
    return json.loads(done.stdout.strip().splitlines()[-1])


def test_healthz_names_an_unreachable_database_and_leaks_nothing(tmp_path):
    # A real server process whose database file cannot be opened (its folder does not exist).
    out = _probe(DEBUG="1", DATABASE_URL=f"sqlite:///{tmp_path}/no-such-folder/private-name.sqlite3",
                 VERMILOG_CACHE_LOCATION=str(tmp_path / "cache"))

    assert out["status"] == 503
    assert json.loads(out["body"]) == {"status": "fail", "database": "fail", "cache": "ok"}
    assert "private-name" not in out["body"] and "no-such-folder" not in out["body"]


def test_healthz_is_not_redirected_to_https_in_production(tmp_path):
    # Production hardening redirects every page to HTTPS; a load balancer probes over plain HTTP.
    # (SELECT 1 needs no tables: a new, empty SQLite file is a working database.)
    out = _probe(DEBUG="0", SECRET_KEY="x" * 60, DATABASE_URL=f"sqlite:///{tmp_path}/empty.sqlite3",
                 VERMILOG_CACHE_LOCATION=str(tmp_path / "c"))

    assert out["status"] == 200, out
    assert out["login"] == 301 and out["login_to"].startswith("https://")
