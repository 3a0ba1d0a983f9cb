"""Direct bulk inserts of records and their history rows, for building a large synthetic facility.

`bulk_create_with_history` spends most of its time compiling SQL value by value (~20 µs each); a
436 000-check facility has ~40 million values. Here the ids are assigned up front (the database is new
and we are its only writer, inside one transaction), rows are plain tuples and each table gets one
`executemany` per batch. History rows carry the same values a `bulk_create_with_history` would, dated
and signed per record (`_history_date`, `_history_user`).
"""
from django.core.management.color import no_style
from django.db import connection, models
from django.db.models import Max

BATCH = 5000


def _adapter(field):
    """A function from a Python attribute value to the value the driver is given."""
    if isinstance(field, models.JSONField):
        return lambda v: field.get_db_prep_save(v, connection)
    if connection.vendor != "sqlite":
        return None  # psycopg adapts datetimes, dates, numbers and text itself
    if isinstance(field, models.DateTimeField):
        return connection.ops.adapt_datetimefield_value
    if isinstance(field, models.DateField):
        return connection.ops.adapt_datefield_value
    return None


def _insert(table: str, columns: list[str], rows: list[tuple]) -> None:
    quote = connection.ops.quote_name
    sql = (f"INSERT INTO {quote(table)} ({', '.join(quote(c) for c in columns)}) "
           f"VALUES ({', '.join(['%s'] * len(columns))})")
    with connection.cursor() as cursor:
        for i in range(0, len(rows), BATCH):
            cursor.executemany(sql, rows[i:i + BATCH])


def _next_id(model) -> int:
    return (model._default_manager.aggregate(m=Max("pk"))["m"] or 0) + 1


def insert_with_history(model, objs: list, reason: str) -> None:
    """Insert objs (unsaved, no pk) and one '+' history row each; sets their pks."""
    if not objs:
        return
    fields = list(model._meta.concrete_fields)
    adapters = [_adapter(f) for f in fields]
    first = _next_id(model)
    for i, obj in enumerate(objs):
        obj.pk = first + i
    rows = [tuple(a(getattr(obj, f.attname)) if a else getattr(obj, f.attname) for f, a in zip(fields, adapters))
            for obj in objs]
    _insert(model._meta.db_table, [f.column for f in fields], rows)

    history = model.history.model
    tracked = {f.attname for f in history.tracked_fields}
    h_fields = list(history._meta.concrete_fields)
    h_adapters = [_adapter(f) for f in h_fields]
    h_first = _next_id(history)
    h_rows = []
    for i, obj in enumerate(objs):
        special = {"history_id": h_first + i, "history_date": obj._history_date, "history_type": "+",
                   "history_change_reason": reason, "history_user_id": obj._history_user.pk}
        row = []
        for f, a in zip(h_fields, h_adapters):
            value = special[f.attname] if f.attname in special else getattr(obj, f.attname) if f.attname in tracked else None
            row.append(a(value) if a and value is not None else value)
        h_rows.append(tuple(row))
    _insert(history._meta.db_table, [f.column for f in h_fields], h_rows)


def reset_sequences(models_list) -> None:
    """PostgreSQL: move the id sequences past the ids we assigned (SQLite's AUTOINCREMENT follows by itself)."""
    statements = connection.ops.sequence_reset_sql(no_style(), models_list)
    with connection.cursor() as cursor:
        for sql in statements:
            cursor.execute(sql)
