"""colonies.check_frames: each row's history bound, and observed times read back exactly on either database."""
import bisect
import random
from datetime import timedelta

import numpy as np
import pytest
from django.utils import timezone

from colonies import check_frames
from colonies.check_frames import HISTORY_US, CheckFrame
from colonies.models import Check
from tests.factories import make_species, make_tank


def _frame(tanks: list[int], times: list[int]) -> CheckFrame:
    n = len(tanks)
    return CheckFrame(np.arange(n), np.array(tanks), np.array(times), np.zeros(n, np.int64), {}, np.ones(n, bool), {})


def test_since_is_the_first_row_of_the_same_tank_within_the_history_days():
    rng = random.Random(4)
    rows = sorted((tank, rng.randrange(0, 120 * 86_400_000_000)) for tank in (3, 7, 8) for _ in range(200))
    rows += [(9, 5), (9, 5), (9, 5 + HISTORY_US)]  # ties and a row exactly HISTORY_DAYS after another
    frame = _frame([t for t, _ in rows], [at for _, at in rows])
    for i, (tank, at) in enumerate(rows):
        first = next(j for j, (t, _) in enumerate(rows) if t == tank)
        times = [a for t, a in rows if t == tank]
        # as the rules saw it one check at a time: bisect over the tank's times before this row
        assert frame.since[i] == first + bisect.bisect_left(times, at - HISTORY_US, 0, i - first)
    assert frame.earliest(2)[-1] == len(rows) - 3  # at most 2 rows back, within the same tank


@pytest.mark.django_db
def test_frames_read_observed_times_back_to_the_microsecond(technician):
    tank = make_tank(species=make_species(targets={"temp_c": (20.0, 24.0)}))
    base = timezone.now().replace(microsecond=0) - timedelta(days=3)
    moments = [base, base + timedelta(microseconds=1), base + timedelta(hours=5, microseconds=410432)]
    checks = Check.objects.bulk_create([Check(tank=tank, recorded_by=technician, observed_at=m, temp_c=22.0)
                                        for m in moments])
    [frame] = check_frames.frames(start=base, stop=moments[-1])
    assert [frame.observed_at(i) for i in range(len(frame))] == moments
    assert frame.pk.tolist() == [c.pk for c in checks]
