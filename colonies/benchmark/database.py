"""A scratch database for the benchmark, never the one in settings.

The command swaps the `default` connection for a new one on a new database (a temporary SQLite file,
or `<name>_bench` on PostgreSQL), migrates it, and puts the original connection back afterwards. The
original connection is never closed, so an in-memory test database survives untouched.
"""
import os
import shutil
import tempfile
from contextlib import contextmanager

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
    handle, path = tempfile.mkstemp(prefix="vermilog-bench-", suffix=".sqlite3", dir="/tmp")
    os.close(handle)
    os.unlink(path)  # SQLite creates it on first connection
    return path


# A freshly migrated SQLite file, kept for this process: later scratch databases are copies of it, so
# a test that builds twice migrates once (migrating costs ~15 s of CPU).
_SQLITE_TEMPLATE: dict[str, str] = {}


def _migrate_sqlite(scratch, name: str, verbosity: int) -> None:
    template = _SQLITE_TEMPLATE.get("path")
    if template and os.path.exists(template):
        shutil.copyfile(template, name)
        return
    call_command("migrate", database=DEFAULT_DB_ALIAS, verbosity=verbosity, interactive=False)
    scratch.close()
    handle, template = tempfile.mkstemp(prefix="vermilog-bench-template-", suffix=".sqlite3", dir="/tmp")
    os.close(handle)
    shutil.copyfile(name, template)
    _SQLITE_TEMPLATE["path"] = template


def _pg_execute(original, sql: str) -> None:
    with original._nodb_cursor() as cursor:
        cursor.execute(sql)


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
            if engine == "postgresql":
                _pg_execute(original, f"DROP DATABASE IF EXISTS {original.ops.quote_name(name)}")
            else:
                for suffix in ("", "-wal", "-shm", "-journal"):
                    if os.path.exists(name + suffix):
                        os.unlink(name + suffix)
