"""`manage.py scan_deviations --records`: the record rules over the stored checks, from the command line.

(The time-based scan without --records is tested in test_deviations.py.)
"""
from datetime import timedelta

import pytest
from django.core.management import CommandError, call_command
from django.utils import timezone

from colonies.models import EVIDENCE_KEEP, ArchivedEvidence, Check, Deviation
from tests.factories import make_species, make_tank

pytestmark = pytest.mark.django_db
Rule = Deviation.Rule


def _checks(tank, user, temps, *, start):
    """Checks stored without running the rules (as an import or a restore leaves them), one a day."""
    return Check.objects.bulk_create([Check(tank=tank, recorded_by=user, observed_at=start + timedelta(days=i),
                                            temp_c=t) for i, t in enumerate(temps)])


def _run(capsys, *args) -> str:
    call_command("scan_deviations", "--records", *args)
    out = capsys.readouterr().out
    assert len(out.strip().splitlines()) == 1
    return out.strip()


def test_dry_run_judges_every_check_and_writes_nothing(technician, capsys):
    tank = make_tank(species=make_species(targets={"temp_c": (20.0, 24.0)}))
    _checks(tank, technician, [22.0, 26.0, 27.0], start=timezone.now() - timedelta(days=5))
    out = _run(capsys, "--dry-run")
    assert out == "Dry run: 3 checks judged, 2 findings; nothing written."
    assert not Deviation.objects.exists()


def test_a_second_run_opens_and_adds_nothing(technician, capsys):
    tank = make_tank(species=make_species(targets={"temp_c": (20.0, 24.0)}))
    _checks(tank, technician, [22.0, 26.0, 27.0, 22.0, 25.0], start=timezone.now() - timedelta(days=5))
    first = _run(capsys)
    versions = Deviation.history.count()
    second = _run(capsys)
    assert first == "Rescanned records: 5 checks judged, 3 findings; 1 opened, 0 updated."
    assert second == "Rescanned records: 5 checks judged, 3 findings; 0 opened, 0 updated."
    assert Deviation.objects.get().evidence_count == 3 and Deviation.history.count() == versions


def test_since_judges_later_checks_against_the_history_before_them(technician, capsys):
    tank = make_tank(species=make_species(targets={"temp_c": (20.0, 25.0)}))
    start = timezone.localtime() - timedelta(days=30)
    # the steady baseline of test_deviations' drift case, then a rise still inside the target
    baseline = [22.0, 22.2, 21.9, 22.1, 22.0, 21.8, 22.1, 22.0, 22.2, 21.9, 22.0, 22.1]
    checks = _checks(tank, technician, baseline + [22.6, 23.2, 23.7, 24.0, 24.3, 24.5, 24.7], start=start)
    since = timezone.localtime(checks[-1].observed_at).date()
    out = _run(capsys, "--since", since.isoformat())
    assert out.startswith("Rescanned records: 1 check judged, 1 finding; 1 opened")
    assert Deviation.objects.get().rule == Rule.DRIFT  # found only with the 18 checks before it


@pytest.mark.parametrize("args, message", [
    (["--records", "--since", "2026-13-01"], "--since: '2026-13-01' is not a date; write it as YYYY-MM-DD."),
    (["--records", "--since", "1900-01-01"], "--since: 01 Jan 1900 is impossible; allowed range 01 Jan 1950 to"),
    (["--since", "2024-01-01"], "--since applies to --records only."),
])
def test_bad_since_is_refused_with_the_allowed_form_or_range(args, message):
    with pytest.raises(CommandError) as refused:
        call_command("scan_deviations", *args)
    assert str(refused.value).startswith(message)


def test_a_deviation_with_more_evidence_than_it_shows_gains_no_duplicates_and_is_not_reopened(technician, capsys):
    tank = make_tank(species=make_species(targets={"temp_c": (20.0, 24.0)}))
    _checks(tank, technician, [26.0] * (EVIDENCE_KEEP + 10), start=timezone.now() - timedelta(days=EVIDENCE_KEEP + 20))
    _run(capsys)
    deviation = Deviation.objects.get()
    assert (deviation.evidence_count, len(deviation.evidence)) == (EVIDENCE_KEEP + 10, EVIDENCE_KEEP)
    assert ArchivedEvidence.objects.filter(deviation=deviation).count() == 10  # the oldest, kept whole
    assert _run(capsys).endswith("0 opened, 0 updated.")
    deviation.close(user=technician, corrective_action="Heater thermostat replaced", password="pw")
    assert _run(capsys).endswith("0 opened, 0 updated.")
    deviation.refresh_from_db()
    assert deviation.evidence_count == EVIDENCE_KEEP + 10 and Deviation.objects.count() == 1
