"""Backups: a consistent snapshot of the database and the uploaded files, with a manifest of checksums.

A backup is a folder `vermilog-backup-<UTC time>[-portable]/` holding

- the database: `database.sqlite3` (SQLite's online backup API, consistent while others write),
  `database.pgdump` (`pg_dump -Fc`, one snapshot by design) or, for a portable backup,
  `tables/<table>.jsonl` (one file per table, every column of every row, history tables included);
- `media/…`: every file under MEDIA_ROOT (trial attachments);
- `manifest.json`: SHA-256 and size of every part, the engine, the latest applied migration per app,
  the code revision and the time.

The folder is written as `<name>.partial` and renamed when complete, so a half-written backup never
looks finished. `restore` checks every part against the manifest before it touches anything, and only
restores into an empty database (see `database_records`).

Why not `dumpdata`/`loaddata`: loading through model saves fires django-simple-history's signals
(false "created" history rows), DjangoJSONEncoder cuts timestamps to milliseconds and `auto_now_add`
fields are overwritten. Portable backups read and write columns directly: no signals, no pre_save.
"""
import base64
import hashlib
import json
import os
import re
import shutil
import sqlite3
import subprocess
from dataclasses import dataclass
from datetime import date, datetime, time, timedelta
from datetime import timezone as dt_timezone
from decimal import Decimal
from pathlib import Path
from uuid import UUID

from django.apps import apps
from django.conf import settings
from django.core.cache import cache
from django.core.management.color import no_style
from django.db import connections, models, transaction
from django.db.migrations.loader import MigrationLoader
from django.db.migrations.recorder import MigrationRecorder
from django.utils.duration import duration_iso_string

FORMAT = "vermilog-backup"
FORMAT_VERSION = 1
MANIFEST = "manifest.json"
SQLITE_PART = "database.sqlite3"
PG_PART = "database.pgdump"
TABLES_DIR = "tables"
MEDIA_DIR = "media"
CHUNK = 1 << 20

# Rows that `migrate` itself writes into a new database (content types, permissions, the role groups
# and the default species profiles of colonies/0002). A database holding only these is "empty"; a
# restore replaces them with the backup's. Every other table must have no rows.
MIGRATE_SEEDED = {
    "contenttypes.contenttype", "auth.permission", "auth.group", "auth.group_permissions",
    "colonies.species", "colonies.caretarget", "colonies.historicalspecies", "colonies.historicalcaretarget",
    "sessions.session",  # sessions are transient: a login page visit, not a record
}


class BackupError(Exception):
    """A backup or restore that cannot go ahead; the message says why and what to do."""


@dataclass
class Result:
    path: Path
    summary: str


# --- helpers ------------------------------------------------------------------------------------------

def sha256_of(path: Path) -> str:
    digest = hashlib.sha256()
    with open(path, "rb") as fh:
        for chunk in iter(lambda: fh.read(CHUNK), b""):
            digest.update(chunk)
    return digest.hexdigest()


def engine_of(alias: str = "default") -> str:
    vendor = connections[alias].vendor
    if vendor not in ("sqlite", "postgresql"):
        raise BackupError(f"Database engine {vendor!r} is not supported; backups support SQLite and PostgreSQL.")
    return vendor


def migration_state(alias: str = "default") -> dict[str, str]:
    """The latest applied migration per app (by the order they were applied)."""
    recorder = MigrationRecorder(connections[alias])
    if not recorder.has_table():
        return {}
    latest = {}
    for app, name in recorder.migration_qs.order_by("id").values_list("app", "name"):
        latest[app] = name
    return dict(sorted(latest.items()))


def code_revision() -> str | None:
    """The git commit of the running code, when it runs from a checkout (None otherwise)."""
    try:
        out = subprocess.run(["git", "-C", str(settings.BASE_DIR), "rev-parse", "HEAD"],
                             capture_output=True, text=True, timeout=10)
    except (OSError, subprocess.SubprocessError):
        return None
    if out.returncode != 0:
        return None
    return out.stdout.strip() or None


