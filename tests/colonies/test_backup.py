"""The backup and restore commands (colonies/backup.py).

The round trips run `manage.py` in subprocesses against file databases of their own (SQLite files in a
temp folder; scratch PostgreSQL databases vermilog_backup_*_<pid>), as an administrator would: migrate,
load a 30-day demo plus one attachment, back up, restore into a second, empty database, then compare
every row of every table (all columns, read with the engine's own driver) and every media file's bytes.
"""
import hashlib
import json
import os
import shutil
import sqlite3
import subprocess
import sys
import threading
from io import StringIO
from pathlib import Path

import dj_database_url
import pytest
from django.apps import apps
from django.conf import settings
from django.core.files.uploadedfile import SimpleUploadedFile
from django.core.management import CommandError, call_command
from django.db import connection, models

from colonies import backup
from colonies.models import Room
from tests.experiments.builders import make_cohort, make_protocol, make_study, record
from tests.factories import make_room

BASE_DIR = Path(settings.BASE_DIR)
PNG = b"\x89PNG\r\n\x1a\n invented dish photo " + bytes(range(256))

# Runs in a subprocess: migrate (keeping a copy of the empty, migrated file), load a short demo and add
# an attachment. 30 days because the trials scenario draws its cohorts three weeks back.
BUILD_SOURCE = """
import os, shutil, sys, django
os.environ.setdefault("DJANGO_SETTINGS_MODULE", "vermilog.settings")
django.setup()
from django.contrib.auth.models import User
from django.core.files.uploadedfile import SimpleUploadedFile
from django.core.management import call_command
from django.db import connection
from colonies import demo
from experiments import services
from experiments.models import Trial
call_command("migrate", verbosity=0)
connection.close()
shutil.copy(sys.argv[1], sys.argv[2])
demo.DAYS = 30
call_command("load_demo", verbosity=0)
# A trial of the study still open (the demo unblinds and locks the other; locked studies take no files).
trial = Trial.objects.filter(study__outcomes_locked_at__isnull=True, voided_at__isnull=True).order_by("pk").first()
upload = SimpleUploadedFile("dish-01.png", bytes.fromhex(sys.argv[3]), content_type="image/png")
services.add_attachment(user=User.objects.get(username="ravi"), trial=trial, upload=upload, kind="photo", caption="Dish 1")
# One reading taken at a time with microseconds, as the round's own "now" is: the demo's times are whole
# minutes except before 09:00 local, so without this the microsecond check would depend on the clock.
from colonies.models import Check
first = Check.objects.order_by("pk").first()
Check.objects.filter(pk=first.pk).update(observed_at=first.observed_at.replace(microsecond=123456))
"""


def _run(env: dict, *args: str) -> str:
    done = subprocess.run([sys.executable, *args], cwd=BASE_DIR, capture_output=True, text=True,
                          env={**os.environ, "DJANGO_SETTINGS_MODULE": "vermilog.settings", **env})
    assert done.returncode == 0, f"{args[0][:40]!r} {args[1][:40]!r} failed:\n{done.stdout}\n{done.stderr}"
    return done.stdout


def _manage(database_url: str, media: Path, *args: str) -> str:
    return _run({"DATABASE_URL": database_url, "MEDIA_ROOT": str(media)}, "manage.py", *args)


def _only_backup(folder: Path) -> Path:
    (found,) = [p for p in folder.iterdir() if p.is_dir()]
    return found


def _json_columns() -> dict[str, set[str]]:
    return {m._meta.db_table: {f.column for f in m._meta.concrete_fields if isinstance(f, models.JSONField)}
            for m in apps.get_models(include_auto_created=True)}


