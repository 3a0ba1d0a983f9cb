"""CACHES from the environment (vermilog/caches.py): each backend, loud failures on nonsense, keys per
database, the database cache's table after migrate, and one cache shared by separate processes."""
import importlib.util
import os
import subprocess
import sys
import uuid
from pathlib import Path

import pytest
from django.core.cache import cache
from django.core.exceptions import ImproperlyConfigured
from django.core.management.sql import emit_post_migrate_signal
from django.db import connection

from vermilog import caches
from vermilog.caches import BACKENDS, cache_settings, make_key

BASE_DIR = Path(__file__).resolve().parent.parent
BASE = Path("/srv/vermilog")


def test_default_is_a_file_cache_in_the_project_folder():
    config = cache_settings({}, BASE)["default"]

    assert config["BACKEND"] == "django.core.cache.backends.filebased.FileBasedCache"
    assert config["LOCATION"] == "/srv/vermilog/cache"
    assert config["OPTIONS"] == {"MAX_ENTRIES": 500}
    assert config["KEY_FUNCTION"] == "vermilog.caches.make_key"


@pytest.mark.parametrize("kind,location,expected", [
    ("file", "/var/cache/vermilog", "/var/cache/vermilog"),
    (" DB ", "", "vermilog_cache"),
    ("db", "plot_cache_2", "plot_cache_2"),
    ("locmem", "", "vermilog"),
])
def test_each_backend_and_its_location(kind, location, expected):
    config = cache_settings({"VERMILOG_CACHE": kind, "VERMILOG_CACHE_LOCATION": location,
                             "PLOT_CACHE_ENTRIES": "2000"}, BASE)["default"]

    assert config["BACKEND"] == BACKENDS[kind.strip().lower()]
    assert config["LOCATION"] == expected and config["OPTIONS"] == {"MAX_ENTRIES": 2000}


def test_redis_uses_django_s_backend_when_the_package_is_there():
    env = {"VERMILOG_CACHE": "redis", "VERMILOG_CACHE_LOCATION": "redis://cache.internal:6379/1"}
    if importlib.util.find_spec("redis") is None:
        with pytest.raises(ImproperlyConfigured, match="needs the redis package: pip install redis"):
            cache_settings(env, BASE)
    else:
        config = cache_settings(env, BASE)["default"]
        assert config["BACKEND"] == "django.core.cache.backends.redis.RedisCache" and "OPTIONS" not in config


@pytest.mark.parametrize("env,message", [
    ({"VERMILOG_CACHE": "memcache"}, r"VERMILOG_CACHE='memcache' is not a cache backend; use one of file, db, redis, "
                                     r"locmem \(default file\)"),
    ({"VERMILOG_CACHE": "redis"}, r"VERMILOG_CACHE=redis needs VERMILOG_CACHE_LOCATION=redis://host:port/db"),
    ({"VERMILOG_CACHE": "redis", "VERMILOG_CACHE_LOCATION": "cache.internal:6379"}, r"got 'cache.internal:6379'"),
    ({"VERMILOG_CACHE_LOCATION": "cache"}, r"VERMILOG_CACHE_LOCATION='cache' must be an absolute folder path"),
    ({"VERMILOG_CACHE": "db", "VERMILOG_CACHE_LOCATION": "cache; drop"}, r"is not a table name"),
    ({"PLOT_CACHE_ENTRIES": "many"}, r"PLOT_CACHE_ENTRIES='many' is not an integer"),
    ({"PLOT_CACHE_ENTRIES": "5"}, r"PLOT_CACHE_ENTRIES=5 is out of range; use 10 to 1,000,000"),
])
def test_nonsense_fails_at_start_up_naming_the_variable(env, message):
    with pytest.raises(ImproperlyConfigured, match=message):
        cache_settings(env, BASE)


def test_keys_carry_the_database_so_two_databases_never_share_an_entry():
    here = caches.database_identity()
    other = caches.database_identity({**connection.settings_dict, "NAME": "another_facility"})

    assert here != other and len(here) == 12
    assert make_key("vermilog:abc", "", 1) == f":1:{here}:vermilog:abc"


@pytest.mark.django_db
def test_migrate_creates_the_database_cache_table(settings):
    table = f"vermilog_cache_test_{uuid.uuid4().hex[:8]}"
    settings.CACHES = {"default": {"BACKEND": BACKENDS["db"], "LOCATION": table,
                                   "KEY_FUNCTION": "vermilog.caches.make_key"}}
    assert table not in connection.introspection.table_names()

    emit_post_migrate_signal(verbosity=0, interactive=False, db="default")  # what every migrate ends with

    assert table in connection.introspection.table_names()
    cache.set("probe", "worm", 30)
    assert cache.get("probe") == "worm"


WRITE = "import django, sys; django.setup(); from django.core.cache import cache; cache.set('shared', sys.argv[1], 60)"
READ = "import django; django.setup(); from django.core.cache import cache; print(cache.get('shared'))"


def _python(code: str, *args: str, **env: str) -> str:
    environ = {k: v for k, v in os.environ.items() if not k.startswith("VERMILOG_CACHE")}
    environ.update(DJANGO_SETTINGS_MODULE="vermilog.settings", DEBUG="1", **env)
    done = subprocess.run([sys.executable, "-c", code, *args], cwd=BASE_DIR, env=environ, capture_output=True,
                          text=True, timeout=120)
    assert done.returncode == 0, done.stderr
    return done.stdout.strip()


@pytest.mark.parametrize("backend,shared", [("", True), ("locmem", False)])
def test_a_value_set_by_one_process_is_read_by_another_with_the_default_backend(tmp_path, backend, shared):
    # Two separate interpreters, as two gunicorn workers are; locmem is the counter-example.
    env = {"DATABASE_URL": f"sqlite:///{tmp_path}/db.sqlite3"}
    if backend:
        env["VERMILOG_CACHE"] = backend
    else:
        env["VERMILOG_CACHE_LOCATION"] = str(tmp_path / "cache")  # otherwise the default: nothing else set
    token = uuid.uuid4().hex

    _python(WRITE, token, **env)
    seen = _python(READ, **env)

    assert (seen == token) is shared