def _models():
    """Every table Django manages, history and many-to-many tables included, plus django_migrations."""
    found = [m for m in apps.get_models(include_auto_created=True) if m._meta.managed and not m._meta.proxy]
    found.append(MigrationRecorder.Migration)
    return sorted(found, key=lambda m: m._meta.db_table)


def _label(model) -> str:
    return model._meta.label_lower


def database_records(alias: str = "default") -> dict[str, int]:
    """Tables holding rows a person made (anything beyond what `migrate` writes), with row counts."""
    connection = connections[alias]
    tables = set(connection.introspection.table_names())
    found = {}
    with connection.cursor() as cursor:
        for model in _models():
            table = model._meta.db_table
            if table not in tables or _label(model) in MIGRATE_SEEDED or model is MigrationRecorder.Migration:
                continue
            cursor.execute(f"SELECT COUNT(*) FROM {connection.ops.quote_name(table)}")
            count = cursor.fetchone()[0]
            if count:
                found[table] = count
    return found


# --- PostgreSQL client tools ----------------------------------------------------------------------------

def _pg_params(alias: str) -> tuple[list[str], dict[str, str]]:
    db = settings.DATABASES[alias]
    args = [f"--dbname={db['NAME']}"]
    if db.get("HOST"):
        args.append(f"--host={db['HOST']}")
    if db.get("PORT"):
        args.append(f"--port={db['PORT']}")
    if db.get("USER"):
        args.append(f"--username={db['USER']}")
    env = dict(os.environ)
    if db.get("PASSWORD"):
        env["PGPASSWORD"] = str(db["PASSWORD"])  # in the environment, never on the command line
    sslmode = db.get("OPTIONS", {}).get("sslmode")
    if sslmode:
        env["PGSSLMODE"] = sslmode
    return args, env


def pg_tool(name: str, alias: str = "default") -> tuple[str, str]:
    """Path and version of pg_dump/pg_restore, refused unless its major version is at least the server's
    (pg_dump refuses newer servers; an older pg_restore cannot read a newer archive)."""
    path = shutil.which(name)
    connection = connections[alias]
    connection.ensure_connection()
    server_major = connection.pg_version // 10000
    install = f"install the PostgreSQL {server_major} client tools (Debian: apt-get install postgresql-client-{server_major})"
    if path is None:
        raise BackupError(f"{name} was not found on PATH; the PostgreSQL server is version {server_major}: {install}.")
    out = subprocess.run([path, "--version"], capture_output=True, text=True).stdout.strip()
    match = re.search(r"(\d+)(?:\.(\d+))?", out)
    if not match:
        raise BackupError(f"Could not read the version of {path} ({out!r}); {install}.")
    client_major = int(match.group(1))
    if client_major < server_major:
        raise BackupError(f"{path} is version {client_major} but the PostgreSQL server is {server_major}; "
                          f"{name} must be at least the server's version: {install}.")
    return path, out


def _run(args: list[str], env: dict[str, str], what: str) -> None:
    done = subprocess.run(args, env=env, capture_output=True, text=True)
    if done.returncode != 0:
        raise BackupError(f"{what} failed (exit {done.returncode}): {done.stderr.strip()[-2000:]}")


# --- backup ---------------------------------------------------------------------------------------------

def sqlite_snapshot(source: sqlite3.Connection, target_path: Path) -> None:
    """Copy a live SQLite database with the online backup API. Done in one step, the copy is one
    consistent state of the database even while other connections write (they wait or, in WAL mode,
    carry on; the copy does not see their later commits)."""
    target = sqlite3.connect(target_path)
    try:
        source.backup(target)
        # The copy inherits the live database's WAL mode (it is in the file header): switch the snapshot to
        # a plain rollback journal so it is one self-contained file, with no -wal/-shm beside it once read.
        target.execute("PRAGMA journal_mode=DELETE")
    finally:
        target.close()


