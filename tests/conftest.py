"""Personas and speed settings shared by every test. Test data builders live in tests/factories.py."""
import pytest
from django.contrib.auth.models import User
from hypothesis import HealthCheck, settings as hypothesis_settings

from colonies.roles import MANAGER, RESEARCHER, TECHNICIAN
from tests.factories import make_user


# Property tests are derandomized (the same examples on every run, so CI is repeatable) and are never
# timed: on a loaded 2-core CI machine a slow example is not a failure.
hypothesis_settings.register_profile("vermilog", derandomize=True, deadline=None,
                                     suppress_health_check=[HealthCheck.too_slow])
hypothesis_settings.load_profile("vermilog")


def pytest_configure(config):
    # WhiteNoise warns on every new client that STATIC_ROOT is missing; tests never collect static files.
    config.addinivalue_line("filterwarnings", "ignore:No directory at:UserWarning")


@pytest.fixture(autouse=True)
def _fast_password_hasher(settings):
    # The default PBKDF2 hasher costs ~0.1 s per user created or logged in; MD5 is fine for tests.
    settings.PASSWORD_HASHERS = ["django.contrib.auth.hashers.MD5PasswordHasher"]


@pytest.fixture(autouse=True)
def _session_saved_only_when_changed(settings):
    # Production saves the session on every request (idle timeout, vermilog/settings.py): a savepoint, an
    # UPDATE and a release per request. Query-count tests measure the page itself, so the suite turns it
    # off; tests/test_security.py turns it back on to test the idle timeout.
    settings.SESSION_SAVE_EVERY_REQUEST = False


@pytest.fixture(autouse=True)
def _media_in_a_temporary_folder(settings, tmp_path_factory):
    # Attachments (the trials demo stores photo series) are written under MEDIA_ROOT: never the checkout's.
    settings.MEDIA_ROOT = tmp_path_factory.mktemp("media")


@pytest.fixture
def technician(db):
    return make_user("tess", role=TECHNICIAN)


@pytest.fixture
def researcher(db):
    return make_user("rhea", role=RESEARCHER)


@pytest.fixture
def manager(db):
    return make_user("mona", role=MANAGER)


@pytest.fixture
def outsider(db):
    """Logged-in user with no role."""
    return make_user("otto")


@pytest.fixture
def superuser(db):
    """Holds no group; counts as a manager."""
    return User.objects.create_superuser("root", "root@example.invalid", "pw")
