"""CACHES from the environment: one cache that every worker process (and every app server) shares.

VERMILOG_CACHE picks the backend and VERMILOG_CACHE_LOCATION says where it keeps its entries:

  file    (default) a folder on this machine's disk; every worker process on the machine shares it
          (default folder: cache/ in the project; give each deployment its own folder)
  db      a table in the application database (default name vermilog_cache), shared by every app
          server on that database; `migrate` creates it (colonies/apps.py), or `manage.py createcachetable`
  redis   a Redis server, e.g. redis://cache.internal:6379/0 (required); needs the `redis` package
          (pip install redis), which is not a requirement of Vermilog
  locmem  memory of each process: development and tests only, never shared between worker processes

Entries are rendered figures whose keys carry the records' versions (colonies/health_plots.py), so a
shared cache never serves a figure older than the records; the backend only decides who can reuse it.
Those versions are row ids, which mean something only in one database: make_key() puts the database's
identity in every key, so a test database, a benchmark's scratch database or a second facility on the
same cache can never answer for each other (and `restore` clears the cache, since a restored database
reuses ids).
"""
import hashlib
import importlib.util
from collections.abc import Mapping
from pathlib import Path

from django.core.exceptions import ImproperlyConfigured

BACKENDS = {
    "file": "django.core.cache.backends.filebased.FileBasedCache",
    "db": "django.core.cache.backends.db.DatabaseCache",
    "redis": "django.core.cache.backends.redis.RedisCache",
    "locmem": "django.core.cache.backends.locmem.LocMemCache",
}
DEFAULT_BACKEND = "file"
DEFAULT_TABLE = "vermilog_cache"
DEFAULT_ENTRIES = 500


def _location(kind: str, raw: str, base_dir: Path) -> str:
    if kind == "file":
        path = Path(raw or base_dir / "cache")
        if not path.is_absolute():
            raise ImproperlyConfigured(f"VERMILOG_CACHE_LOCATION={raw!r} must be an absolute folder path for the "
                                       "file cache (every worker process must resolve it to the same folder).")
        return str(path)
    if kind == "db":
        table = raw or DEFAULT_TABLE
        if not table.replace("_", "").isalnum():
            raise ImproperlyConfigured(f"VERMILOG_CACHE_LOCATION={raw!r} is not a table name; use letters, digits "
                                       f"and underscores (default {DEFAULT_TABLE}).")
        return table
    if kind == "redis":
        if not raw.startswith(("redis://", "rediss://", "unix://")):
            raise ImproperlyConfigured(f"VERMILOG_CACHE=redis needs VERMILOG_CACHE_LOCATION=redis://host:port/db "
                                       f"(or rediss://, unix://); got {raw!r}.")
        if importlib.util.find_spec("redis") is None:
            raise ImproperlyConfigured("VERMILOG_CACHE=redis needs the redis package: pip install redis.")
        return raw
    return raw or "vermilog"


def cache_settings(env: Mapping[str, str], base_dir: Path) -> dict:
    """The CACHES setting for this environment; nonsense fails at start-up, naming the variable."""
    kind = env.get("VERMILOG_CACHE", "").strip().lower() or DEFAULT_BACKEND
    if kind not in BACKENDS:
        raise ImproperlyConfigured(f"VERMILOG_CACHE={env['VERMILOG_CACHE']!r} is not a cache backend; "
                                   f"use one of {', '.join(BACKENDS)} (default {DEFAULT_BACKEND}).")
    raw_entries = env.get("PLOT_CACHE_ENTRIES", str(DEFAULT_ENTRIES))
    try:
        entries = int(raw_entries)
    except ValueError:
        raise ImproperlyConfigured(f"PLOT_CACHE_ENTRIES={raw_entries!r} is not an integer.") from None
    if not 10 <= entries <= 1_000_000:
        raise ImproperlyConfigured(f"PLOT_CACHE_ENTRIES={entries} is out of range; use 10 to 1,000,000.")
    config = {"BACKEND": BACKENDS[kind],
              "LOCATION": _location(kind, env.get("VERMILOG_CACHE_LOCATION", "").strip(), base_dir)}
    config["KEY_FUNCTION"] = "vermilog.caches.make_key"
    if kind != "redis":  # Redis evicts by its own maxmemory policy
        config["OPTIONS"] = {"MAX_ENTRIES": entries}
    return {"default": config}


def database_cache_tables(caches: Mapping[str, dict]) -> list[str]:
    """Tables the configured database caches need (created after every migrate)."""
    return [c["LOCATION"] for c in caches.values() if c["BACKEND"] == BACKENDS["db"]]


def database_identity(conf: Mapping | None = None) -> str:
    """A short digest of a database's engine, host, port and name (default: the default database now)."""
    if conf is None:
        from django.db import connections

        conf = connections["default"].settings_dict
    ident = "|".join(str(conf.get(k) or "") for k in ("ENGINE", "HOST", "PORT", "NAME"))
    return hashlib.sha256(ident.encode()).hexdigest()[:12]


def make_key(key: str, key_prefix: str, version: int) -> str:
    """Django's key layout (prefix:version:key) with the database's identity in front of the key."""
    return f"{key_prefix}:{version}:{database_identity()}:{key}"
