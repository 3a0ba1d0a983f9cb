"""Indexes for "the newest history row of this tank's records" (colonies/health_series.py records_versions:
the version key of a tank's cached figure and of the overview).

The history tables come from django-simple-history, which indexes the tank column alone. For
`WHERE tank_id = %s ORDER BY history_id DESC LIMIT 1`, PostgreSQL then walks the primary key backwards
and filters (358 ms for a tank with old records at 436,000 history rows: EXPLAIN ANALYZE showed "Index
Scan Backward using ..._pkey, Rows Removed by Filter: 435229"). With (tank_id, history_id) both engines
read one index entry. Plain SQL: the history models are generated, so their Meta cannot name indexes.
"""
from django.db import migrations

INDEXES = [  # (index name, history table, column the version query matches on)
    ("hist_tank_newest", "colonies_historicaltank", "id"),
    ("hist_check_newest", "colonies_historicalcheck", "tank_id"),
    ("hist_feeding_newest", "colonies_historicalfeeding", "tank_id"),
    ("hist_water_newest", "colonies_historicalwaterchange", "tank_id"),
    ("hist_census_newest", "colonies_historicalcensus", "tank_id"),
    ("hist_removal_newest", "colonies_historicaldeadremoval", "tank_id"),
    ("hist_split_newest", "colonies_historicalsplit", "source_id"),
    ("hist_splitpart_newest", "colonies_historicalsplitpart", "destination_id"),
]


class Migration(migrations.Migration):
    dependencies = [("colonies", "0017_archived_evidence")]

    operations = [
        migrations.RunSQL(f"CREATE INDEX {name} ON {table} ({column}, history_id)", f"DROP INDEX {name}")
        for name, table, column in INDEXES
    ]
