"""What the benchmark times: every page, figure, export and batch job, as the role that uses it."""
import io
import itertools
import json
import tempfile
import time
from datetime import timedelta

from django.contrib.auth.models import User
from django.core.cache import cache
from django.core.management import call_command
from django.test import Client
from django.urls import reverse
from django.utils import timezone

from colonies import check_export, demo, deviations, growth
from colonies.forms import CheckEntryForm
from colonies.models import Check, Room, Tank
from colonies.round_post import ROWS_FIELD
from colonies.roles import MANAGER, RESEARCHER, TECHNICIAN

from .timing import Case, consume

ROUND_SAVE_TANKS = 40


def clients() -> dict[str, Client]:
    """One logged-in client per role (the synthetic facility's users)."""
    names = {TECHNICIAN: "bench-tech-1", MANAGER: "bench-manager", RESEARCHER: "bench-researcher-1",
             "superuser": "bench-admin"}
    out = {}
    for role, username in names.items():
        client = Client()
        client.force_login(User.objects.get(username=username))
        out[role] = client
    return out


def _get(client, url, lines_are_rows=False):
    def run():
        facts = consume(client.get(url))
        if lines_are_rows:
            facts["rows"] = max(0, facts["lines"] - 1)  # minus the header
        return facts
    return run


def _round_post(client, url, tanks, *, filled_only=False, as_json=False):
    """The POST a browser sends from the round: every input of every row (or only the filled rows).

    as_json: as the page script sends it, the filled inputs as one JSON field (round_post.ROWS_FIELD).
    """
    data = {"tanks": ",".join(t.code for t in tanks), "round-observed_at": ""}
    for i, tank in enumerate(tanks):
        profile = demo.PROFILE[tank.species.scientific_name]
        fill = i < ROUND_SAVE_TANKS or not filled_only
        for name in CheckEntryForm(tank=tank, prefix=tank.code).fields:
            key = f"{tank.code}-{name}"
            if name in profile:
                data[key] = f"{profile[name][0]:g}" if fill else ""
            elif name == "dead_removed":
                data[key] = "0" if fill else ""
            elif name == "activity":
                data[key] = "normal" if fill else ""
            elif name not in ("clumping", "surface_film"):  # unchecked boxes are not sent
                data[key] = ""
    if filled_only:
        data = {k: v for k, v in data.items() if v != "" or "-" not in k}
        data["tanks"] = ",".join(t.code for t in tanks[:ROUND_SAVE_TANKS])
    if as_json:
        rows = {k: v for k, v in data.items() if v != "" and "-" in k and k != "round-observed_at"}
        data = {k: v for k, v in data.items() if k not in rows and (v != "" or "-" not in k)}
        data[ROWS_FIELD] = json.dumps(rows)

    def run():
        response = client.post(url, data)
        facts = consume(response)
        facts["fields"] = len(data)
        return facts
    return run, len(data)


def _forget_everything():
    cache.clear()
    growth.forget()


def _rescan():
    report = deviations.rescan(now=timezone.now())  # what `scan_deviations --records` runs
    return {"rows": report.checks, "opened": len(report.opened), "updated": len(report.updated - report.opened)}


def _scan():
    call_command("scan_deviations", stdout=io.StringIO())
    return {"rows": Tank.objects.in_use().count()}


