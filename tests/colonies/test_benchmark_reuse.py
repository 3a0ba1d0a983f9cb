"""manage.py benchmark --keep, then --reuse with --only: the kept facility is timed again (not rebuilt),
only the named cases run, and a missing file is refused with the option's name."""
import io
import json

import pytest
from django.core.management import CommandError, call_command

from colonies.benchmark import database
from colonies.models import Tank


@pytest.mark.django_db(transaction=True)
def test_a_kept_database_is_timed_again_for_the_chosen_cases_only(tmp_path):
    db = tmp_path / "kept.sqlite3"
    first, again = tmp_path / "first.json", tmp_path / "again.json"
    call_command("benchmark", tanks=4, days=6, repeats=1, db=str(db), keep=True, only=["Today"],
                 json=str(first), stdout=io.StringIO(), no_memory=True)
    kept = json.loads(first.read_text())["build"]
    built = kept["counts"]
    try:
        call_command("benchmark", reuse=kept["database"], repeats=1, only=["tank list", "TODAY"], json=str(again),
                     stdout=io.StringIO(), no_memory=True)
    finally:
        database.drop(kept["database"])

    doc = json.loads(again.read_text())
    assert doc["build"]["reused"] is True
    assert doc["build"]["counts"]["tanks"] == built["tanks"] == 4
    assert doc["build"]["counts"]["check"] == built["check"]  # timed again, not rebuilt or added to
    assert sorted(r["name"] for r in doc["results"]) == ["Tank list", "Today"]
    assert all(r["ok"] for r in doc["results"])
    assert Tank.objects.count() == 0  # the configured database is untouched


@pytest.mark.django_db
def test_reusing_a_missing_database_names_the_option(tmp_path):
    with pytest.raises(CommandError, match="--reuse"):
        call_command("benchmark", reuse=str(tmp_path / "absent"), stdout=io.StringIO())
