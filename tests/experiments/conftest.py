"""Fixtures for the experiments tests; builders live in tests/experiments/builders.py."""
import pytest

from tests.experiments.builders import make_protocol, make_stocked_tank


@pytest.fixture
def protocol(db):
    return make_protocol()


@pytest.fixture
def tank(db, technician):
    """1000 animals at the last census, 100 of them the species' reserve: 900 available."""
    return make_stocked_tank(estimate=1000, reserve=100, user=technician, code="LV-T1")


@pytest.fixture
def content_types_cached(db):
    """Pages that show signatures read the signed model's ContentType once per process (Django caches it);
    query counts are taken with that cache warm, as a running server has it."""
    from django.apps import apps
    from django.contrib.contenttypes.models import ContentType

    ContentType.objects.get_for_models(*apps.get_models())