def build_cases() -> list[Case]:
    c = clients()
    tech, manager, researcher, admin = c[TECHNICIAN], c[MANAGER], c[RESEARCHER], c["superuser"]
    tanks = list(Tank.objects.for_round())
    rooms = {r.code: [t for t in tanks if t.room_id == r.pk] for r in Room.objects.all()}
    room_code = max(rooms, key=lambda code: (len(rooms[code]), code))
    tank = Tank.objects.filter(code="LV-01").first() or tanks[0]
    n_checks = Check.objects.count()
    cases = [
        # What any page costs before its own work: session, login, middleware and the base template around a
        # three-row table. A page whose SQL takes a few ms cannot be within 3x its SQL below this.
        Case("Floor: species list (bare page)", TECHNICIAN, _get(tech, reverse("colonies:species-list")), kind="floor",
             notes="reference for the pages' 3x SQL rule"),
        Case("Today", TECHNICIAN, _get(tech, reverse("colonies:home"))),
        Case(f"Round, all rooms ({len(tanks)} tanks)", TECHNICIAN, _get(tech, reverse("colonies:round"))),
        Case(f"Round, one room ({len(rooms[room_code])} tanks)", TECHNICIAN,
             _get(tech, reverse("colonies:round-room", args=[room_code]))),
    ]
    room_url = reverse("colonies:round-room", args=[room_code])
    run, fields = _round_post(tech, room_url, rooms[room_code])
    cases.append(Case(f"Round save, one room ({len(rooms[room_code])} tanks)", TECHNICIAN, run, rollback=True,
                      expect=(302,), notes=f"{fields} fields; rolled back"))
    run, fields = _round_post(tech, reverse("colonies:round"), tanks, filled_only=True)
    cases.append(Case(f"Round save, {min(ROUND_SAVE_TANKS, len(tanks))} tanks from all rooms", TECHNICIAN, run,
                      rollback=True, expect=(302,), notes=f"{fields} fields (filled rows only); rolled back"))
    run, fields = _round_post(tech, reverse("colonies:round"), tanks, as_json=True)
    cases.append(Case(f"Round save, all rooms ({len(tanks)} tanks)", TECHNICIAN, run, rollback=True, expect=(302,),
                      notes=f"{fields} fields (rows as one JSON field, as the page script sends); rolled back"))
    cases += _batch_cases(tech, tanks)
    plot_tank = reverse("colonies:tank-plot", args=[tank.code])
    today = timezone.localdate()
    period = f"?period_from={today - timedelta(days=29)}&period_to={today}&scope=facility"
    cases += [
        Case("Tank list", TECHNICIAN, _get(tech, reverse("colonies:tank-list"))),
        Case(f"Tank page ({tank.code})", TECHNICIAN, _get(tech, reverse("colonies:tank-detail", args=[tank.code]))),
        Case(f"Tank history ({tank.code})", MANAGER, _get(manager, reverse("colonies:tank-history", args=[tank.code]))),
        Case("Colony-health overview", MANAGER, _get(manager, reverse("colonies:health-overview"))),
        Case("Colony-health overview, new process", MANAGER, _get(manager, reverse("colonies:health-overview")),
             before=growth.forget, warm_up=False, notes="this process's fits forgotten before each run (a restart)"),
        Case("Colony-health overview, nothing cached", MANAGER, _get(manager, reverse("colonies:health-overview")),
             before=_forget_everything, warm_up=False, notes="cache and this process's fits emptied before each run"),
        Case("Overview figure, first", MANAGER, _get(manager, reverse("colonies:health-overview-plot")),
             kind="figure", before=cache.clear, warm_up=False, notes="cache cleared before each run"),
        Case("Overview figure, cached", MANAGER, _get(manager, reverse("colonies:health-overview-plot")), kind="figure"),
        Case(f"Tank figure ({tank.code}), first", TECHNICIAN, _get(tech, plot_tank), kind="figure", before=cache.clear,
             warm_up=False, notes="cache cleared before each run"),
        Case(f"Tank figure ({tank.code}), cached", TECHNICIAN, _get(tech, plot_tank), kind="figure"),
        Case(f"Labels, all tanks ({Tank.objects.count()})", TECHNICIAN, _get(tech, reverse("colonies:tank-labels") + "?status=")),
        Case("Deviation register", MANAGER, _get(manager, reverse("colonies:deviation-register"))),
        Case("Exposure ledger", MANAGER, _get(manager, reverse("experiments:ledger"))),
        Case("Export: checks CSV", MANAGER, _get(manager, reverse("colonies:checks-csv"), True), kind="export"),
        Case("Export: checks XLSX", MANAGER, _xlsx(manager, n_checks), kind="export", notes="rows = checks",
             floor=_xlsx_floor),
        Case("Export: deviations CSV", MANAGER, _get(manager, reverse("colonies:deviation-csv"), True), kind="export"),
        Case("Export: ledger CSV", MANAGER, _get(manager, reverse("experiments:ledger-csv"), True), kind="export"),
        Case("Period report, last 30 days", MANAGER, _get(manager, reverse("experiments:period-report") + period)),
        Case("Period report ZIP, last 30 days", MANAGER, _get(manager, reverse("experiments:period-report-zip") + period),
             notes="built in memory (one CSV per section), not streamed"),
        Case("Export: overview health CSV", MANAGER, _get(manager, reverse("colonies:health-overview-csv"), True),
             kind="export"),
        Case(f"Export: tank health CSV ({tank.code})", TECHNICIAN,
             _get(tech, reverse("colonies:tank-plot-csv", args=[tank.code]), True), kind="export"),
    ]
    cases += _study_cases(researcher)
    cases += [
        Case("Job: scan_deviations", MANAGER, _scan, kind="job", rollback=True, repeats=1,
             notes="rows = tanks scanned; rolled back"),
        Case(f"Job: record rules over all checks ({n_checks})", MANAGER, _rescan, kind="job", rollback=True,
             repeats=1, notes="deviations.rescan (scan_deviations --records); rows = checks judged; rolled back"),
        Case("Back office: checks list", "superuser", _get(admin, "/admin/colonies/check/"),
             notes="generic reference"),
    ]
    return cases