def _encode(value):
    """A column value as JSON, losing nothing: full-microsecond ISO timestamps, decimals as text."""
    if value is None or isinstance(value, (bool, int, float, str, dict, list)):
        return value
    if isinstance(value, datetime):
        return value.astimezone(dt_timezone.utc).isoformat() if value.tzinfo else value.isoformat()
    if isinstance(value, (date, time)):
        return value.isoformat()
    if isinstance(value, Decimal):
        return str(value)
    if isinstance(value, timedelta):
        return duration_iso_string(value)
    if isinstance(value, UUID):
        return str(value)
    if isinstance(value, (bytes, memoryview)):
        return base64.b64encode(bytes(value)).decode("ascii")
    raise TypeError(f"Cannot store a {type(value).__name__} in a portable backup: {value!r}")


def _portable_tables(alias: str, folder: Path) -> dict[str, int]:
    """Every table as JSON lines: a header with the model and columns, then one array per row (by pk)."""
    connection = connections[alias]
    (folder / TABLES_DIR).mkdir()
    counts = {}
    outermost = not connection.in_atomic_block
    with transaction.atomic(using=alias):
        if connection.vendor == "postgresql" and outermost:
            # One snapshot for all tables, like pg_dump: later commits by others are not seen.
            with connection.cursor() as cursor:
                cursor.execute("SET TRANSACTION ISOLATION LEVEL REPEATABLE READ, READ ONLY")
        for model in _models():
            columns = [f.attname for f in model._meta.concrete_fields]
            rows = model._base_manager.using(alias).order_by("pk").values_list(*columns).iterator(chunk_size=2000)
            path = folder / TABLES_DIR / f"{model._meta.db_table}.jsonl"
            count = 0
            with open(path, "w", encoding="utf-8") as fh:
                fh.write(json.dumps({"model": _label(model), "table": model._meta.db_table, "columns": columns}) + "\n")
                for row in rows:
                    fh.write(json.dumps([_encode(v) for v in row], ensure_ascii=False) + "\n")
                    count += 1
            counts[model._meta.db_table] = count
    return counts


def _copy_media(folder: Path) -> int:
    """Copy MEDIA_ROOT after the database snapshot: an attachment's file is written before its row is
    committed, so every file the snapshot refers to is already there."""
    root = Path(settings.MEDIA_ROOT)
    count = 0
    if not root.is_dir():
        return 0
    for source in sorted(p for p in root.rglob("*") if p.is_file()):
        target = folder / MEDIA_DIR / source.relative_to(root)
        target.parent.mkdir(parents=True, exist_ok=True)
        shutil.copy2(source, target)
        count += 1
    return count


def _parts(folder: Path) -> list[dict]:
    parts = []
    for path in sorted(p for p in folder.rglob("*") if p.is_file() and p.name != MANIFEST):
        rel = path.relative_to(folder).as_posix()
        kind = "media" if rel.startswith(MEDIA_DIR + "/") else "table" if rel.startswith(TABLES_DIR + "/") else "database"
        parts.append({"path": rel, "kind": kind, "size_bytes": path.stat().st_size, "sha256": sha256_of(path)})
    return parts


def _sqlite_row_counts(path: Path) -> dict[str, int]:
    con = sqlite3.connect(f"file:{path}?mode=ro", uri=True)
    try:
        names = [r[0] for r in con.execute("SELECT name FROM sqlite_master WHERE type = 'table' "
                                           "AND name NOT LIKE 'sqlite_%' ORDER BY name")]
        return {n: con.execute(f'SELECT COUNT(*) FROM "{n}"').fetchone()[0] for n in names}
    finally:
        con.close()


