"""A full rescan of the record rules (evaluate_checks over every check, in time windows) finds what
running the rules as each check was saved finds."""
import random
from datetime import timedelta

import pytest
from django.db import transaction
from django.utils import timezone

from colonies import deviations
from colonies.models import Check, Deviation
from tests.factories import make_species, make_tank, make_user

pytestmark = pytest.mark.django_db


def _seed(user) -> list[Check]:
    """Two tanks, ~5 months of daily checks with a 40-day gap, excursions, drifts and deaths (invented)."""
    rng = random.Random(9)
    fresh = make_tank(code="RS-01", species=make_species(targets={"temp_c": (20.0, 24.0), "ph": (6.8, 7.8),
                                                                   "nh3_mg_l": (None, 0.02)}))
    marine = make_tank(code="RS-02", species=make_species(habitat="marine", targets={"do_pct_sat": (80.0, None)}))
    start = timezone.now() - timedelta(days=200)
    checks = []
    for day in [d for d in range(190) if not 70 <= d < 110]:
        at = start + timedelta(days=day, hours=rng.randint(0, 3))
        drift = max(0, day - 150) * 0.08  # creeps toward the upper temperature limit at the end
        checks.append(Check(tank=fresh, recorded_by=user, observed_at=at, temp_c=round(21.5 + drift + rng.gauss(0, 0.3), 1),
                            ph=round(7.3 + rng.gauss(0, 0.2), 2), tan_mg_l=round(abs(rng.gauss(0.3, 0.3)), 2),
                            dead_removed=rng.choice([0, 0, 1, 2, 9, 30]) if day % 17 == 0 else rng.randint(0, 2)))
        checks.append(Check(tank=marine, recorded_by=user, observed_at=at, temp_c=round(18 + rng.gauss(0, 0.5), 1),
                            salinity=33.0, do_mg_l=round(rng.gauss(6.6, 0.6), 2), dead_removed=rng.randint(0, 6)))
    return Check.objects.bulk_create(checks)


def _deviations() -> list[tuple]:
    return sorted((d.tank_id, d.rule, d.parameter, d.subject, d.severity, d.opened_at, d.last_seen_at, d.summary,
                   d.evidence_count, [e["ref"] for e in d.evidence]) for d in Deviation.objects.all())


def test_a_rescan_in_windows_opens_the_deviations_the_per_check_path_opens():
    checks = _seed(make_user("rescan-tech"))
    assert (checks[-1].observed_at - checks[0].observed_at).days > 2 * deviations.WINDOW_DAYS  # several windows
    now = timezone.now()
    with transaction.atomic():
        for check in sorted(checks, key=lambda c: (c.observed_at, c.pk)):  # as if each was saved on its own
            deviations.evaluate_checks([check], now=now)
        one_by_one = _deviations()
        transaction.set_rollback(True)
    assert Deviation.objects.count() == 0

    deviations.evaluate_checks(list(Check.objects.order_by("tank_id", "observed_at")), now=now)

    rescan = _deviations()
    assert {d[1] for d in rescan} >= {Deviation.Rule.OUT_OF_TARGET, Deviation.Rule.MORTALITY, Deviation.Rule.DRIFT}
    assert rescan == one_by_one