def _sqlite_rows(path: Path, *, parse_json: bool = False) -> dict[str, list]:
    """Every row of every table as stored. With parse_json, JSON columns are compared as values: PostgreSQL's
    jsonb keeps an object's keys in its own order, so a trip through PostgreSQL reorders them."""
    json_columns = _json_columns() if parse_json else {}
    con = sqlite3.connect(path)
    try:
        tables = [r[0] for r in con.execute("SELECT name FROM sqlite_master WHERE type = 'table' "
                                            "AND name NOT LIKE 'sqlite_%' ORDER BY name")]
        found = {}
        for table in tables:
            cursor = con.execute(f'SELECT * FROM "{table}"')
            parse = [d[0] in json_columns.get(table, ()) for d in cursor.description]
            rows = [tuple(json.loads(v) if p and v is not None else v for p, v in zip(parse, row)) for row in cursor]
            found[table] = sorted(rows, key=repr)
        return found
    finally:
        con.close()


def _media(root: Path) -> dict[str, str]:
    return {p.relative_to(root).as_posix(): hashlib.sha256(p.read_bytes()).hexdigest()
            for p in root.rglob("*") if p.is_file()}


def _differences(a: dict[str, list], b: dict[str, list]) -> list[str]:
    out = [f"table {t} only on one side" for t in sorted(set(a) ^ set(b))]
    for table in sorted(set(a) & set(b)):
        left, right = a[table], b[table]
        if left != right:
            out.append(f"{table}: {len(left)} vs {len(right)} rows, "
                       f"first difference {next((x, y) for x, y in zip(left + [None], right + [None]) if x != y)}")
    return out


@pytest.fixture(scope="module")
def sqlite_source(tmp_path_factory):
    """A migrated empty SQLite file, and a copy holding the short demo and one attachment file."""
    root = tmp_path_factory.mktemp("backup-src")
    src, empty, media = root / "src.sqlite3", root / "empty.sqlite3", root / "media"
    _run({"DATABASE_URL": f"sqlite:///{src}", "MEDIA_ROOT": str(media)},
         "-c", BUILD_SOURCE, str(src), str(empty), PNG.hex())
    return {"db": src, "empty": empty, "media": media, "root": root}


def test_sqlite_backup_and_restore_reproduce_every_row_and_file(sqlite_source, tmp_path):
    src, media = sqlite_source["db"], sqlite_source["media"]
    assert any(p.read_bytes() == PNG for p in media.rglob("*.png"))  # the attachment is really there
    out = _manage(f"sqlite:///{src}", media, "backup", "--output", str(tmp_path / "native"))
    files = len(_media(media))  # the attachment and the demo's photo series (experiments/demo_imaging.py)
    assert "sqlite database" in out and f"{files} media files" in out
    folder = _only_backup(tmp_path / "native")
    manifest = json.loads((folder / "manifest.json").read_text())
    assert manifest["engine"] == "sqlite" and manifest["migrations"]["colonies"].startswith("00")
    assert {p["path"] for p in manifest["parts"]} == {"database.sqlite3"} | {f"media/{k}" for k in _media(media)}

    dst, dst_media = tmp_path / "dst.sqlite3", tmp_path / "dst-media"
    out = _manage(f"sqlite:///{dst}", dst_media, "restore", str(folder))

    assert "Restored" in out and f"{files} media files ({files} copied)" in out
    assert _differences(_sqlite_rows(src), _sqlite_rows(dst)) == []
    assert _media(dst_media) == _media(media)


def test_portable_sqlite_backup_restores_into_a_migrated_empty_database(sqlite_source, tmp_path):
    src, media = sqlite_source["db"], sqlite_source["media"]
    _manage(f"sqlite:///{src}", media, "backup", "--portable", "--output", str(tmp_path / "portable"))
    folder = _only_backup(tmp_path / "portable")
    checks = (folder / "tables" / "colonies_check.jsonl").read_text().splitlines()
    header = json.loads(checks[0])
    observed = [json.loads(line)[header["columns"].index("observed_at")] for line in checks[1:]]
    assert any(len(v) == len("2026-01-01T00:00:00.123456+00:00") for v in observed)  # microseconds kept

    dst, dst_media = tmp_path / "dst.sqlite3", tmp_path / "dst-media"
    shutil.copy(sqlite_source["empty"], dst)  # `migrate` filled groups, species and content types
    _manage(f"sqlite:///{dst}", dst_media, "restore", str(folder))

    # Same rows in every table, history included: no extra history rows, no rewritten recorded_at.
    assert _differences(_sqlite_rows(src), _sqlite_rows(dst)) == []
    assert _media(dst_media) == _media(media)