def backup(output: Path, *, portable: bool = False, alias: str = "default", now: datetime | None = None) -> Result:
    engine = engine_of(alias)
    connection = connections[alias]
    now = now or datetime.now(dt_timezone.utc)
    name = f"vermilog-backup-{now:%Y%m%dT%H%M%SZ}" + ("-portable" if portable else "")
    final = Path(output) / name
    if final.exists():
        raise BackupError(f"{final} already exists; wait a second or choose another --output folder.")
    work = final.with_name(name + ".partial")
    work.mkdir(parents=True)
    manifest = {"format": FORMAT, "format_version": FORMAT_VERSION, "kind": "portable" if portable else engine,
                "engine": engine, "created_at": now.isoformat(), "code_revision": code_revision(),
                "migrations": migration_state(alias)}
    try:
        if portable:
            manifest["row_counts"] = _portable_tables(alias, work)
        elif engine == "sqlite":
            connection.ensure_connection()
            sqlite_snapshot(connection.connection, work / SQLITE_PART)
            manifest["row_counts"] = _sqlite_row_counts(work / SQLITE_PART)
        else:
            path, version = pg_tool("pg_dump", alias)
            args, env = _pg_params(alias)
            _run([path, "--format=custom", f"--file={work / PG_PART}", *args], env, "pg_dump")
            manifest["pg_dump"] = version
        media = _copy_media(work)
        manifest["parts"] = _parts(work)
        (work / MANIFEST).write_text(json.dumps(manifest, indent=2) + "\n", encoding="utf-8")
    except BaseException:
        shutil.rmtree(work, ignore_errors=True)
        raise
    work.rename(final)
    size = sum(p["size_bytes"] for p in manifest["parts"] if p["kind"] != "media")
    rows = sum(manifest.get("row_counts", {}).values())
    summary = (f"Backup written to {final}: {manifest['kind']} database ({size} bytes"
               + (f", {len(manifest['row_counts'])} tables, {rows} rows" if "row_counts" in manifest else "")
               + f"), {media} media files, {len(manifest['parts'])} parts; "
               f"manifest sha256 {sha256_of(final / MANIFEST)}.")
    return Result(final, summary)


# --- restore --------------------------------------------------------------------------------------------

def verify(folder: Path) -> dict:
    """The manifest, once every part it lists is present with its size and SHA-256 and nothing else is there."""
    folder = Path(folder)
    if not (folder / MANIFEST).is_file():
        raise BackupError(f"{folder} is not a Vermilog backup: {MANIFEST} is missing.")
    try:
        manifest = json.loads((folder / MANIFEST).read_text(encoding="utf-8"))
    except ValueError as error:
        raise BackupError(f"{folder / MANIFEST} is not valid JSON ({error}); the backup is damaged.") from None
    if manifest.get("format") != FORMAT or manifest.get("format_version") != FORMAT_VERSION:
        raise BackupError(f"{folder / MANIFEST} is not a {FORMAT} version {FORMAT_VERSION} manifest.")
    listed = set()
    for part in manifest["parts"]:
        path = folder / part["path"]
        listed.add(part["path"])
        if not path.is_file():
            raise BackupError(f"Backup incomplete: part {part['path']} is missing.")
        if path.stat().st_size != part["size_bytes"]:
            raise BackupError(f"Backup damaged: part {part['path']} is {path.stat().st_size} bytes, "
                              f"the manifest says {part['size_bytes']}.")
        if sha256_of(path) != part["sha256"]:
            raise BackupError(f"Backup damaged or tampered with: part {part['path']} does not match its "
                              f"SHA-256 in the manifest.")
    extra = sorted(p.relative_to(folder).as_posix() for p in folder.rglob("*")
                   if p.is_file() and p.name != MANIFEST and p.relative_to(folder).as_posix() not in listed)
    if extra:
        raise BackupError(f"Backup altered: {extra[0]} is not listed in the manifest"
                          + (f" (and {len(extra) - 1} more)" if len(extra) > 1 else "") + ".")
    return manifest


