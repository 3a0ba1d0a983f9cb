"""The benchmark the project keeps: a synthetic facility of a given size and timings of its pages.

`synthetic.build()` fills a fresh database (bulk inserts with history rows, deterministic for a
seed); `timing.run_all()` times every page, export and batch job in-process with the test client;
`database.scratch_database()` creates and removes that database. `manage.py benchmark` ties them.
"""
