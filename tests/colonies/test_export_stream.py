"""Reading export rows from the database (colonies/export_stream.py)."""
import datetime as dt

from colonies.export_stream import utc_text


def test_utc_text_gives_isoformat_of_the_aware_time_for_every_shape_a_database_writes():
    # The reference is Python's isoformat() of the aware time the ORM gives for the same column; common practice
    utc = dt.timezone.utc
    cases = [  # (the database's value, the aware datetime the ORM would give for it)
        ("2024-05-01 09:30:00", dt.datetime(2024, 5, 1, 9, 30, tzinfo=utc)),  # SQLite, whole seconds
        ("2024-05-01 09:30:00.000250", dt.datetime(2024, 5, 1, 9, 30, 0, 250, tzinfo=utc)),  # SQLite, microseconds
        ("2024-05-01 09:30:00+00", dt.datetime(2024, 5, 1, 9, 30, tzinfo=utc)),  # PostgreSQL in UTC
        ("2024-05-01 09:30:00.12+00", dt.datetime(2024, 5, 1, 9, 30, 0, 120000, tzinfo=utc)),  # zeros dropped
        ("2024-05-01 09:30:00.123456+00", dt.datetime(2024, 5, 1, 9, 30, 0, 123456, tzinfo=utc)),
        # Any other shape is parsed, and an offset stays as written, as in the ORM's parsed value.
        ("2024-05-01T09:30:00+02:00", dt.datetime(2024, 5, 1, 9, 30, tzinfo=dt.timezone(dt.timedelta(hours=2)))),
        ("2024-05-01 09:30:00.5-05", dt.datetime(2024, 5, 1, 9, 30, 0, 500000, tzinfo=dt.timezone(-dt.timedelta(hours=5)))),
        (dt.datetime(2024, 5, 1, 9, 30, 0, 7, tzinfo=utc), dt.datetime(2024, 5, 1, 9, 30, 0, 7, tzinfo=utc)),  # a driver's
    ]
    values = [value for value, _ in cases] + [None]

    assert utc_text(values, utc) == [when.isoformat() for _, when in cases] + [None]
    assert utc_text(values, utc, " ") == [when.isoformat(" ") for _, when in cases] + [None]