# --- PostgreSQL -----------------------------------------------------------------------------------------

def _pg_url(name: str) -> str:
    cfg = dj_database_url.parse(os.environ["DATABASE_URL"])
    auth = cfg["USER"] + (f":{cfg['PASSWORD']}" if cfg.get("PASSWORD") else "")
    return f"postgres://{auth}@{cfg['HOST'] or '127.0.0.1'}:{cfg['PORT'] or 5432}/{name}"


def _pg_rows(url: str) -> dict[str, list]:
    import psycopg
    with psycopg.connect(url) as con:
        tables = [r[0] for r in con.execute("SELECT tablename FROM pg_tables WHERE schemaname = 'public'")]
        return {t: sorted(con.execute(f'SELECT * FROM "{t}"').fetchall(), key=repr) for t in sorted(tables)}


def _pg_sequences_behind(url: str) -> list[str]:
    """Identity columns whose sequence would hand out an id already used."""
    import psycopg
    behind = []
    with psycopg.connect(url) as con:
        for table, column in con.execute("SELECT table_name, column_name FROM information_schema.columns "
                                         "WHERE table_schema = 'public' AND is_identity = 'YES'").fetchall():
            seq = con.execute("SELECT pg_get_serial_sequence(%s, %s)", [f'"{table}"', column]).fetchone()[0]
            last, called = con.execute(f"SELECT last_value, is_called FROM {seq}").fetchone()
            top = con.execute(f'SELECT max("{column}") FROM "{table}"').fetchone()[0]
            if top is not None and (last < top or (last == top and not called)):
                behind.append(f"{table}.{column}: sequence at {last}, max id {top}")
    return behind


@pytest.fixture
def pg_databases():
    if connection.vendor != "postgresql":
        pytest.skip("PostgreSQL round trip: run with DATABASE_URL=postgres://… (CI does)")
    if shutil.which("pg_dump") is None or shutil.which("pg_restore") is None:
        pytest.skip("PostgreSQL round trip: pg_dump/pg_restore are not installed (postgresql-client)")
    import psycopg
    names = [f"vermilog_backup_{role}_{os.getpid()}" for role in ("src", "dst")]
    admin = _pg_url("postgres")
    with psycopg.connect(admin, autocommit=True) as con:
        for name in names:
            con.execute(f'DROP DATABASE IF EXISTS "{name}"')
            con.execute(f'CREATE DATABASE "{name}"')
    yield [_pg_url(name) for name in names]
    with psycopg.connect(admin, autocommit=True) as con:
        for name in names:
            con.execute(f'DROP DATABASE IF EXISTS "{name}" WITH (FORCE)')


