"""A scratch database for the benchmark, never the one in settings.

The command swaps the `default` connection for a new one on a new database (a temporary SQLite file,
or `<name>_bench` on PostgreSQL), migrates it, and puts the original connection back afterwards. The
original connection is never closed, so an in-memory test database survives untouched.
"""
import hashlib
import os
import shutil
import tempfile
from contextlib import contextmanager

import django
from django.core.management import call_command
from django.db import DEFAULT_DB_ALIAS, connections
from django.db.utils import load_backend


def engine_name(settings_dict: dict) -> str:
    return "postgresql" if "postgresql" in settings_dict["ENGINE"] else "sqlite"


def scratch_name(settings_dict: dict, db_path: str | None) -> str:
    if engine_name(settings_dict) == "postgresql":
        return f"{settings_dict['NAME']}_bench"
    if db_path:
        if os.path.exists(db_path):
            raise ValueError(f"--db: {db_path} already exists; give the path of a new file.")
        return db_path
    handle, path = tempfile.mkstemp(prefix="vermilog-bench-", suffix=".sqlite3")
    os.close(handle)
    os.unlink(path)  # SQLite creates it on first connection
    return path


# A freshly migrated SQLite file is kept in /tmp under a digest of every migration file (and the
# Django version): a later scratch database made by the same migrations is a copy of it. Migrating
# costs ~15 s of CPU, which would dominate a small run and the test.
def _migrations_digest() -> str:
    import sys
    from django.db.migrations.loader import MigrationLoader
    digest = hashlib.sha256(django.get_version().encode())
    loader = MigrationLoader(None, ignore_no_migrations=True)
    for key in sorted(loader.disk_migrations):
        module = sys.modules[type(loader.disk_migrations[key]).__module__]
        digest.update(repr(key).encode())
        with open(module.__file__, "rb") as handle:
            digest.update(handle.read())
    return digest.hexdigest()[:16]


def _migrate_sqlite(scratch, name: str, verbosity: int) -> None:
    template = os.path.join(tempfile.gettempdir(), f"vermilog-bench-template-{_migrations_digest()}.sqlite3")
    if os.path.exists(template):
        shutil.copyfile(template, name)
        return
    call_command("migrate", database=DEFAULT_DB_ALIAS, verbosity=verbosity, interactive=False)
    scratch.close()
    partial = f"{template}.{os.getpid()}"
    shutil.copyfile(name, partial)
    os.replace(partial, template)  # atomic: a concurrent run sees the whole file or none


def _exists(original, name: str) -> bool:
    if engine_name(original.settings_dict) == "sqlite":
        return os.path.exists(name)
    with original._nodb_cursor() as cursor:
        cursor.execute("SELECT 1 FROM pg_database WHERE datname = %s", [name])
        return cursor.fetchone() is not None


def drop(name: str) -> None:
    """Remove a kept scratch database (a SQLite file and its journals, or a PostgreSQL database)."""
    original = connections[DEFAULT_DB_ALIAS]
    if engine_name(original.settings_dict) == "postgresql":
        _pg_execute(original, f"DROP DATABASE IF EXISTS {original.ops.quote_name(name)}")
        return
    for suffix in ("", "-wal", "-shm", "-journal"):
        if os.path.exists(name + suffix):
            os.unlink(name + suffix)


def _pg_execute(original, sql: str) -> None:
    with original._nodb_cursor() as cursor:
        cursor.execute(sql)


@contextmanager
def existing_database(name: str, verbosity: int = 0):
    """Yield `name` with `default` pointing at an earlier kept benchmark database, migrated forward.

    A full-size facility takes many minutes to build; `--reuse` times it again after a code change
    (new migrations, such as indexes, are applied first). The database is changed only by them: the
    timed writes are rolled back.
    """
    original = connections[DEFAULT_DB_ALIAS]
    settings_dict = dict(original.settings_dict)
    if not _exists(original, name):
        raise ValueError(f"--reuse: {name} does not exist; build one first with --keep.")
    settings_dict["NAME"] = name
    settings_dict.setdefault("TEST", {})
    scratch = load_backend(settings_dict["ENGINE"]).DatabaseWrapper(settings_dict, DEFAULT_DB_ALIAS)
    connections[DEFAULT_DB_ALIAS] = scratch
    try:
        call_command("migrate", database=DEFAULT_DB_ALIAS, verbosity=verbosity, interactive=False)
        yield name
    finally:
        scratch.close()
        connections[DEFAULT_DB_ALIAS] = original


@contextmanager
def scratch_database(*, db_path: str | None = None, keep: bool = False, verbosity: int = 0):
    """Yield the scratch database's name with `default` pointing at it (migrated)."""
    original = connections[DEFAULT_DB_ALIAS]
    settings_dict = dict(original.settings_dict)
    engine = engine_name(settings_dict)
    name = scratch_name(settings_dict, db_path)
    settings_dict["NAME"] = name
    settings_dict.setdefault("TEST", {})
    if engine == "postgresql":
        quoted = original.ops.quote_name(name)
        _pg_execute(original, f"DROP DATABASE IF EXISTS {quoted}")
        _pg_execute(original, f"CREATE DATABASE {quoted}")
    backend = load_backend(settings_dict["ENGINE"])
    scratch = backend.DatabaseWrapper(settings_dict, DEFAULT_DB_ALIAS)
    connections[DEFAULT_DB_ALIAS] = scratch
    try:
        if engine == "postgresql":
            call_command("migrate", database=DEFAULT_DB_ALIAS, verbosity=verbosity, interactive=False)
        else:
            _migrate_sqlite(scratch, name, verbosity)
        yield name
    finally:
        scratch.close()
        connections[DEFAULT_DB_ALIAS] = original
        if not keep:
            drop(name)
