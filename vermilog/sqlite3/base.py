"""Django's SQLite backend, told the real limit on query parameters.

Django 5.2 assumes SQLite's old compile-time default of 999 variables per statement and so splits
a bulk insert of the daily round into batches of about 30 rows: the query count then grows with
the number of tanks. SQLite 3.32 (2020) raised the default to 32766 and Python reports the limit
of the library it runs with; we use that. (Django 6.0 reads the limit the same way.)

A file database is switched to write-ahead logging on every connection (the mode is stored in the
file, so this is a no-op after the first time): readers then never wait for a writer and a writer
never waits for readers, only for the one writer before it (settings: BEGIN IMMEDIATE and a busy
timeout). synchronous=NORMAL is the setting SQLite recommends with WAL: a power cut may lose the
last commits but never corrupts the file.
"""
import sqlite3

from django.db.backends.sqlite3 import base, features
from django.utils.functional import cached_property


class DatabaseFeatures(features.DatabaseFeatures):
    @cached_property
    def max_query_params(self):
        with self.connection.temporary_connection() as cursor:
            return cursor.connection.getlimit(sqlite3.SQLITE_LIMIT_VARIABLE_NUMBER)


class DatabaseWrapper(base.DatabaseWrapper):
    features_class = DatabaseFeatures

    def get_new_connection(self, conn_params):
        conn = super().get_new_connection(conn_params)
        if not self.is_in_memory_db():
            conn.execute("PRAGMA journal_mode = WAL")
            conn.execute("PRAGMA synchronous = NORMAL")
        return conn