def test_sqlite_data_moves_to_postgresql_and_back_with_nothing_lost(sqlite_source, pg_databases, tmp_path):
    src_url, dst_url = pg_databases
    media = sqlite_source["media"]
    # SQLite -> portable -> PostgreSQL (migrated, empty).
    _manage(f"sqlite:///{sqlite_source['db']}", media, "backup", "--portable", "--output", str(tmp_path / "lite"))
    pg_media = tmp_path / "pg-media"
    _manage(src_url, pg_media, "migrate", "-v0")
    out = _manage(src_url, pg_media, "restore", str(_only_backup(tmp_path / "lite")))
    assert "(portable)" in out
    assert _pg_sequences_behind(src_url) == []  # new records get fresh ids

    # PostgreSQL -> pg_dump -> another (blank) PostgreSQL database: every row and file identical.
    _manage(src_url, pg_media, "backup", "--output", str(tmp_path / "pg"))
    folder = _only_backup(tmp_path / "pg")
    assert json.loads((folder / "manifest.json").read_text())["pg_dump"].startswith("pg_dump (PostgreSQL)")
    dst_media = tmp_path / "dst-media"
    _manage(dst_url, dst_media, "restore", str(folder))
    assert _differences(_pg_rows(src_url), _pg_rows(dst_url)) == []
    assert _media(dst_media) == _media(media)

    # PostgreSQL -> portable -> SQLite: the same rows as the SQLite database we started from.
    _manage(src_url, pg_media, "backup", "--portable", "--output", str(tmp_path / "back"))
    back = tmp_path / "back.sqlite3"
    shutil.copy(sqlite_source["empty"], back)
    _manage(f"sqlite:///{back}", tmp_path / "back-media", "restore", str(_only_backup(tmp_path / "back")))
    assert _differences(_sqlite_rows(sqlite_source["db"], parse_json=True), _sqlite_rows(back, parse_json=True)) == []


@pytest.fixture
def on_postgresql():
    if connection.vendor != "postgresql":
        pytest.skip("pg_dump version check: needs DATABASE_URL=postgres://…")


def test_backup_says_what_to_install_when_pg_dump_is_missing(on_postgresql, db, tmp_path, monkeypatch):
    monkeypatch.setenv("PATH", str(tmp_path))  # an empty folder: no pg_dump anywhere
    major = connection.pg_version // 10000

    with pytest.raises(CommandError, match=f"pg_dump was not found on PATH; the PostgreSQL server is version "
                                           f"{major}: install the PostgreSQL {major} client tools "
                                           rf"\(Debian: apt-get install postgresql-client-{major}\)"):
        call_command("backup", "--output", str(tmp_path / "out"), stdout=StringIO())
    assert not (tmp_path / "out").exists() or not any((tmp_path / "out").iterdir())


def test_backup_refuses_a_pg_dump_older_than_the_server(on_postgresql, db, tmp_path, monkeypatch):
    major = connection.pg_version // 10000
    fake = tmp_path / "bin" / "pg_dump"
    fake.parent.mkdir()
    fake.write_text(f"#!/bin/sh\necho 'pg_dump (PostgreSQL) {major - 1}.4'\n")
    fake.chmod(0o755)
    monkeypatch.setenv("PATH", f"{fake.parent}{os.pathsep}{os.environ['PATH']}")

    with pytest.raises(CommandError, match=f"is version {major - 1} but the PostgreSQL server is {major}; "
                                           f"pg_dump must be at least the server's version"):
        call_command("backup", "--output", str(tmp_path / "out"), stdout=StringIO())
    assert not (tmp_path / "out").exists() or not any((tmp_path / "out").iterdir())


# --- in-process: the commands on the test database ------------------------------------------------------

@pytest.fixture
def with_attachment(researcher, settings, tmp_path):
    settings.MEDIA_ROOT = tmp_path / "media"
    protocol = make_protocol()
    cohort = make_cohort(user=researcher, protocol=protocol)
    study = make_study(user=researcher, protocol=protocol)
    trial = record(study, cohort, researcher).trial
    from experiments import services
    upload = SimpleUploadedFile("dish-02.png", PNG, content_type="image/png")
    return services.add_attachment(user=researcher, trial=trial, upload=upload, kind="photo")


def _backup_now(tmp_path, *args) -> Path:
    out = StringIO()
    call_command("backup", "--output", str(tmp_path / "out"), *args, stdout=out)
    assert "Backup written to" in out.getvalue()
    return _only_backup(tmp_path / "out")


