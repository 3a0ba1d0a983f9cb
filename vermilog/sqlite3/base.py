"""Django's SQLite backend, told the real limit on query parameters.

Django 5.2 assumes SQLite's old compile-time default of 999 variables per statement and so splits
a bulk insert of the daily round into batches of about 30 rows: the query count then grows with
the number of tanks. SQLite 3.32 (2020) raised the default to 32766 and Python reports the limit
of the library it runs with; we use that. (Django 6.0 reads the limit the same way.)
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
