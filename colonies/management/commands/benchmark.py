import os
import time

from django.conf import settings
from django.core.management.base import BaseCommand, CommandError
from django.db import DEFAULT_DB_ALIAS, connections
from django.test.utils import override_settings

from colonies.benchmark import cases, database, report, synthetic, timing


class Command(BaseCommand):
    help = ("Build a synthetic facility in a new scratch database (never the configured one) and time every page, "
            "figure, export and batch job: median and max ms, queries and SQL time. Prints a table and writes JSON.")

    def add_arguments(self, parser):
        parser.add_argument("--tanks", type=int, default=400, help="Tanks in the facility (default 400).")
        parser.add_argument("--years", type=float, default=3.0, help="Years of records (default 3).")
        parser.add_argument("--days", type=int, help="Days of records (overrides --years).")
        parser.add_argument("--seed", type=int, default=7, help="Random seed of the synthetic data (default 7).")
        parser.add_argument("--repeats", type=int, default=5, help="Timed runs per page (default 5).")
        parser.add_argument("--db", help="SQLite: path of the new database file (default: a temporary file in /tmp).")
        parser.add_argument("--keep", action="store_true", help="Keep the scratch database afterwards.")
        parser.add_argument("--json", help="Where to write the results (default benchmark-<engine>-<tanks>x<years>.json).")
        parser.add_argument("--reuse", metavar="DB",
                            help="Time an earlier database kept with --keep (SQLite path or PostgreSQL name) "
                                 "instead of building one; its new migrations are applied first.")
        parser.add_argument("--only", action="append", metavar="TEXT",
                            help="Time only the cases whose name contains TEXT (case-insensitive; repeatable).")
        parser.add_argument("--no-memory", action="store_true", help="Skip the extra tracemalloc run of each export.")

    def handle(self, *args, tanks, years, days, seed, repeats, db, keep, json, no_memory, reuse, only, verbosity, **options):
        days = days if days is not None else round(years * 365)
        if tanks < 1 or days < 1 or repeats < 1:
            raise CommandError(f"--tanks {tanks}, --days {days}, --repeats {repeats}: each must be at least 1.")
        engine = database.engine_name(connections[DEFAULT_DB_ALIAS].settings_dict)
        path = json or os.path.join(os.getcwd() if os.access(os.getcwd(), os.W_OK) else "/tmp",
                                    f"benchmark-{engine}-{tanks}x{days / 365:g}.json")
        say = self.stdout.write if verbosity > 0 else (lambda msg: None)
        started = time.perf_counter()
        try:
            opened = (database.existing_database(reuse) if reuse
                      else database.scratch_database(db_path=db, keep=keep))
            with opened as name:
                if reuse:
                    synthetic.gather_statistics()  # the new migrations' indexes have none yet
                    build = {"counts": synthetic.counts(), "reused": True}
                    say(f"Reusing {name}: {build['counts']}")
                else:
                    say(f"Scratch database {name} migrated in {time.perf_counter() - started:.0f} s; building "
                        f"{tanks} tanks x {days} days (seed {seed})...")
                    build = synthetic.build(tanks=tanks, days=days, seed=seed,
                                            progress=say if verbosity > 1 else None)
                    say(f"Built in {sum(build['build_seconds'].values()):.0f} s: {build['counts']}")
                build["database"] = name
                results = []
                # As in production (DEBUG off) and as the test client needs (its host name allowed).
                with override_settings(DEBUG=False, ALLOWED_HOSTS=[*settings.ALLOWED_HOSTS, "testserver"]), \
                        timing.quiet_request_logs():
                    for case in cases.build_cases():
                        if only and not any(text.lower() in case.name.lower() for text in only):
                            continue
                        results.append(timing.measure(case, repeats, memory=not no_memory))
                        if verbosity > 1:
                            say(f"  {case.name}: {results[-1].median_ms or 0:.0f} ms")
        except ValueError as exc:
            raise CommandError(str(exc)) from exc
        options_used = {"tanks": tanks, "days": days, "seed": seed, "repeats": repeats, "keep": keep}
        doc = report.document(options=options_used, build=build, results=results,
                              seconds=time.perf_counter() - started)
        doc["engine"] = engine
        report.write_json(path, doc)
        say(report.table(results))
        failed = sum(not r.ok for r in results)
        say(f"{len(results)} measurements, {failed} failed; JSON written to {path}")