@pytest.mark.django_db
def test_portable_backup_lists_every_part_with_its_checksum(with_attachment, tmp_path):
    folder = _backup_now(tmp_path, "--portable")

    manifest = json.loads((folder / "manifest.json").read_text())
    assert manifest["kind"] == "portable" and manifest["engine"] == connection.vendor
    assert not list(tmp_path.joinpath("out").glob("*.partial"))
    media = [p for p in manifest["parts"] if p["kind"] == "media"]
    assert [(p["size_bytes"], p["sha256"]) for p in media] == [(len(PNG), hashlib.sha256(PNG).hexdigest())]
    for part in manifest["parts"]:
        data = (folder / part["path"]).read_bytes()
        assert (len(data), hashlib.sha256(data).hexdigest()) == (part["size_bytes"], part["sha256"])
    assert manifest["row_counts"]["experiments_attachment"] == 1
    assert manifest["row_counts"]["experiments_historicalattachment"] == 1
    out = StringIO()
    call_command("restore", str(folder), "--verify-only", stdout=out)
    assert f"{len(manifest['parts'])} parts match their SHA-256" in out.getvalue()


@pytest.mark.django_db
@pytest.mark.parametrize("damage", ["change", "truncate", "remove", "add"])
def test_restore_refuses_a_tampered_or_incomplete_backup_naming_the_part(with_attachment, tmp_path, damage):
    folder = _backup_now(tmp_path, "--portable")
    part = folder / "tables" / "colonies_tank.jsonl"
    if damage == "change":
        part.write_text(part.read_text().replace('"columns"', '"colunms"'))
    elif damage == "truncate":
        part.write_bytes(part.read_bytes()[:-1])
    elif damage == "remove":
        part.unlink()
    else:
        (folder / "media" / "extra.txt").write_text("slipped in")
    expected = {"change": "tables/colonies_tank.jsonl does not match its SHA-256",
                "truncate": "tables/colonies_tank.jsonl is", "remove": "tables/colonies_tank.jsonl is missing",
                "add": "media/extra.txt is not listed in the manifest"}[damage]

    with pytest.raises(CommandError, match=expected.replace(".", r"\.")):
        call_command("restore", str(folder), stdout=StringIO())
    with pytest.raises(CommandError, match="does not match|is missing|is not listed|bytes"):
        call_command("restore", str(folder), "--verify-only", stdout=StringIO())


@pytest.mark.django_db
def test_restore_refuses_a_database_that_holds_records_and_changes_nothing(tmp_path, settings):
    settings.MEDIA_ROOT = tmp_path / "media"
    folder = _backup_now(tmp_path, "--portable")
    make_room(code="real-1")

    with pytest.raises(CommandError, match=r"The target database is not empty: colonies_historicalroom \(1 rows\), "
                                           r"colonies_room \(1 rows\)\. "
                                           r"Restore only into a new, empty database; nothing was changed\."):
        call_command("restore", str(folder), stdout=StringIO())

    assert list(Room.objects.values_list("code", flat=True)) == ["real-1"]


@pytest.mark.django_db
def test_restore_dry_run_runs_every_check_and_changes_nothing(tmp_path, settings):
    settings.MEDIA_ROOT = tmp_path / "media"
    (tmp_path / "media").mkdir()
    (tmp_path / "media" / "dish.png").write_bytes(PNG)
    folder = _backup_now(tmp_path, "--portable")
    settings.MEDIA_ROOT = tmp_path / "new-media"
    out = StringIO()

    call_command("restore", str(folder), "--dry-run", stdout=out)

    assert f"Dry run: {folder.name} (portable) can be restored here:" in out.getvalue()
    assert "the database is empty, 1 of 1 media files to copy. Nothing was changed." in out.getvalue()
    assert not (tmp_path / "new-media").exists()
    make_room(code="real-1")
    with pytest.raises(CommandError, match="The target database is not empty"):
        call_command("restore", str(folder), "--dry-run", stdout=StringIO())


