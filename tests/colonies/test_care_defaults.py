"""The default care profiles installed by the migrations carry their sources."""
import pytest

from colonies import care_defaults, parameters
from colonies.models import CareTarget, Species

# The numeric profile fields whose default a lab would want to trace to a document.
PROFILE_VALUE_FIELDS = ("check_interval_hours", "feeding_interval_days", "water_change_interval_days",
                        "water_change_fraction", "census_interval_days", "max_density_per_l", "reserve_min_animals")

NAMES = [p["scientific_name"] for p in care_defaults.DEFAULT_PROFILES]


@pytest.mark.django_db
@pytest.mark.parametrize("name", NAMES)
def test_default_species_exists_after_migrations_as_defined(name):
    profile = next(p for p in care_defaults.DEFAULT_PROFILES if p["scientific_name"] == name)

    species = Species.objects.get(scientific_name=name)

    for field in care_defaults.PROFILE_FIELDS:
        assert getattr(species, field) == profile[field], field
    targets = {(t.parameter, t.low, t.high, t.source) for t in species.targets.all()}
    assert targets == set(profile["targets"])


@pytest.mark.django_db
def test_every_default_care_target_names_its_source():
    targets = CareTarget.objects.filter(species__scientific_name__in=NAMES)
    assert targets.count() == sum(len(p["targets"]) for p in care_defaults.DEFAULT_PROFILES)
    for target in targets:
        assert target.source.strip(), target


@pytest.mark.django_db
@pytest.mark.parametrize("name", NAMES)
def test_every_profile_value_has_a_source(name):
    species = Species.objects.get(scientific_name=name)
    missing = [f for f in PROFILE_VALUE_FIELDS if not species.sources.get(f, "").strip()]
    assert missing == []


@pytest.mark.django_db
@pytest.mark.parametrize("name", NAMES)
def test_notes_say_where_no_published_value_exists(name):
    species = Species.objects.get(scientific_name=name)
    assert "no published" in species.notes.lower()
    # Every value sourced only as a lab setting is one the notes must cover.
    lab_settings = [f for f, s in species.sources.items() if s == care_defaults.LAB_SETTING]
    assert lab_settings == [] or "lab setting" in species.notes.lower()


@pytest.mark.parametrize("profile", care_defaults.DEFAULT_PROFILES, ids=NAMES)
def test_default_targets_lie_within_physical_bounds_and_apply_to_the_habitat(profile):
    for key, low, high, _ in profile["targets"]:
        p = parameters.BY_KEY.get(key)
        if p is None:  # a derived value (e.g. un-ionized ammonia) has no physical bounds entry
            continue
        assert p.applies_to(profile["habitat"]), key
        for value in (low, high):
            assert value is None or p.minimum <= value <= p.maximum, (key, value)
        assert low is None or high is None or low <= high, key


@pytest.mark.django_db
def test_installing_the_defaults_again_creates_nothing():
    before = (Species.objects.count(), CareTarget.objects.count())
    assert care_defaults.install(Species, CareTarget) == 0
    assert (Species.objects.count(), CareTarget.objects.count()) == before


@pytest.mark.django_db
def test_default_profiles_have_a_creation_in_their_history():
    from colonies.models import CareTarget, Species

    profiles = care_defaults.DEFAULT_PROFILES
    for species in Species.objects.filter(scientific_name__in=[p["scientific_name"] for p in profiles]):
        created = species.history.filter(history_type="+").get()
        assert created.history_change_reason == "Default profile shipped with Vermilog"
    assert CareTarget.history.filter(history_type="+").count() >= sum(len(p["targets"]) for p in profiles)
