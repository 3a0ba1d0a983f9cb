"""Vermilog settings: one file, driven by environment variables.

DEBUG is off unless the environment says DEBUG=1 (development; `manage.py demo` sets it for
itself, the tests through vermilog/settings_test.py). With DEBUG off, SECRET_KEY must be set and
the production hardening below applies; with SECRET_KEY and ALLOWED_HOSTS set (and usually
DATABASE_URL) `python manage.py check --deploy` is clean. Security settings from the environment
are listed in the README ("Security settings").
"""
import os
from datetime import timedelta
from pathlib import Path

import dj_database_url
from django.core.exceptions import ImproperlyConfigured

from .caches import cache_settings

BASE_DIR = Path(__file__).resolve().parent.parent

_TRUE = {"1", "true", "yes", "on"}
_FALSE = {"0", "false", "no", "off", ""}


def env_bool(name: str, default: bool) -> bool:
    raw = os.environ.get(name)
    if raw is None:
        return default
    value = raw.strip().lower()
    if value in _TRUE:
        return True
    if value in _FALSE:
        return False
    raise ImproperlyConfigured(f"{name}={raw!r} is not a boolean; use 1/0, true/false, yes/no or on/off.")


def env_int(name: str, default: int) -> int:
    raw = os.environ.get(name)
    if raw is None:
        return default
    try:
        return int(raw)
    except ValueError:
        raise ImproperlyConfigured(f"{name}={raw!r} is not an integer.") from None


def env_list(name: str, default: list[str]) -> list[str]:
    raw = os.environ.get(name)
    if raw is None:
        return default
    return [item.strip() for item in raw.split(",") if item.strip()]


def env_path(name: str, default: Path) -> str:
    return os.environ.get(name) or str(default)


DEBUG = env_bool("DEBUG", False)

_DEV_SECRET = "vermilog-development-only-key-never-use-in-production"
SECRET_KEY = os.environ.get("SECRET_KEY", "")
if not SECRET_KEY:
    if not DEBUG:
        raise ImproperlyConfigured("SECRET_KEY must be set when DEBUG is off. Set SECRET_KEY to a long random "
                                   "value (e.g. python -c 'import secrets; print(secrets.token_urlsafe(50))'), or "
                                   "DEBUG=1 for development on this machine only.")
    SECRET_KEY = _DEV_SECRET

# Local addresses only unless the deployment names its host(s); an unknown Host header gets 400.
ALLOWED_HOSTS = env_list("ALLOWED_HOSTS", ["127.0.0.1", "localhost", "[::1]"])
CSRF_TRUSTED_ORIGINS = env_list("CSRF_TRUSTED_ORIGINS", [])

INSTALLED_APPS = [
    "vermilog",  # first, so its createsuperuser (password validators without a bypass) wins
    "django.contrib.admin",
    "django.contrib.auth",
    "django.contrib.contenttypes",
    "django.contrib.sessions",
    "django.contrib.messages",
    "whitenoise.runserver_nostatic",
    "django.contrib.staticfiles",
    "django_filters",
    "axes",
    # Before simple_history: Django runs the management command of the earliest app that has one, so
    # colonies' refusing clean_duplicate_history / clean_old_history replace the library's purges.
    "colonies",
    "experiments",
    "simple_history",
]

# Hides the history library's "revert" button; colonies.admin.HistoryAdmin also refuses the
# revert form itself, so this setting is not the only guard.
SIMPLE_HISTORY_REVERT_DISABLED = True

MIDDLEWARE = [
    "django.middleware.security.SecurityMiddleware",
    "whitenoise.middleware.WhiteNoiseMiddleware",
    "django.contrib.sessions.middleware.SessionMiddleware",
    "django.middleware.common.CommonMiddleware",
    "django.middleware.csrf.CsrfViewMiddleware",
    "django.contrib.auth.middleware.AuthenticationMiddleware",
    "django.contrib.auth.middleware.LoginRequiredMiddleware",
    "django.contrib.messages.middleware.MessageMiddleware",
    "django.middleware.clickjacking.XFrameOptionsMiddleware",
    # Puts request.user on every history row (who made the change).
    "simple_history.middleware.HistoryRequestMiddleware",
    # Login throttling (django-axes); last, as its documentation asks.
    "axes.middleware.AxesMiddleware",
]

