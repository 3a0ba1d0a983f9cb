"""Settings for the test suite: development mode (DEBUG=1 unless the environment says otherwise).

DEBUG decides at import time whether production hardening applies (HTTPS redirect, manifest
static storage, a required SECRET_KEY); the tests exercise the app as a developer runs it. The
production configuration is tested by tests/test_settings.py, which starts manage.py with an
explicit environment. pytest-django still runs each test with settings.DEBUG = False.
"""
import os

os.environ.setdefault("DEBUG", "1")

from .settings import *  # noqa: E402,F401,F403
