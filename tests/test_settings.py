"""Settings from the environment: a clean deploy check, and loud failures on nonsense."""
import os
import secrets
import subprocess
import sys
from pathlib import Path

import pytest
from django.core.exceptions import ImproperlyConfigured

from vermilog.settings import env_bool, env_int, env_list

BASE_DIR = Path(__file__).resolve().parent.parent


def _manage(*args: str, **env: str) -> subprocess.CompletedProcess:
    environ = {k: v for k, v in os.environ.items() if k not in {"DEBUG", "SECRET_KEY", "ALLOWED_HOSTS"}}
    environ.pop("DJANGO_SETTINGS_MODULE", None)  # manage.py sets vermilog.settings itself
    environ.update(env)
    return subprocess.run([sys.executable, "manage.py", *args], cwd=BASE_DIR, env=environ,
                          capture_output=True, text=True, timeout=60)


def test_deploy_check_is_clean_in_production_configuration():
    key = secrets.token_urlsafe(45)  # 60 random characters
    assert len(key) == 60

    result = _manage("check", "--deploy", DEBUG="0", SECRET_KEY=key, ALLOWED_HOSTS="example.org")

    output = result.stdout + result.stderr
    assert result.returncode == 0, output
    assert "WARNINGS" not in output
    assert "security.W" not in output
    assert "System check identified no issues" in output


def test_production_without_secret_key_fails_loudly():
    result = _manage("check", DEBUG="0", ALLOWED_HOSTS="example.org")

    assert result.returncode != 0
    assert "SECRET_KEY must be set when DEBUG is off." in result.stderr


@pytest.mark.parametrize("raw,expected", [("1", True), ("true", True), (" Yes ", True), ("on", True),
                                          ("0", False), ("false", False), ("NO", False), ("off", False), ("", False)])
def test_env_bool_reads_the_usual_spellings(monkeypatch, raw, expected):
    monkeypatch.setenv("VERMILOG_TEST_FLAG", raw)
    assert env_bool("VERMILOG_TEST_FLAG", not expected) is expected


def test_env_bool_uses_the_default_when_unset(monkeypatch):
    monkeypatch.delenv("VERMILOG_TEST_FLAG", raising=False)
    assert env_bool("VERMILOG_TEST_FLAG", True) is True
    assert env_bool("VERMILOG_TEST_FLAG", False) is False


@pytest.mark.parametrize("raw", ["maybe", "2", "tru", "y e s"])
def test_env_bool_rejects_nonsense(monkeypatch, raw):
    monkeypatch.setenv("VERMILOG_TEST_FLAG", raw)
    with pytest.raises(ImproperlyConfigured, match="VERMILOG_TEST_FLAG=.* is not a boolean"):
        env_bool("VERMILOG_TEST_FLAG", False)


def test_env_int_rejects_nonsense(monkeypatch):
    monkeypatch.setenv("VERMILOG_TEST_INT", "12s")
    with pytest.raises(ImproperlyConfigured, match="VERMILOG_TEST_INT='12s' is not an integer"):
        env_int("VERMILOG_TEST_INT", 0)
    monkeypatch.setenv("VERMILOG_TEST_INT", "600")
    assert env_int("VERMILOG_TEST_INT", 0) == 600


def test_env_list_splits_on_commas_and_drops_blanks(monkeypatch):
    monkeypatch.setenv("VERMILOG_TEST_LIST", " example.org, ,www.example.org ")
    assert env_list("VERMILOG_TEST_LIST", []) == ["example.org", "www.example.org"]
