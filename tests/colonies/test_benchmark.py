"""manage.py benchmark at a tiny size: it finishes, reports every measurement, builds the same data for
the same seed, and never writes to the configured database. Speed itself is never asserted."""
import io
import json

import pytest
from django.contrib.auth.models import User
from django.core.management import call_command
from django.db import connection, transaction

from colonies.benchmark import database, synthetic
from colonies.models import Check, Deviation, Tank

# Every measurement the brief for the benchmark lists, by the start of its name.
EXPECTED = [
    "Floor: species list", "Today", "Round, all rooms", "Round, one room", "Round save, one room", "Round save, 20 tanks from all rooms",
    "Round save, all rooms", "Many tanks: feeding, all rooms", "Many tanks save: feeding, all rooms", "Tank list", "Tank page", "Tank history", "Colony-health overview",
    "Colony-health overview, new process", "Colony-health overview, nothing cached",
    "Overview figure, first", "Overview figure, cached", "Tank figure (LV-01), first", "Tank figure (LV-01), cached",
    "Labels, all tanks", "Deviation register", "Exposure ledger", "Export: checks CSV", "Export: checks XLSX",
    "Export: deviations CSV", "Export: ledger CSV", "Period report, last 30 days",
    "Period report ZIP, last 30 days", "Export: overview health CSV", "Export: tank health CSV",
    "Export: study trials CSV", "Export: study Kaplan-Meier CSV", "Export: study dose-response CSV",
    "Job: scan_deviations", "Job: record rules over all checks", "Back office: checks list",
]


@pytest.mark.django_db(transaction=True)
def test_benchmark_reports_every_page_and_leaves_the_configured_database_alone(tmp_path):
    before = (User.objects.count(), Tank.objects.count(), Check.objects.count(), Deviation.objects.count())
    name = connection.settings_dict["NAME"]
    out = tmp_path / "bench.json"
    printed = io.StringIO()

    call_command("benchmark", tanks=20, days=25, repeats=1, json=str(out), stdout=printed)

    doc = json.loads(out.read_text())
    names = [r["name"] for r in doc["results"]]
    for prefix in EXPECTED:
        assert any(n.startswith(prefix) for n in names), prefix
    for r in doc["results"]:
        assert r["ok"], (r["name"], r["error"])
        assert r["median_ms"] is not None and r["max_ms"] >= r["median_ms"] and r["queries"] >= 1, r["name"]
    exports = [r for r in doc["results"] if r["name"].startswith("Export:")]
    assert all(r["rows"] and r["peak_mib"] is not None for r in exports)
    checks_csv = next(r for r in exports if r["name"] == "Export: checks CSV")
    assert checks_csv["rows"] == doc["build"]["counts"]["check"]
    assert doc["build"]["counts"]["tanks"] == 20 and doc["build"]["counts"]["study"] == 2
    # Every result is judged against the targets, in the JSON and in the table.
    assert all(r["verdict"] in ("met", "not met", "floor", "") for r in doc["results"])
    today = next(r for r in doc["results"] if r["name"] == "Today")
    assert today["target"] == "<= 150 ms, <= 3x SQL" and today["target_ms"] == 150 and today["verdict"]
    assert checks_csv["streaming"] is True and checks_csv["target_rows_per_s"] == 50_000
    xlsx = next(r for r in exports if r["name"] == "Export: checks XLSX")
    assert xlsx["floor_what"] == "XlsxWriter" and xlsx["floor_rows_per_s"] > 0 and xlsx["floor_cpu_rows_per_s"] > 0
    assert sum(1 for r in doc["results"] if r["target"]) >= len(EXPECTED) - 6  # six without a target
    # Every page that renders a template reports the engine's own time on it, below the page's own time.
    tank_page = next(r for r in doc["results"] if r["name"].startswith("Tank page"))
    assert 0 < tank_page["template_ms"] < tank_page["max_ms"]
    assert today["template_ms"] is not None and "template alone" in printed.getvalue()
    table = printed.getvalue()
    assert "| verdict " in table and "<= 3x SQL" in table
    assert "median ms" in table and "| Today " in table and "Back office: checks list" in table
    # Nothing reached the configured (test) database, and the connection points at it again.
    assert connection.settings_dict["NAME"] == name
    assert (User.objects.count(), Tank.objects.count(), Check.objects.count(), Deviation.objects.count()) == before


@pytest.mark.django_db(transaction=True)
def test_synthetic_facility_is_the_same_for_a_seed_and_differs_for_another():
    builds = []
    with database.scratch_database():
        for seed in (7, 7, 8):
            with transaction.atomic():
                builds.append(synthetic.build(tanks=6, days=12, seed=seed, trials=False))
                flagged = Check.objects.exclude(flags={}).count()
                transaction.set_rollback(True)
    first, again, other = builds
    assert first["counts"] == again["counts"] and first["checksum"] == again["checksum"]
    assert first["counts"]["check"] > 6 * 10 and first["counts"]["census"] > 0 and flagged >= 0
    assert other["checksum"] != first["checksum"]
    assert Tank.objects.count() == 0