# Axes first: it refuses a locked-out username+address before the password is even checked.
AUTHENTICATION_BACKENDS = [
    "axes.backends.AxesStandaloneBackend",
    "django.contrib.auth.backends.ModelBackend",
]

ROOT_URLCONF = "vermilog.urls"

TEMPLATES = [
    {
        "BACKEND": "django.template.backends.django.DjangoTemplates",
        "DIRS": [BASE_DIR / "templates"],
        "APP_DIRS": True,
        "OPTIONS": {
            "context_processors": [
                "django.template.context_processors.request",
                "django.contrib.auth.context_processors.auth",
                "django.contrib.messages.context_processors.messages",
                "colonies.roles.roles_context",
                "vermilog.lab_time.lab_time_context",
            ],
        },
    },
]

WSGI_APPLICATION = "vermilog.wsgi.application"

DATABASES = {
    "default": dj_database_url.parse(
        os.environ.get("DATABASE_URL", f"sqlite:///{BASE_DIR / 'vermilog.sqlite3'}"),
        conn_max_age=env_int("DB_CONN_MAX_AGE", 0),
    )
}
if DATABASES["default"]["ENGINE"] == "django.db.backends.sqlite3":
    # Same backend, with SQLite's real parameter limit and write-ahead logging (vermilog/sqlite3/base.py).
    DATABASES["default"]["ENGINE"] = "vermilog.sqlite3"
    # Several people save at once: every transaction takes the write lock when it begins (a
    # deferred one that reads first and then writes cannot wait for the lock and fails at once
    # with "database is locked"), and a writer waits up to SQLITE_BUSY_TIMEOUT_S for the one before.
    DATABASES["default"]["OPTIONS"] = {
        "transaction_mode": "IMMEDIATE",
        "timeout": env_int("SQLITE_BUSY_TIMEOUT_S", 20),
        **DATABASES["default"].get("OPTIONS", {}),
    }
    # Tests run on a file, as production does; the in-memory shared-cache database Django uses by
    # default for tests has table locks instead of WAL and hides what concurrent writers do.
    DATABASES["default"]["TEST"] = {"NAME": env_path("SQLITE_TEST_NAME", BASE_DIR / "test-vermilog.sqlite3")}
elif DATABASES["default"]["ENGINE"] == "django.db.backends.postgresql":
    # No just-in-time compilation: PostgreSQL compiles a query whose estimated cost passes
    # jit_above_cost, which a page's correlated subqueries over years of records do, and the
    # compilation (17.6 ms on Today's query at 400 tanks x 3 years) costs more than the query saves.
    # PG_JIT=on gives it back (for long reports run by hand).
    DATABASES["default"]["OPTIONS"] = {
        "options": f"-c jit={'on' if os.environ.get('PG_JIT') == 'on' else 'off'}",
        **DATABASES["default"].get("OPTIONS", {}),
    }
DEFAULT_AUTO_FIELD = "django.db.models.BigAutoField"
# History reasons in a text column: a reason of any length the forms allow (REASON_MAX_CHARS in
# colonies/models.py) plus a prefix such as "Cancelled: " fits on every database.
SIMPLE_HISTORY_HISTORY_CHANGE_REASON_USE_TEXT_FIELD = True

AUTH_PASSWORD_VALIDATORS = [
    {"NAME": "django.contrib.auth.password_validation.UserAttributeSimilarityValidator"},
    {"NAME": "django.contrib.auth.password_validation.MinimumLengthValidator"},
    {"NAME": "django.contrib.auth.password_validation.CommonPasswordValidator"},
    {"NAME": "django.contrib.auth.password_validation.NumericPasswordValidator"},
]

# Sessions end after SESSION_COOKIE_AGE seconds without a request (idle timeout, default 8 h): saving the
# session on every request moves the expiry forward each time.
SESSION_COOKIE_AGE = env_int("SESSION_COOKIE_AGE", 8 * 3600)
SESSION_SAVE_EVERY_REQUEST = True

# Login throttling: AXES_FAILURE_LIMIT failed logins for one username from one address lock that pair
# out for AXES_COOLOFF_MINUTES; a successful login resets the count. Managers see attempts in the back office.
AXES_FAILURE_LIMIT = env_int("AXES_FAILURE_LIMIT", 5)
AXES_COOLOFF_TIME = timedelta(minutes=env_int("AXES_COOLOFF_MINUTES", 15))
AXES_LOCKOUT_PARAMETERS = [["username", "ip_address"]]
AXES_RESET_ON_SUCCESS = True
AXES_LOCKOUT_TEMPLATE = "registration/locked_out.html"
AXES_ENABLED = env_bool("AXES_ENABLED", True)