def _batch_cases(tech, tanks) -> list[Case]:
    """The many-tanks screen: the facility's feedings on one page, and saving all of them (rows as one JSON
    field, as the page script sends them)."""
    url = reverse("colonies:batch", args=["feeding"])
    rows = {}
    for t in tanks:
        rows.update({f"{t.code}-record": True, f"{t.code}-food": "sinking fish-food pellets",
                     f"{t.code}-amount": "0.05", f"{t.code}-unit": "g"})
    data = {"tanks": ",".join(t.code for t in tanks), "batch-observed_at": "", ROWS_FIELD: json.dumps(rows)}

    def save():
        facts = consume(tech.post(url, data))
        facts["fields"] = len(data)
        return facts
    return [Case(f"Many tanks: feeding, all rooms ({len(tanks)} tanks)", TECHNICIAN, _get(tech, url)),
            Case(f"Many tanks save: feeding, all rooms ({len(tanks)} tanks)", TECHNICIAN, save, rollback=True,
                 expect=(302,), notes=f"{len(data)} fields (rows as one JSON field); rolled back")]


def _xlsx(client, n_checks):
    def run():
        facts = consume(client.get(reverse("colonies:checks-xlsx")))
        facts["rows"] = n_checks
        return facts
    return run


FLOOR_ROWS = 20_000


def _xlsx_floor() -> dict:
    """XlsxWriter alone: the export's first FLOOR_ROWS rows, built beforehand, written as the view writes them.

    Its cost per row does not depend on the number of rows (constant-memory mode), so a sample is enough."""
    table = list(itertools.islice(check_export.rows(Check.objects.current()), FLOOR_ROWS))
    with tempfile.TemporaryFile() as out:
        started, cpu = time.perf_counter(), time.process_time()
        check_export.write_xlsx_rows(table, out)
        seconds, cpu_s = time.perf_counter() - started, time.process_time() - cpu
    return {"rows": max(len(table), 1), "seconds": seconds, "cpu_s": cpu_s, "what": "XlsxWriter"}


def _study_cases(researcher) -> list[Case]:
    from experiments.models import Study
    study = Study.objects.filter(code="uv-dispersal-01").first() or Study.objects.order_by("pk").first()
    if study is None:
        return [Case("Export: study CSVs", RESEARCHER, lambda: {"status": None}, kind="export",
                     notes="no study at this size (needs LV-01..LV-10)")]
    out = []
    for label, url in (("trials", reverse("experiments:study-csv", args=[study.code])),
                       ("Kaplan-Meier", reverse("experiments:study-chart-csv", args=[study.code, "km"])),
                       ("dose-response", reverse("experiments:study-chart-csv", args=[study.code, "dose"]))):
        out.append(Case(f"Export: study {label} CSV ({study.code})", RESEARCHER, _get(researcher, url, True),
                        kind="export"))
    return out
