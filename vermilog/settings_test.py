"""Settings for the test suite: development mode (DEBUG=1 unless the environment says otherwise).

DEBUG decides at import time whether production hardening applies (HTTPS redirect, manifest
static storage, a required SECRET_KEY); the tests exercise the app as a developer runs it. The
production configuration is tested by tests/test_settings.py, which starts manage.py with an
explicit environment. pytest-django still runs each test with settings.DEBUG = False.
"""
import atexit
import os
import shutil
import tempfile

os.environ.setdefault("DEBUG", "1")
if "VERMILOG_CACHE_LOCATION" not in os.environ and os.environ.get("VERMILOG_CACHE", "file") == "file":
    # The default file cache, in a folder of this run's own (removed at exit): entries of an earlier run,
    # keyed by record ids that a fresh test database reuses, must not answer this one. Processes the
    # tests start inherit the variable and share the folder, as worker processes do.
    os.environ["VERMILOG_CACHE_LOCATION"] = tempfile.mkdtemp(prefix="vermilog-test-cache-")
    atexit.register(shutil.rmtree, os.environ["VERMILOG_CACHE_LOCATION"], True)

from .settings import *  # noqa: E402,F401,F403