@pytest.mark.django_db
def test_a_migrated_database_without_records_counts_as_empty():
    # Groups, species profiles and content types come from `migrate` itself.
    assert backup.database_records() == {}


@pytest.mark.django_db
def test_restore_refuses_to_overwrite_a_different_media_file(tmp_path, settings):
    folder = tmp_path / "b"
    (folder / "media").mkdir(parents=True)
    (folder / "media" / "a.png").write_bytes(PNG)
    manifest = {"format": backup.FORMAT, "format_version": backup.FORMAT_VERSION, "kind": connection.vendor,
                "engine": connection.vendor, "created_at": "2026-01-01T00:00:00+00:00", "migrations": {},
                "parts": [{"path": "media/a.png", "kind": "media", "size_bytes": len(PNG),
                           "sha256": hashlib.sha256(PNG).hexdigest()}]}
    (folder / "manifest.json").write_text(json.dumps(manifest))
    settings.MEDIA_ROOT = tmp_path / "m"
    (tmp_path / "m").mkdir()
    (tmp_path / "m" / "a.png").write_bytes(b"someone else's photo")

    with pytest.raises(CommandError, match="a.png already exists with different content"):
        call_command("restore", str(folder), stdout=StringIO())
    assert (tmp_path / "m" / "a.png").read_bytes() == b"someone else's photo"


@pytest.mark.django_db
def test_a_native_backup_is_refused_on_the_other_engine(tmp_path):
    other = "postgresql" if connection.vendor == "sqlite" else "sqlite"
    folder = tmp_path / "b"
    folder.mkdir()
    (folder / "manifest.json").write_text(json.dumps({
        "format": backup.FORMAT, "format_version": backup.FORMAT_VERSION, "kind": other, "engine": other,
        "created_at": "2026-01-01T00:00:00+00:00", "migrations": {}, "parts": []}))

    with pytest.raises(CommandError, match=f"This is a {other} backup .* make a portable backup"):
        call_command("restore", str(folder), stdout=StringIO())


def test_a_backup_folder_without_manifest_is_refused(tmp_path):
    with pytest.raises(CommandError, match="manifest.json is missing"):
        call_command("restore", str(tmp_path), stdout=StringIO())


# --- the SQLite snapshot under concurrent writes ---------------------------------------------------------

def test_sqlite_snapshot_is_consistent_while_another_connection_writes(tmp_path):
    """A writer thread with its own connection commits pairs of rows (one in each table) while snapshots
    are taken; every snapshot must hold complete pairs only and pass SQLite's integrity check."""
    path = tmp_path / "live.sqlite3"
    with sqlite3.connect(path) as con:
        con.executescript("CREATE TABLE a (n INTEGER); CREATE TABLE b (n INTEGER);")
    stop = threading.Event()

    def writer():
        con = sqlite3.connect(path, timeout=30)
        n = 0
        while not stop.is_set() or n < 200:
            with con:
                con.execute("INSERT INTO a VALUES (?)", [n])
                con.execute("INSERT INTO b VALUES (?)", [n])
            n += 1
        con.close()

    thread = threading.Thread(target=writer)
    thread.start()
    seen = []
    try:
        source = sqlite3.connect(path, timeout=30)
        for i in range(20):
            snap = tmp_path / f"snap{i}.sqlite3"
            backup.sqlite_snapshot(source, snap)
            with sqlite3.connect(snap) as copy:
                assert copy.execute("PRAGMA integrity_check").fetchone()[0] == "ok"
                a = copy.execute("SELECT COUNT(*), COALESCE(MAX(n), -1) FROM a").fetchone()
                b = copy.execute("SELECT COUNT(*), COALESCE(MAX(n), -1) FROM b").fetchone()
            assert a == b
            seen.append(a[0])
        source.close()
    finally:
        stop.set()
        thread.join()
    assert seen == sorted(seen)