def _check_migrations(manifest: dict) -> None:
    """Refuse a backup made by newer code: its migrations must all be known to this checkout."""
    known = MigrationLoader(None, ignore_no_migrations=True).disk_migrations
    for app, name in manifest["migrations"].items():
        if app in apps.app_configs and (app, name) not in known:
            raise BackupError(f"The backup's database is at migration {app}.{name}, which this version of "
                              f"Vermilog does not have; restore with the version that made the backup.")


def _check_media(folder: Path, manifest: dict) -> list[dict]:
    """The media parts to copy; refused if a different file already sits at the same place."""
    root = Path(settings.MEDIA_ROOT)
    todo = []
    for part in manifest["parts"]:
        if part["kind"] != "media":
            continue
        target = root / Path(part["path"]).relative_to(MEDIA_DIR)
        if target.exists():
            if sha256_of(target) != part["sha256"]:
                raise BackupError(f"{target} already exists with different content; restore into an empty "
                                  f"MEDIA_ROOT (nothing is overwritten).")
            continue
        todo.append(part)
    return todo


def restore(folder: Path, *, alias: str = "default", dry_run: bool = False) -> Result:
    """Restore into the empty database `alias` and MEDIA_ROOT. Every check runs before anything is
    written; `dry_run` stops after them."""
    folder = Path(folder)
    manifest = verify(folder)
    engine = engine_of(alias)
    kind = manifest["kind"]
    if kind != "portable" and kind != engine:
        raise BackupError(f"This is a {kind} backup and the configured database is {engine}; "
                          f"make a portable backup (backup --portable) to move between engines.")
    _check_migrations(manifest)
    records = database_records(alias)
    if records:
        listing = ", ".join(f"{table} ({n} rows)" for table, n in sorted(records.items())[:5])
        raise BackupError(f"The target database is not empty: {listing}"
                          + (f" and {len(records) - 5} more tables" if len(records) > 5 else "")
                          + ". Restore only into a new, empty database; nothing was changed.")
    if kind == "portable":
        _check_portable_target(manifest, alias)
    elif kind == "postgresql":
        pg_tool("pg_restore", alias)
    media = _check_media(folder, manifest)
    n_media = sum(1 for p in manifest["parts"] if p["kind"] == "media")
    if dry_run:
        return Result(folder, f"Dry run: {folder.name} ({kind}) can be restored here: {len(manifest['parts'])} "
                              f"parts verified, the database is empty, {len(media)} of {n_media} media files "
                              f"to copy. Nothing was changed.")
    if kind == "portable":
        _restore_portable(folder, manifest, alias)
    elif kind == "sqlite":
        _restore_sqlite(folder / SQLITE_PART, alias)
    else:
        _restore_postgresql(folder / PG_PART, alias)
    for part in media:
        target = Path(settings.MEDIA_ROOT) / Path(part["path"]).relative_to(MEDIA_DIR)
        target.parent.mkdir(parents=True, exist_ok=True)
        shutil.copy2(folder / part["path"], target)
        if sha256_of(target) != part["sha256"]:
            raise BackupError(f"Copying {part['path']} to {target} gave different bytes; check the disk.")
    # Cached figures are keyed by record ids, which the restored database reuses for other records.
    cache.clear()
    counts = _row_counts(alias)
    expected = manifest.get("row_counts")
    if expected:
        wrong = {t: (n, counts.get(t)) for t, n in expected.items() if counts.get(t) != n}
        if wrong:
            table, (want, got) = sorted(wrong.items())[0]
            raise BackupError(f"After the restore {table} has {got} rows; the backup has {want}.")
    return Result(folder, f"Restored {folder.name} ({kind}): {len(counts)} tables, {sum(counts.values())} rows, "
                          f"{n_media} media files ({len(media)} copied).")


def _row_counts(alias: str) -> dict[str, int]:
    connection = connections[alias]
    with connection.cursor() as cursor:
        counts = {}
        for table in connection.introspection.table_names():
            cursor.execute(f"SELECT COUNT(*) FROM {connection.ops.quote_name(table)}")
            counts[table] = cursor.fetchone()[0]
    return counts


