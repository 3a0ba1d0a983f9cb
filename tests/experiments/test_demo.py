"""The invented trials demo (experiments/demo.py) on a minimal stand-in for the colonies demo."""
import pytest
from django.utils import timezone

from colonies.models import Deviation, Species
from colonies.roles import MANAGER, RESEARCHER, TECHNICIAN
from experiments import demo, reports
from experiments.models import Booking, Cohort, Dish, Override, Study, Trial
from tests.experiments.builders import make_stocked_tank
from tests.factories import make_room, make_species, make_user


@pytest.fixture
def facility(db):
    users = {TECHNICIAN: [make_user("tamsin", role=TECHNICIAN)], RESEARCHER: [make_user("ravi", role=RESEARCHER)],
             MANAGER: [make_user("morwen", role=MANAGER)]}
    species = Species.objects.filter(scientific_name="Lumbriculus variegatus").first() or \
        make_species(scientific_name="Lumbriculus variegatus")
    species.reserve_min_animals = 500
    species.save()
    room = make_room(code="fw-1")
    for i in range(1, 11):
        make_stocked_tank(estimate=3000 + 100 * i, species=species, room=room, code=f"LV-{i:02d}",
                          user=users[TECHNICIAN][0], observed_at=timezone.now() - timezone.timedelta(days=40))
    return users


@pytest.mark.parametrize("seed", [7, 2026])
def test_demo_builds_a_meaningful_study(facility, seed):
    counts = demo.load(seed=seed, now=timezone.now(), users=facility, password="pw")
    assert counts == {"protocols": 3, "bookings": 10, "cohorts": 5, "dishes": 11, "studies": 2, "trials": 32,
                      "overrides": 1, "expired_bookings": 1, "image_series": 8}
    study = Study.objects.get(code="uv-dispersal-01")
    assert study.trials.count() == 30 and not study.is_blind
    trials = list(study.trials.select_related("study", "cohort__origin_tank", "protocol", "run_by", "scored_by",
                                              "override__recorded_by"))
    result = reports.analyse(reports.tidy_frame(trials), study.conditions, reference=study.reference_condition)
    assert result.dose_fit is not None and result.dose_fit.interval_method == "fieller"
    assert 3 < result.dose_fit.ec50 < 40
    assert all(r.logrank for r in result.conditions[1:])
    override = Override.objects.get()
    assert override.deviation.rule == Deviation.Rule.PROTOCOL_LIMIT and "rest" in override.breaches[0].lower()
    assert Booking.objects.filter(status=Booking.Status.EXPIRED).count() == 1
    assert Cohort.objects.filter(end="").count() == 2
    # Three dishes of 8 from one cohort of 24, all run within the same hour, each exposed three times.
    first = Cohort.objects.filter(size=24).order_by("pk").first()
    dishes = list(first.dishes.order_by("number"))
    assert [d.animals for d in dishes] == [8, 8, 8] and first.end == Cohort.End.IN_DISHES
    day_one = sorted(d.trials.order_by("run_at").first().run_at for d in dishes)
    assert day_one[-1] - day_one[0] < timezone.timedelta(hours=1)
    assert all(d.trials.count() == 3 for d in dishes)
    assert Dish.objects.filter(end=Dish.End.RETURNED).count() == 8 and Dish.objects.filter(end="").count() == 2
    assert Trial.objects.filter(study__code="shock-pilot-01").count() == 2


@pytest.mark.parametrize("seed", [7, 2026])
def test_demo_study_has_photo_series_and_agreement_figures(facility, seed):
    from experiments import measuring
    from experiments.models import ImageMeasurement

    demo.load(seed=seed, now=timezone.now(), users=facility, password="pw")
    study = Study.objects.get(code="uv-dispersal-01")
    measured = ImageMeasurement.objects.filter(trial__study=study)
    assert measured.count() == 8 and all(m.status == "done" and m.frames_total == 13 for m in measured)
    result = measuring.study_agreement(study, list(study.trials.all()))
    row = result.rows[0]
    assert row.n_pairs == 8 and row.bland_altman is not None and row.kappa is not None
    assert abs(row.bland_altman.bias) < 60  # the frames are drawn to disperse near the scored time