# Attachments (experiments/uploads.py stops reading a file past this size while it streams in).
ATTACHMENT_MAX_BYTES = env_int("ATTACHMENT_MAX_BYTES", 500 * 1024 * 1024)
FILE_UPLOAD_HANDLERS = [
    "experiments.uploads.SizeLimitUploadHandler",
    "django.core.files.uploadhandler.MemoryFileUploadHandler",
    "django.core.files.uploadhandler.TemporaryFileUploadHandler",
]
# Image measurements (experiments/measuring.py) of at most this many working pixels (frames x pixels
# after scaling to 1024 px) run in the request; larger ones in a background thread with a progress bar.
IMAGING_SYNC_MAX_PIXELS = env_int("IMAGING_SYNC_MAX_PIXELS", 4_000_000)
FILE_UPLOAD_MAX_MEMORY_SIZE = 2 * 1024 * 1024  # larger files go to a temporary file, not memory
DATA_UPLOAD_MAX_MEMORY_SIZE = 2 * 1024 * 1024  # form fields other than files

LOGIN_URL = "login"
LOGIN_REDIRECT_URL = "colonies:home"
LOGOUT_REDIRECT_URL = "login"

LANGUAGE_CODE = "en-gb"
# The lab's one time zone (an IANA name such as Europe/Berlin; an unknown name stops the start-up).
# Every page names it in its footer (vermilog/lab_time.py); dates are written the lab's way
# (vermilog/formats/en_GB/formats.py: "05 Dec 2026 14:30"), not the browser's.
TIME_ZONE = os.environ.get("TIME_ZONE", "UTC")
USE_I18N = True
USE_TZ = True  # who/when are stored in UTC and shown in TIME_ZONE
FORMAT_MODULE_PATH = ["vermilog.formats"]

STATIC_URL = "static/"
STATICFILES_DIRS = [BASE_DIR / "static"]
STATIC_ROOT = BASE_DIR / "staticfiles"
STORAGES = {
    "default": {"BACKEND": "django.core.files.storage.FileSystemStorage"},
    "staticfiles": {
        "BACKEND": (
            "django.contrib.staticfiles.storage.StaticFilesStorage"
            if DEBUG
            else "whitenoise.storage.CompressedManifestStaticFilesStorage"
        )
    },
}
# Rendered colony-health plots (colonies/health_plots.py); keys carry a records version, so a new
# record makes a new key. One cache shared by every worker process: a folder on disk by default,
# or the database or Redis for several app servers (VERMILOG_CACHE, vermilog/caches.py, README).
CACHES = cache_settings(os.environ, BASE_DIR)

MEDIA_ROOT = Path(os.environ.get("MEDIA_ROOT", BASE_DIR / "media"))
MEDIA_URL = "media/"

# Production hardening; each can be relaxed from the environment (e.g. behind a TLS proxy).
if not DEBUG:
    SECURE_SSL_REDIRECT = env_bool("SECURE_SSL_REDIRECT", True)
    # A load balancer's health probe talks plain HTTP to the app server inside the network.
    SECURE_REDIRECT_EXEMPT = [r"^healthz/$"]
    SECURE_PROXY_SSL_HEADER = ("HTTP_X_FORWARDED_PROTO", "https") if env_bool("BEHIND_TLS_PROXY", False) else None
    SECURE_HSTS_SECONDS = env_int("SECURE_HSTS_SECONDS", 31536000)
    SECURE_HSTS_INCLUDE_SUBDOMAINS = env_bool("SECURE_HSTS_INCLUDE_SUBDOMAINS", True)
    SECURE_HSTS_PRELOAD = env_bool("SECURE_HSTS_PRELOAD", True)
    SESSION_COOKIE_SECURE = True
    CSRF_COOKIE_SECURE = True

LOGGING = {
    "version": 1,
    "disable_existing_loggers": False,
    "handlers": {"console": {"class": "logging.StreamHandler"}},
    "root": {"handlers": ["console"], "level": os.environ.get("LOG_LEVEL", "WARNING")},
}