def _restore_sqlite(part: Path, alias: str) -> None:
    """Copy the snapshot into the configured database with the backup API (it replaces the whole file's
    content, schema included, in one step)."""
    connection = connections[alias]
    connection.ensure_connection()
    source = sqlite3.connect(f"file:{part}?mode=ro", uri=True)
    try:
        source.backup(connection.connection)
    finally:
        source.close()
    connection.close()  # the next query reconnects and sees the restored schema


def _restore_postgresql(part: Path, alias: str) -> None:
    path, _version = pg_tool("pg_restore", alias)
    args, env = _pg_params(alias)
    connections[alias].close()
    # --clean --if-exists drops the empty tables `migrate` may have made; one transaction, so a failure
    # leaves the database as it was.
    _run([path, "--no-owner", "--no-privileges", "--clean", "--if-exists", "--single-transaction",
          "--exit-on-error", *args, str(part)], env, "pg_restore")


def _decode(field, value):
    if value is None or isinstance(field, models.JSONField):
        return value
    return field.to_python(value)


def _check_portable_target(manifest: dict, alias: str) -> None:
    """A portable backup restores into tables that `migrate` made, at the backup's migrations."""
    here = migration_state(alias)
    if not here:
        raise BackupError("The target database has no tables yet: run `manage.py migrate` first; a portable "
                          "backup restores into a migrated, empty database.")
    if here != manifest["migrations"]:
        differ = sorted(set(here.items()) ^ set(manifest["migrations"].items()))
        app = differ[0][0]
        raise BackupError(f"A portable backup restores into a database at the same migrations: the backup has "
                          f"{app} at {manifest['migrations'].get(app)}, this database {here.get(app)}. "
                          f"Run `manage.py migrate {app} {manifest['migrations'].get(app) or 'zero'}` first "
                          f"(on a new database: `manage.py migrate`).")


def _restore_portable(folder: Path, manifest: dict, alias: str) -> None:
    """Insert every row with plain SQL (no model save: no signals, no auto_now), in one transaction,
    after removing what `migrate` wrote; then move PostgreSQL's sequences past the restored ids."""
    connection = connections[alias]
    by_table = {m._meta.db_table: m for m in _models()}
    restored = []
    quote = connection.ops.quote_name
    with transaction.atomic(using=alias), connection.cursor() as cursor:
        for part in manifest["parts"]:
            if part["kind"] != "table":
                continue
            with open(folder / part["path"], encoding="utf-8") as fh:
                header = json.loads(fh.readline())
                model = by_table.get(header["table"])
                if model is None:
                    raise BackupError(f"Table {header['table']} of the backup is unknown to this version of Vermilog.")
                fields = {f.attname: f for f in model._meta.concrete_fields}
                if set(header["columns"]) != set(fields):
                    raise BackupError(f"Table {header['table']}: the backup's columns {header['columns']} do not "
                                      f"match this version's {sorted(fields)}.")
                columns = [fields[c] for c in header["columns"]]
                cursor.execute(f"DELETE FROM {quote(header['table'])}")
                sql = (f"INSERT INTO {quote(header['table'])} ({', '.join(quote(f.column) for f in columns)}) "
                       f"VALUES ({', '.join(['%s'] * len(columns))})")
                batch = []
                for line in fh:
                    row = json.loads(line)
                    batch.append([f.get_db_prep_save(_decode(f, v), connection) for f, v in zip(columns, row)])
                    if len(batch) >= 1000:
                        cursor.executemany(sql, batch)
                        batch = []
                if batch:
                    cursor.executemany(sql, batch)
            restored.append(model)
        connection.check_constraints()  # every foreign key points at a restored row
        for statement in connection.ops.sequence_reset_sql(no_style(), restored):
            cursor.execute(statement)
